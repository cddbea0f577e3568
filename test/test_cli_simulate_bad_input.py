"""Bad mission files through `coverage-fleet simulate`: each fault gives a clear message
naming the file, the key path and the problem, exit status 2, and no trial directory (not
even a half-written one) is left behind. Exit status 2 for bad input is common practice
(argparse uses it for usage errors)."""

from __future__ import annotations

import copy
import subprocess
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest
import yaml

from coverage_fleet.cli.main import main

GOOD: dict[str, Any] = {
    "name": "quick",
    "region": {"vertices": [[0.0, 0.0], [12.0, 0.0], [12.0, 8.0], [0.0, 8.0]]},
    "density": {"kind": "uniform"},
    "roster": [
        {"name": "rover_a", "vehicle": "differential_drive", "initial_pose": [1.0, 1.0, 0.0]},
        {"name": "rover_b", "vehicle": "differential_drive", "initial_pose": [3.0, 1.0, 0.0]},
        {"name": "drone_c", "vehicle": "multirotor", "initial_pose": [1.0, 3.0, 0.0]},
    ],
    "gate": {"noise_tolerance": 0.02, "progress_tolerance": 0.05},
    "settle": {"distance": 0.1},
    "simulation": {"duration": 5.0, "seed": 1},
}

BAD_ROVER = """/**:
  ros__parameters:
    vehicle:
      model: differential_drive
      max_speed: -1.0
      max_reverse_speed: 0.3
      max_yaw_rate: 1.5
      footprint_radius: 0.35
"""


def set_key(path: str, value: Any) -> Callable[[dict], None]:
    """A mutation that sets a dotted key path (list indices as [i]) in the mission."""

    def mutate(mission: dict) -> None:
        parts = path.replace("[", ".").replace("]", "").split(".")
        node = mission
        for part in parts[:-1]:
            node = node[int(part)] if part.isdigit() else node[part]
        last = parts[-1]
        node[int(last) if last.isdigit() else last] = value

    return mutate


def drop_key(key: str) -> Callable[[dict], None]:
    return lambda mission: mission.pop(key)


# (id, mutation of GOOD, key path in the message, words in the message)
FAULTS = [
    ("unknown-top-level-key", set_key("regoin", {}), "regoin", "unknown key"),
    ("missing-region", drop_key("region"), "region", "is required"),
    (
        "non-convex-region",
        set_key("region.vertices", [[0, 0], [12, 0], [6, 2], [12, 8], [0, 8]]),
        "region.vertices[2]",
        "not convex",
    ),
    ("unknown-density-kind", set_key("density.kind", "lumpy"), "density.kind", "must be one of"),
    (
        "missing-raster-file",
        set_key("density", {"kind": "raster", "file": "frost.npy", "origin": [0, 0],
                            "resolution": 1.0}),
        "density.file",
        "frost.npy",
    ),
    ("gate-wrong-type", set_key("gate.noise_tolerance", "small"), "gate.noise_tolerance",
     "must be a number"),
    ("negative-duration", set_key("simulation.duration", -5.0), "simulation.duration",
     "must be greater than 0, got -5"),
    ("unknown-simulation-key", set_key("simulation.speedup", 2), "simulation.speedup",
     "unknown key"),
    ("not-a-ros-name", set_key("roster[1].name", "rover-b"), "roster[1].name",
     "not a valid ROS name"),
    ("name-starts-with-digit", set_key("roster[1].name", "2rover"), "roster[1].name",
     "starts with a digit"),
    ("duplicate-name", set_key("roster[2].name", "rover_a"), "roster[2].name",
     "duplicate robot name 'rover_a'"),
    ("missing-vehicle-file", set_key("roster[2].vehicle", "hovercraft.yaml"), "roster[2].vehicle",
     "not found"),
    ("pose-outside-region", set_key("roster[0].initial_pose", [50.0, 1.0, 0.0]),
     "roster[0].initial_pose", "outside the region"),
    ("footprints-overlap", set_key("roster[1].initial_pose", [1.4, 1.0, 0.0]),
     "roster[1].initial_pose", "footprints need at least 0.7 m"),
    ("pose-wrong-length", set_key("roster[0].initial_pose", [1.0, 1.0]), "roster[0].initial_pose",
     "must be a list of 3 numbers"),
    ("simulated-not-bool", set_key("roster[0].simulated", "yes"), "roster[0].simulated",
     "true or false"),
    ("unknown-robot-key", set_key("roster[0].colour", "red"), "roster[0].colour", "unknown key"),
    ("empty-roster", set_key("roster", []), "roster", "non-empty list"),
    ("vehicle-file-does-not-load", set_key("roster[0].vehicle", "bad_rover.yaml"),
     "roster[0].vehicle", "does not load"),
    ("settle-below-gate-tolerances", set_key("settle.distance", 0.05), "settle.distance",
     "use at least 0.07 m"),
    ("settle-speed-below-noise", set_key("simulation.measurement_noise_std", 0.01),
     "settle.speed", "below the speed at which controllers chase the noise"),
]


def write_mission(directory: Path, mission: dict) -> Path:
    (directory / "bad_rover.yaml").write_text(BAD_ROVER)
    path = directory / "mission.yaml"
    path.write_text(yaml.safe_dump(mission, sort_keys=False))
    return path


def run_cli(args: list[str], capsys: pytest.CaptureFixture[str]) -> tuple[int, str]:
    status = main(args)
    return status, capsys.readouterr().err


def assert_nothing_written(tmp_path: Path) -> None:
    assert not (tmp_path / "trial").exists()
    leftovers = [p.name for p in tmp_path.iterdir() if p.name.startswith(".trial")]
    assert leftovers == []


@pytest.mark.parametrize(("mutate", "key", "words"), [f[1:] for f in FAULTS],
                         ids=[f[0] for f in FAULTS])
def test_bad_mission_is_reported_clearly(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], mutate, key: str, words: str
) -> None:
    mission = copy.deepcopy(GOOD)
    mutate(mission)
    path = write_mission(tmp_path, mission)
    status, err = run_cli(["simulate", str(path), "--out", str(tmp_path / "trial")], capsys)
    assert status == 2, err
    assert "coverage-fleet simulate: bad input:" in err
    line = next((ln for ln in err.splitlines() if f"{path}: {key}: " in ln), None)
    assert line is not None, err
    assert words in line
    assert "Traceback" not in err
    assert_nothing_written(tmp_path)


def test_vehicle_problems_are_forwarded_with_their_own_file(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    mission = copy.deepcopy(GOOD)
    mission["roster"][0]["vehicle"] = "bad_rover.yaml"
    path = write_mission(tmp_path, mission)
    status, err = run_cli(["simulate", str(path), "--out", str(tmp_path / "trial")], capsys)
    assert status == 2
    assert f"{tmp_path / 'bad_rover.yaml'}: vehicle.max_speed: " in err


def test_every_problem_is_collected_before_reporting(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    mission = copy.deepcopy(GOOD)
    for _, mutate, _, _ in FAULTS[5:8] + FAULTS[8:9] + FAULTS[11:13]:
        mutate(mission)
    path = write_mission(tmp_path, mission)
    status, err = run_cli(["simulate", str(path)], capsys)
    assert status == 2
    for key in ("gate.noise_tolerance", "simulation.duration", "simulation.speedup",
                "roster[1].name", "roster[2].vehicle", "roster[0].initial_pose"):
        assert f"{path}: {key}: " in err, key


def test_not_yaml_and_missing_file(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    broken = tmp_path / "broken.yaml"
    broken.write_text("region: {vertices: [[0, 0], [1, 0]\nroster: [")
    status, err = run_cli(["simulate", str(broken), "--out", str(tmp_path / "trial")], capsys)
    assert status == 2 and f"{broken}: not valid YAML (line" in err
    status, err = run_cli(["simulate", str(tmp_path / "nowhere.yaml")], capsys)
    assert status == 2 and f"{tmp_path / 'nowhere.yaml'}: file not found" in err
    assert_nothing_written(tmp_path)


def test_existing_output_directory_is_never_overwritten(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    path = write_mission(tmp_path, copy.deepcopy(GOOD))
    (tmp_path / "trial").mkdir()
    (tmp_path / "trial" / "keep.txt").write_text("earlier trial")
    status, err = run_cli(["simulate", str(path), "--out", str(tmp_path / "trial")], capsys)
    assert status == 2 and "already exists" in err
    assert (tmp_path / "trial" / "keep.txt").read_text() == "earlier trial"


def test_installed_command_reports_bad_input_with_status_2(tmp_path: Path) -> None:
    """The console script itself (a real process), not just main()."""
    mission = copy.deepcopy(GOOD)
    FAULTS[8][1](mission)
    path = write_mission(tmp_path, mission)
    script = Path(sys.executable).with_name("coverage-fleet")
    done = subprocess.run(
        [str(script), "simulate", str(path), "--out", str(tmp_path / "trial")],
        capture_output=True, text=True, timeout=120, check=False,
    )
    assert done.returncode == 2
    assert "roster[1].name: 'rover-b' is not a valid ROS name" in done.stderr
    assert_nothing_written(tmp_path)
