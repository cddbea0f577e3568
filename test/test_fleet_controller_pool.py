"""Controllers on worker processes (fleet/controller_pool.py) and the stage counters of the
tick loop (fleet/step.StageTimes).

What is checked, and against what:
- a mixed fleet (all four vehicle types, process and measurement noise, targets committed
  while it runs) simulated with its controllers in this process and on two worker
  processes writes the same log files, byte for byte, but for the measured solve times: an
  MPC solve is a deterministic computation of its inputs and the controller's own history
  (common practice: the reason parallel and serial runs of a deterministic simulation can
  be compared exactly);
- the split of robots over workers (greedy, heaviest first) stays within Graham's bound for
  that rule, makespan <= (4/3 - 1/(3m)) x the optimal one (R. L. Graham, "Bounds on
  multiprocessing timing anomalies", SIAM J. Appl. Math. 17(2), 1969, theorem 2), with
  the optimum found by trying every split;
- the stage counters count what the log holds (ticks, robot-steps, solves) and their times
  are not more than the run's wall time; the workers' busy times lie within the ticks'
  waits for them.
"""

from __future__ import annotations

import itertools
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
from support_missions import short_quick_mission

from coverage_fleet.cli.main import main
from coverage_fleet.fleet.controllers import assign_robots, solve_weight
from coverage_fleet.fleet.mission import Mission, simulation_step
from coverage_fleet.fleet.simulation import simulate_mission
from coverage_fleet.fleet.step import StageTimes
from coverage_fleet.fleet.trial import log_texts_without_wall_clock

MISSIONS = Path(__file__).resolve().parents[1] / "config" / "missions"
QUICK = MISSIONS / "solar_row_quick_check.yaml"
#: The four shipped vehicle types, spaced wider than two vessel footprints.
MIXED_ROSTER = [
    {"name": "rover_a", "vehicle": "differential_drive", "initial_pose": [1.5, 1.5, 0.0]},
    {"name": "car_b", "vehicle": "car_like", "initial_pose": [4.5, 1.5, 1.57]},
    {"name": "drone_c", "vehicle": "multirotor", "initial_pose": [1.5, 4.5, 0.0]},
    {"name": "boat_d", "vehicle": "surface_vessel", "initial_pose": [4.5, 4.5, -1.57]},
]


@pytest.fixture(scope="module")
def mixed_mission(tmp_path_factory: pytest.TempPathFactory) -> Mission:
    return short_quick_mission(MIXED_ROSTER, tmp_path_factory.mktemp("pool") / "mixed.yaml")


def test_workers_write_the_same_log_as_one_process(mixed_mission: Mission) -> None:
    serial_times, pooled_times = StageTimes(), StageTimes()
    serial = simulate_mission(mixed_mission, stop_at_rest=False, workers=1,
                              stage_times=serial_times)
    pooled = simulate_mission(mixed_mission, stop_at_rest=False, workers=2,
                              stage_times=pooled_times)
    assert len(serial.openings) >= 1  # targets were committed during the run
    assert all(np.any(robot.controller_ran) for robot in serial.robots.values())
    assert log_texts_without_wall_clock(pooled) == log_texts_without_wall_clock(serial)

    step = simulation_step(mixed_mission.roster, mixed_mission.simulation)
    ticks = int(np.floor(mixed_mission.simulation.duration / step + 1e-9)) + 1
    for times, log in ((serial_times, serial), (pooled_times, pooled)):
        assert times.ticks == ticks
        assert times.robot_steps == ticks * len(mixed_mission.roster)
        assert times.solves_run == sum(int(np.sum(r.controller_ran))
                                       for r in log.robots.values())
        assert all(getattr(times, stage) > 0 for stage in StageTimes.STAGES)
        assert times.total - times.logging <= log.wall_time
    # Each worker's busy time lies within the ticks' waits for its answers.
    assert serial_times.worker_busy == () and len(pooled_times.worker_busy) == 2
    assert 0 < max(pooled_times.worker_busy) <= pooled_times.worker_critical
    assert len(pooled_times.worker_cpu) == 2 and min(pooled_times.worker_cpu) > 0
    assert pooled_times.worker_critical <= pooled_times.solves


def test_robot_split_is_within_grahams_bound_for_the_greedy_rule(
    mixed_mission: Mission,
) -> None:
    roster = mixed_mission.roster * 2  # 8 robots, two of each type
    step = 0.1
    weights = {entry.name + str(k): solve_weight(entry, step) for k, entry in enumerate(roster)}
    renamed = [replace(entry, name=entry.name + str(k)) for k, entry in enumerate(roster)]
    for workers in (2, 3):
        shares = assign_robots(renamed, step, workers)
        assert sorted(name for share in shares for name in share) == sorted(weights)
        makespan = max(sum(weights[name] for name in share) for share in shares)
        best = min(
            max(sum(w for w, s in zip(weights.values(), split, strict=True) if s == m)
                for m in range(workers))
            for split in itertools.product(range(workers), repeat=len(weights))
        )
        assert makespan <= (4 / 3 - 1 / (3 * workers)) * best + 1e-12
    assert assign_robots(renamed[:1], step, 2) == [[renamed[0].name]]


def test_simulate_rejects_a_bad_worker_count(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    status = main(["simulate", str(QUICK), "--workers", "0", "--out", str(tmp_path / "t")])
    err = capsys.readouterr().err
    assert status == 2 and "Traceback" not in err
    assert "command line: --workers: must be at least 1, got 0" in err
    assert not (tmp_path / "t").exists()
