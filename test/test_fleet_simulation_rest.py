"""Rest and timing in the offline simulation.

- Started at a centroidal Voronoi configuration (found by Lloyd's algorithm, Lloyd 1982; Du,
  Faber & Gunzburger, SIAM Review 41(4), 1999), nobody can get closer to a target they are
  already at, so the gate stays shut for the whole run and the fleet stays put (Cortes,
  Martinez, Karatas & Bullo, IEEE T-RA 20(2), 2004: CVTs are the rest points).
- Robots with different controller sample times share one simulation tick: each controller
  runs only at its own sample instants.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import yaml

from coverage_fleet.errors import ConfigError
from coverage_fleet.fleet.lloyd import lloyd
from coverage_fleet.fleet.mission import load_mission
from coverage_fleet.fleet.simulation import simulate_mission

MISSIONS = Path(__file__).resolve().parents[1] / "config" / "missions"
VEHICLES = Path(__file__).resolve().parents[1] / "config" / "vehicles"


def test_fleet_started_at_a_cvt_stays_there_with_the_gate_shut() -> None:
    mission = load_mission(MISSIONS / "solar_row_quick_check.yaml")
    start = np.array([entry.initial_pose[:2] for entry in mission.roster])
    cvt = lloyd(start, mission.region, mission.density, max_iterations=2000, tolerance=1e-9)
    assert cvt.converged
    poses = {e.name: (*cvt.positions[-1][i], 0.0) for i, e in enumerate(mission.roster)}
    log = simulate_mission(mission, duration=5.0, initial_poses=poses, stop_at_rest=False)
    assert log.time[-1] >= 5.0 - 1e-9
    assert [o.reason for o in log.openings] == ["start"]
    # Settled once the gate has been shut (from the tick after the start commit) and every
    # robot still and at its centroid for the dwell time (fleet/settling.py).
    assert log.settled_time == pytest.approx(log.step + mission.settle.dwell)
    for i, robot in enumerate(log.robots.values()):
        assert np.abs(robot.positions() - cvt.positions[-1][i]).max() < 0.01


def test_each_controller_runs_at_its_own_sample_time(tmp_path: Path) -> None:
    slow = yaml.safe_load((VEHICLES / "differential_drive.yaml").read_text())
    slow["/**"]["ros__parameters"]["mpc"]["sample_time"] = 0.2
    (tmp_path / "slow_rover.yaml").write_text(yaml.safe_dump(slow))
    mission = yaml.safe_load((MISSIONS / "solar_row_quick_check.yaml").read_text())
    mission["roster"][1]["vehicle"] = "slow_rover.yaml"
    (tmp_path / "mission.yaml").write_text(yaml.safe_dump(mission))
    log = simulate_mission(load_mission(tmp_path / "mission.yaml"), duration=2.0)
    assert log.step == 0.1
    fast, slower = log.robots["rover_a"], log.robots["rover_b"]
    assert all(fast.controller_ran)
    assert slower.controller_ran[:6] == [True, False, True, False, True, False]
    # Between its solves the slower robot holds its input (zero-order hold).
    assert np.array_equal(slower.input[2], slower.input[3])


def test_sample_time_that_is_not_a_multiple_of_the_step_is_a_problem(tmp_path: Path) -> None:
    odd = yaml.safe_load((VEHICLES / "differential_drive.yaml").read_text())
    odd["/**"]["ros__parameters"]["mpc"]["sample_time"] = 0.15
    (tmp_path / "odd_rover.yaml").write_text(yaml.safe_dump(odd))
    mission = yaml.safe_load((MISSIONS / "solar_row_quick_check.yaml").read_text())
    mission["roster"][2]["vehicle"] = "odd_rover.yaml"
    (tmp_path / "mission.yaml").write_text(yaml.safe_dump(mission))
    with pytest.raises(ConfigError) as caught:
        load_mission(tmp_path / "mission.yaml")
    text = str(caught.value)
    assert "roster[2].vehicle: sample time 0.15 s of 'rover_c' is not a whole multiple" in text
