"""Controllers on worker processes (fleet/controller_pool.py) and the stage counters of the
tick loop (fleet/step.StageTimes).

What is checked, and against what:
- a mixed fleet (all four vehicle types, process and measurement noise, targets committed
  while it runs) simulated with its controllers in this process and on two worker
  processes writes the same log files, byte for byte, but for the measured solve times: an
  MPC solve is a deterministic computation of its inputs and the controller's own history
  (common practice: the reason parallel and serial runs of a deterministic simulation can
  be compared exactly);
- the same with the controllers over three processes (this one and two workers), and with
  more processes than robots;
- the split of robots over processes (greedy, heaviest first): for robots that all sample
  at every tick it is the longest-processing-time rule and stays within Graham's bound
  for it, makespan <= (4/3 - 1/(3m)) x the optimal one (R. L. Graham, "Bounds on
  multiprocessing timing anomalies", SIAM J. Appl. Math. 17(2), 1969, theorem 2), the
  optimum found by trying every split; for a fleet whose slower vehicles all solve on the
  same ticks, its busiest tick is lighter than with the same rule on the mean work per
  tick alone (which piles the slow vehicles' ticks on one process), and no lighter than
  the optimum found by trying every split (a check of the test's own arithmetic); for 16
  robots of four vehicle files it mixes the files, its busiest ticks lighter than those of
  every split that keeps each file's robots together (all 16 tried);
- the pool builds each vehicle file's problem once, before it forks its workers: a worker
  whose robots share vehicle files with this process's builds no problem while starting,
  and its robots' cold starts are answered by the inherited full solve;
- while the pool runs, this thread and each worker run on CPUs of their own (as far as
  there are CPUs), and this thread gets its former CPUs back when the pool closes;
- the stage counters count what the log holds (ticks, robot-steps, solves) and their times
  are not more than the run's wall time; the workers' busy times lie within the ticks'
  waits for them.
"""

from __future__ import annotations

import itertools
import os
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
from support_missions import short_quick_mission

from coverage_fleet.cli.main import main
from coverage_fleet.fleet.controller_pool import ControllerPool, usable_cpus
from coverage_fleet.fleet.controllers import (
    assign_robots,
    fleet_snapshot,
    phase_loads,
    solve_weight,
    split_work,
)
from coverage_fleet.fleet.mission import Mission, RobotEntry, simulation_step
from coverage_fleet.fleet.plants import initial_state
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


def _renamed(entries: list[RobotEntry]) -> list[RobotEntry]:
    return [replace(entry, name=f"{entry.name}_{k}") for k, entry in enumerate(entries)]


def _busiest_tick(loads: np.ndarray, split: tuple[int, ...] | list[int], workers: int) -> float:
    """The heaviest tick of the cycle over the processes of a split (process per robot)."""
    return max(
        float(loads[[k for k, m in enumerate(split) if m == w]].sum(axis=0).max(initial=0.0))
        for w in range(workers)
    )


def test_robot_split_is_within_grahams_bound_for_the_greedy_rule(
    mixed_mission: Mission,
) -> None:
    step = 0.1
    every_tick = [e for e in mixed_mission.roster if e.vehicle.mpc.sample_time == step]
    assert len(every_tick) == 3  # rover, car, multirotor
    roster = _renamed(every_tick * 3)  # 9 robots, three of each type
    weights = {entry.name: solve_weight(entry, step) for entry in roster}
    for workers in (2, 3):
        shares = assign_robots(roster, step, workers)
        assert len(shares) == workers
        assert sorted(name for share in shares for name in share) == sorted(weights)
        makespan = max(sum(weights[name] for name in share) for share in shares)
        best = min(
            max(sum(w for w, s in zip(weights.values(), split, strict=True) if s == m)
                for m in range(workers))
            for split in itertools.product(range(workers), repeat=len(weights))
        )
        assert makespan <= (4 / 3 - 1 / (3 * workers)) * best + 1e-12
    assert assign_robots(roster[:1], step, 2) == [[roster[0].name], []]


def test_robot_split_balances_the_ticks_on_which_slower_vehicles_solve(
    mixed_mission: Mission,
) -> None:
    step = 0.1
    kinds = {type(e.vehicle.model).__name__: e for e in mixed_mission.roster}
    rover, vessel = kinds["DifferentialDriveModel"], kinds["SurfaceVesselModel"]
    assert vessel.vehicle.mpc.sample_time == 2 * step  # solves every other tick
    roster = _renamed([rover] * 3 + [vessel] * 2)
    loads = phase_loads(roster, step)
    assert loads.shape == (5, 2) and np.all(loads[3:, 1] == 0)
    shares = assign_robots(roster, step, 2)
    process_of = {name: w for w, share in enumerate(shares) for name in share}
    split = [process_of[entry.name] for entry in roster]
    best = min(_busiest_tick(loads, s, 2) for s in itertools.product(range(2), repeat=5))
    assert _busiest_tick(loads, split, 2) >= best
    # Balancing the mean work per tick alone (longest processing time first on
    # solve_weight) puts both vessels on one process: its busiest tick is heavier.
    mean_loads = [0.0, 0.0]
    mean_split = [0] * len(roster)
    for k in sorted(range(len(roster)), key=lambda k: -solve_weight(roster[k], step)):
        w = min((0, 1), key=lambda w: (mean_loads[w], w))
        mean_loads[w] += solve_weight(roster[k], step)
        mean_split[k] = w
    assert sorted(mean_split[3:]) == [1, 1]  # both vessels on one process
    assert _busiest_tick(loads, split, 2) < _busiest_tick(loads, mean_split, 2)


def test_split_mixes_vehicle_files_when_that_balances_the_ticks_better(
    mixed_mission: Mission,
) -> None:
    step = 0.1
    roster = _renamed(mixed_mission.roster * 4)  # 16 robots, four vehicle files
    loads = phase_loads(roster, step)
    groups = [entry.vehicle.cache_key for entry in roster]
    where = {name: w for w, share in enumerate(assign_robots(roster, step, 2)) for name in share}
    split = [where[entry.name] for entry in roster]
    assert len({g for g, w in zip(groups, split, strict=True) if w == 0}) > 2  # mixed
    kinds = list(dict.fromkeys(groups))
    whole_groups = min(
        split_work(loads, [dict(zip(kinds, placing, strict=True))[g] for g in groups], 2)
        for placing in itertools.product(range(2), repeat=len(kinds))
    )
    assert split_work(loads, split, 2) < whole_groups


def test_pool_builds_each_vehicle_files_problem_once_before_the_workers_fork(
    mixed_mission: Mission,
) -> None:
    roster = _renamed(mixed_mission.roster * 2)  # 8 robots, four vehicle files
    mission = replace(mixed_mission, roster=roster)
    step = simulation_step(roster, mission.simulation)
    with ControllerPool(mission, step, 2) as pool:
        held = [{e.vehicle.cache_key for e in roster if e.name in share}
                for share in pool.shares]
        assert held[0] & held[1]  # a vehicle file on both processes: built once all the same
        states = {e.name: initial_state(e, e.initial_pose) for e in roster}
        positions = {e.name: e.vehicle.model.position(states[e.name]) for e in roster}
        for name, position in positions.items():
            pool.set_target(name, 1, position + np.array([0.5, 0.3]), 0.6)
        if mission.keep_apart.enabled:
            pool.add_snapshot(fleet_snapshot(mission, 0.0, positions))
        answers = pool.answer_all(states, 0.0)
        assert pool.start_builds == [0]  # the worker inherited every problem it needs
        # Every robot's cold start went to the inherited full solve (IPOPT may rescue it).
        assert all(answers[e.name].step.success for e in roster)
        assert all(answers[e.name].step.status.startswith("fatrop: ") for e in roster)


def test_three_processes_and_more_processes_than_robots_write_the_same_log(
    mixed_mission: Mission,
) -> None:
    serial = log_texts_without_wall_clock(
        simulate_mission(mixed_mission, stop_at_rest=False, workers=1))
    for workers in (3, 6):
        times = StageTimes()
        pooled = simulate_mission(mixed_mission, stop_at_rest=False, workers=workers,
                                  stage_times=times)
        assert log_texts_without_wall_clock(pooled) == serial
        # This process and a worker per remaining robot share: 4 robots over at most 4.
        assert len(times.worker_busy) == min(workers, len(mixed_mission.roster))


def test_pool_runs_each_process_on_a_cpu_of_its_own_and_gives_the_cpus_back(
    mixed_mission: Mission,
) -> None:
    before = usable_cpus()
    step = simulation_step(mixed_mission.roster, mixed_mission.simulation)
    with ControllerPool(mixed_mission, step, 2) as pool:
        assert pool.workers == 2 and all(pool.shares)
        states = {e.name: np.zeros(e.vehicle.model.nx) for e in mixed_mission.roster}
        pool.answer_all(states, 0.0)  # the worker has started and placed itself
        worker_cpus = os.sched_getaffinity(pool.worker_pids[0])
        assert usable_cpus() == [before[0]]
        assert worker_cpus == {before[1 % len(before)]}
    assert usable_cpus() == before


def test_simulate_rejects_a_bad_worker_count(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    status = main(["simulate", str(QUICK), "--workers", "0", "--out", str(tmp_path / "t")])
    err = capsys.readouterr().err
    assert status == 2 and "Traceback" not in err
    assert "command line: --workers: must be at least 1, got 0" in err
    assert not (tmp_path / "t").exists()
