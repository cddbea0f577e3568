"""Mission files: the demo missions load, vehicle files are found by bare name, and the
mission as run reloads to the same mission (robot-name rules: test_inputs_names.py)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import yaml

from coverage_fleet.fleet.mission import load_mission, mission_as_run

MISSIONS = Path(__file__).resolve().parents[1] / "config" / "missions"


def test_mixed_demo_mission_is_a_mixed_fleet_on_a_non_uniform_density() -> None:
    mission = load_mission(MISSIONS / "orchard_frost_watch.yaml")
    kinds = {entry.vehicle.model.kind for entry in mission.roster}
    assert len(mission.roster) >= 6 and len(kinds) >= 3
    x0, y0, x1, y1 = mission.region.bounds
    grid = np.stack(np.meshgrid(np.linspace(x0, x1, 30), np.linspace(y0, y1, 30)), -1)
    values = mission.density.evaluate(grid.reshape(-1, 2))
    assert values.max() > 5 * values.min()
    assert "invented" in (MISSIONS / "orchard_frost_watch.yaml").read_text().lower()


def test_quick_mission_is_small_and_uniform() -> None:
    mission = load_mission(MISSIONS / "solar_row_quick_check.yaml")
    assert 3 <= len(mission.roster) <= 4
    values = mission.density.evaluate(np.array([[1.0, 1.0], [6.0, 4.0], [11.0, 7.0]]))
    assert np.ptp(values) == 0.0
    assert "invented" in (MISSIONS / "solar_row_quick_check.yaml").read_text().lower()


def test_vehicle_found_by_relative_path_or_bare_name(tmp_path: Path) -> None:
    config = Path(__file__).resolve().parents[1] / "config" / "vehicles"
    (tmp_path / "mine.yaml").write_text((config / "multirotor.yaml").read_text())
    mission = {
        "region": {"vertices": [[0, 0], [10, 0], [10, 10], [0, 10]]},
        "density": {"kind": "uniform"},
        "roster": [
            {"name": "a", "vehicle": "mine.yaml", "initial_pose": [2, 2, 0]},
            {"name": "b", "vehicle": "differential_drive", "initial_pose": [5, 5, 0]},
            {"name": "c", "vehicle": "multirotor.yaml", "initial_pose": [8, 8, 0],
             "simulated": False},
        ],
    }
    path = tmp_path / "m.yaml"
    path.write_text(yaml.safe_dump(mission))
    loaded = load_mission(path)
    assert loaded.roster[0].vehicle_path == (tmp_path / "mine.yaml").resolve()
    assert loaded.roster[1].vehicle_path == (config / "differential_drive.yaml").resolve()
    assert loaded.roster[2].simulated is False
    assert loaded.name == "m" and loaded.simulation.duration > 0


def test_mission_as_run_reloads_from_anywhere(tmp_path: Path) -> None:
    mission = load_mission(MISSIONS / "orchard_frost_watch.yaml")
    poses = {mission.roster[0].name: (10.0, 10.0, 0.5)}
    as_run = mission_as_run(mission, seed=11, duration=33.0, initial_poses=poses)
    elsewhere = tmp_path / "deep" / "copy.yaml"
    elsewhere.parent.mkdir()
    elsewhere.write_text(yaml.safe_dump(as_run, sort_keys=False))
    again = load_mission(elsewhere)
    assert again.simulation.seed == 11 and again.simulation.duration == 33.0
    assert again.roster[0].initial_pose == (10.0, 10.0, 0.5)
    assert [r.vehicle.content_hash for r in again.roster] == [
        r.vehicle.content_hash for r in mission.roster
    ]


def test_raster_density_path_is_resolved_in_the_mission_as_run(tmp_path: Path) -> None:
    here = tmp_path / "site"
    here.mkdir()
    np.save(here / "frost.npy", np.array([[1.0, 2.0], [3.0, 4.0]]))
    mission = {
        "region": {"vertices": [[0, 0], [10, 0], [10, 10], [0, 10]]},
        "density": {"kind": "raster", "file": "frost.npy", "origin": [0, 0], "resolution": 5.0},
        "roster": [{"name": "a", "vehicle": "differential_drive", "initial_pose": [2, 2, 0]}],
    }
    (here / "m.yaml").write_text(yaml.safe_dump(mission))
    loaded = load_mission(here / "m.yaml")
    as_run = mission_as_run(loaded, seed=0, duration=10.0)
    assert as_run["density"]["file"] == str((here / "frost.npy").resolve())
    (tmp_path / "elsewhere.yaml").write_text(yaml.safe_dump(as_run))
    again = load_mission(tmp_path / "elsewhere.yaml")
    # North row first: the south-west cell (value 3) holds (2, 2).
    assert again.density.evaluate(np.array([[2.0, 2.0]]))[0] == pytest.approx(3.0)
