"""The trial directory is self-contained and reproducible, and trials can be rebuilt and
compared (offline paths; the ROS paths are in test_ros_recording.py).

Outside references: sha256 from Python's hashlib (FIPS 180-4) for the vehicle copies; a
speed limit is checked as |p(t+dt) - p(t)| <= v_max dt (a chord is no longer than the
arc); the PNG signature (PNG specification, W3C 2003, section 5.2); determinism of the
offline simulation for a given mission and seed (its documented contract,
coverage_fleet.fleet.mission.SimulationSettings).
"""

from __future__ import annotations

import csv
import hashlib
import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from coverage_fleet.fleet.mission import load_mission, with_vehicle_overrides
from coverage_fleet.fleet.simulation import simulate_mission
from coverage_fleet.inputs.fields import Collector
from coverage_fleet.report.compare import compare_metrics, load_trial
from coverage_fleet.report.trial import rebuild_report, write_mission_trial

REPO = Path(__file__).resolve().parents[1]
MISSION = """\
name: orchard_row_pair   # invented test scenario (orchard frost watch), uniform density
region: {vertices: [[0, 0], [8, 0], [8, 6], [0, 6]]}
density: {kind: uniform}
roster:
  - {name: rover_a, vehicle: differential_drive, initial_pose: [1.0, 1.0, 0.0]}
  - {name: drone_b, vehicle: multirotor, initial_pose: [2.0, 1.0, 0.0]}
settle: {speed: 0.1}
simulation: {duration: 3.0, seed: 4, process_noise_std: 0.001, measurement_noise_std: 0.002}
"""
SLOW_SPEED = 0.1
SAME_FILES = ("fleet.csv", "gate_openings.csv", "violations.csv", "robots/rover_a.csv",
              "robots/drone_b.csv", "vehicles/rover_a.yaml", "vehicles/drone_b.yaml")


@pytest.fixture(scope="module")
def trials(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """A run with rover_a on a slower vehicle file (the launcher's --vehicle override), the
    rerun of its trial's mission as run, and a run of the mission as written."""
    folder = tmp_path_factory.mktemp("trials")
    (folder / "mission.yaml").write_text(MISSION)
    text = (REPO / "config/vehicles/differential_drive.yaml").read_text()
    assert "max_speed: 1.0" in text and "max_reverse_speed: 0.3" in text
    slow = folder / "slow_rover.yaml"
    # Both ways: from its start the rover backs towards its target.
    slow.write_text(text.replace("max_speed: 1.0", f"max_speed: {SLOW_SPEED}").replace(
        "max_reverse_speed: 0.3", f"max_reverse_speed: {SLOW_SPEED}"))
    mission = load_mission(folder / "mission.yaml")
    overridden = with_vehicle_overrides(mission, {"rover_a": slow}, Collector("command line"))
    found = {}
    found["slow"], _ = write_mission_trial(
        folder / "slow", overridden, simulate_mission(overridden)
    )
    rerun = load_mission(found["slow"] / "mission.yaml")
    found["rerun"], _ = write_mission_trial(folder / "rerun", rerun, simulate_mission(rerun))
    found["plain"], _ = write_mission_trial(folder / "plain", mission, simulate_mission(mission))
    found["slow_file"] = slow
    return found


def without_solve_times(path: Path) -> list[list[str]]:
    with path.open(newline="") as handle:
        table = list(csv.reader(handle))
    if table and "solve_time" in table[0]:
        column = table[0].index("solve_time")
        table = [row[:column] + row[column + 1:] for row in table]
    return table


def test_the_mission_as_run_names_the_override_and_reproduces_the_run(trials) -> None:
    slow, rerun = trials["slow"], trials["rerun"]
    copy = slow / "vehicles" / "rover_a.yaml"
    assert copy.read_bytes() == trials["slow_file"].read_bytes()
    metrics = json.loads((slow / "report" / "metrics.json").read_text())
    vehicle = metrics["provenance"]["vehicles"]["rover_a"]
    assert vehicle["sha256"] == hashlib.sha256(trials["slow_file"].read_bytes()).hexdigest()
    assert vehicle["source"] == str(trials["slow_file"].resolve())
    assert not vehicle["changed_since_loaded"]
    # Reloading the mission as run reproduces the run exactly (same seed, same noise); only
    # the measured solve times (wall clock) differ.
    for name in SAME_FILES:
        assert without_solve_times(rerun / name) == without_solve_times(slow / name), name
    # And the override really acted: the rover kept to the slower limit.
    table = np.genfromtxt(slow / "robots" / "rover_a.csv", delimiter=",", names=True)
    step_lengths = np.hypot(np.diff(table["x"]), np.diff(table["y"]))
    assert np.all(step_lengths <= SLOW_SPEED * np.diff(table["time"]) + 0.01)
    plain = np.genfromtxt(trials["plain"] / "robots" / "rover_a.csv", delimiter=",",
                          names=True)
    gap = np.hypot(plain["x"][-1] - table["x"][-1], plain["y"][-1] - table["y"][-1])
    assert gap > 0.05  # with its own vehicle file the rover went elsewhere


def test_a_report_rebuilt_from_the_csv_logs_has_the_same_metrics(trials, tmp_path) -> None:
    trial = trials["slow"]
    metrics = rebuild_report(trial, tmp_path / "report")
    assert metrics == json.loads((trial / "report" / "metrics.json").read_text())
    assert (tmp_path / "report" / "cost.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_compare_shows_metrics_differences_provenance_and_cost_overlay(trials, tmp_path):
    plot = tmp_path / "overlay.png"
    result = subprocess.run(
        [sys.executable, "-m", "coverage_fleet.cli.main", "compare", str(trials["plain"]),
         str(trials["slow"]), "--plot", str(plot)],
        capture_output=True, text=True, timeout=120,
    )
    assert result.returncode == 0, result.stderr
    assert plot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert "vehicle rover_a sha256" in result.stdout  # the override is named
    plain = load_trial(trials["plain"]).metrics
    slow = load_trial(trials["slow"]).metrics
    rows = {key: (a, b, d) for key, a, b, d in compare_metrics(plain, slow)}
    a, b, difference = rows["final_cost"]
    assert difference == pytest.approx(b - a) and a == plain["final_cost"]
    # A trial against its own rerun: every numeric difference is zero but the measured
    # times (wall time, solve-time figures); the solve counts agree too.
    same = compare_metrics(slow, load_trial(trials["rerun"]).metrics)
    measured = [key for key, *_ in same if key == "wall_time_s" or (key.endswith("_s")
                and key.startswith("solve_time."))]
    assert len(measured) == 7
    assert all(d == 0 for key, _, _, d in same if d is not None and key not in measured)


@pytest.mark.parametrize(
    ("arguments", "expected"),
    [
        (["NOWHERE", "TRIAL"], "NOWHERE: TRIAL: is not a trial directory"),
        (["EMPTY", "TRIAL"], "report/metrics.json: not found"),
    ],
    ids=["missing", "not-a-trial"],
)
def test_compare_refuses_what_is_not_a_trial(trials, tmp_path, arguments, expected) -> None:
    (tmp_path / "empty").mkdir()
    names = {"NOWHERE": str(tmp_path / "nowhere"), "EMPTY": str(tmp_path / "empty"),
             "TRIAL": str(trials["slow"])}
    expected = expected.replace("NOWHERE", names["NOWHERE"])
    result = subprocess.run(
        [sys.executable, "-m", "coverage_fleet.cli.main", "compare",
         *[names[a] for a in arguments]],
        capture_output=True, text=True, timeout=120,
    )
    assert result.returncode == 2 and expected in result.stderr, result.stderr
    assert "Traceback" not in result.stderr


RASTER_MISSION = """\
name: pasture_pair   # invented test scenario: the demo pasture outline, a made-up wet corner
region: {geojson: shapes/pasture.geojson}
density:
  kind: raster
  origin_lonlat: [10.99999, 45.99999]
  resolution: 4.0
  file: grids/wetness.npy
roster:
  - {name: rover_a, vehicle: differential_drive, initial_pose: [-5.0, -3.5, 0.0]}
  - {name: rover_b, vehicle: differential_drive, initial_pose: [-3.0, -3.5, 1.57]}
settle: {speed: 0.1}
simulation: {duration: 2.0, seed: 6, process_noise_std: 0.001, measurement_noise_std: 0.002}
"""


def test_a_raster_trial_reruns_from_its_own_folder_alone(tmp_path) -> None:
    import shutil

    source = tmp_path / "planning"
    (source / "shapes").mkdir(parents=True)
    (source / "grids").mkdir()
    shutil.copy(REPO / "config/missions/hillside_pasture_survey.geojson",
                source / "shapes" / "pasture.geojson")
    # Invented wetness scores, north row first (the raster rule in the README).
    np.save(source / "grids" / "wetness.npy",
            np.array([[1.0, 1.0, 2.0, 4.0, 4.0], [1.0, 1.0, 2.0, 3.0, 4.0],
                      [1.0, 1.0, 1.0, 2.0, 2.0], [1.0, 1.0, 1.0, 1.0, 1.0]]))
    (source / "mission.yaml").write_text(RASTER_MISSION)
    originals = {"data/wetness.npy": (source / "grids" / "wetness.npy").read_bytes(),
                 "data/pasture.geojson": (source / "shapes" / "pasture.geojson").read_bytes()}
    mission = load_mission(source / "mission.yaml")
    first, _ = write_mission_trial(tmp_path / "first", mission, simulate_mission(mission))

    as_run = (first / "mission.yaml").read_text()
    assert "data/wetness.npy" in as_run and "data/pasture.geojson" in as_run
    assert str(source) not in as_run  # no path back to the planning folder
    provenance = json.loads((first / "report" / "metrics.json").read_text())["provenance"]
    for name, data in originals.items():
        assert (first / name).read_bytes() == data
        assert provenance["data_files"][name]["sha256"] == hashlib.sha256(data).hexdigest()
    # Moved elsewhere with the originals gone, the trial still loads and reruns identically
    # (same seed and noise: the simulation's determinism contract).
    moved = tmp_path / "elsewhere" / "trial"
    shutil.copytree(first, moved)
    shutil.rmtree(source)
    shutil.rmtree(first)
    rerun_mission = load_mission(moved / "mission.yaml")
    rerun, _ = write_mission_trial(tmp_path / "rerun", rerun_mission,
                                   simulate_mission(rerun_mission))
    for name in ("fleet.csv", "gate_openings.csv", "robots/rover_a.csv", "robots/rover_b.csv"):
        assert without_solve_times(rerun / name) == without_solve_times(moved / name), name
    for name, data in originals.items():
        assert (rerun / name).read_bytes() == data
    assert len(without_solve_times(rerun / "robots" / "rover_a.csv")) > 2
