"""One wording per kind of fault, whichever file it comes from.

A table of faults planted in mission files, vehicle files, densities and raster files: each
row names the kind of fault, the file and key the problem must name, and the kind's one
wording (a pattern) must match the message exactly. A second check insists that every
kind is exercised in at least two kinds of file, so the table shows that the wording does
not depend on the file.

Outside references beside the rows:
- duplicate keys: the YAML 1.2.2 specification, section 3.2.1.1 ("each of the keys is
  unique"; section number from memory);
- `1e9` is a number: YAML 1.2.2, section 10.3.2 (core schema float pattern; from memory),
  and the ROS 2 parameter-file parser, which reads any strtod-parsable value as a double
  (from memory);
- the upper bounds (horizon, substeps, speeds, durations): common practice for mobile-robot
  MPC and simulation, documented beside each bound in the code.
"""

from __future__ import annotations

import copy
import re
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import yaml

from coverage_fleet.cli.main import main
from coverage_fleet.errors import ConfigError
from coverage_fleet.fleet.mission import load_mission
from coverage_fleet.vehicles.loader import load_vehicle_file

#: The one wording of each kind of fault (whole message, as a pattern).
WORDING = {
    "required": r"is required(: .+)?",
    "unknown key": r"unknown key \(allowed: [a-z_]+(, [a-z_]+)*\)",
    "not a number": r"must be a number, got .+",
    "not an integer": r"must be an integer, got .+",
    "not true or false": r"must be true or false, got .+",
    "not finite": r"must be finite, got (inf|-inf|nan)",
    "below the range": r"must be (at least|greater than) -?[0-9.e+-]+, got -?[0-9.e+-]+",
    "above the range": r"must be (at most|less than) [0-9.e+-]+, got [0-9.e+-]+",
    "not an option": r"must be one of '[a-z_]+'(, '[a-z_]+')*, got .+",
    "wrong length": r"must be a list of \d+ numbers( \(.+\))?, got .+",
    "not a mapping": r"must be a mapping, got .+",
    "duplicate key": r"duplicate key \(lines \d+ and \d+\): write each key once",
    "file not found": r"file not found( \(.+\))?",
    "directory": r"is a directory, not a file( \(.+\))?",
    "binary": r"is not UTF-8 text \(undecodable byte 0x[0-9a-f]{2} at offset \d+\); is it a "
              r"binary file\?( \(.+\))?",
    "not YAML": r"not valid YAML \(line \d+, column \d+\): .+",
    "unsafe name": r"'.*' is not a (safe file name|valid ROS name): it .+",
}

MISSION: dict[str, Any] = {
    "name": "wording_check",
    "region": {"vertices": [[0.0, 0.0], [12.0, 0.0], [12.0, 8.0], [0.0, 8.0]]},
    "density": {"kind": "gaussian_bumps", "background": 0.1,
                "bumps": [{"weight": 2.0, "mean": [4.0, 4.0],
                           "covariance": [[1.0, 0.0], [0.0, 1.0]]}]},
    "roster": [
        {"name": "rover_a", "vehicle": "rover.yaml", "initial_pose": [1.0, 1.0, 0.0]},
        {"name": "drone_b", "vehicle": "multirotor", "initial_pose": [6.0, 4.0, 0.0]},
    ],
    "gate": {"noise_tolerance": 0.02, "progress_tolerance": 0.05},
    "settle": {"distance": 0.1},
    "simulation": {"duration": 5.0, "seed": 1, "plant_substeps": 10},
}
VEHICLE: dict[str, Any] = {
    "vehicle": {"model": "differential_drive", "max_speed": 1.0, "max_reverse_speed": 0.3,
                "max_yaw_rate": 1.5, "footprint_radius": 0.35},
    "mpc": {"horizon": 20, "sample_time": 0.1, "substeps": 4,
            "state_weights": [1.0, 1.0, 0.05], "input_weights": [0.1, 0.1]},
}


def set_key(document: dict, path: str, value: Any) -> None:
    parts = path.replace("[", ".").replace("]", "").split(".")
    node = document
    for part in parts[:-1]:
        node = node[int(part)] if part.isdigit() else node[part]
    last = parts[-1]
    node[int(last) if last.isdigit() else last] = value


def drop_key(document: dict, path: str) -> None:
    *head, last = path.split(".")
    node = document
    for part in head:
        node = node[part]
    del node[last]


class Case:
    """One planted fault: `plant(folder)` writes the files and returns the file to load."""

    def __init__(self, kind: str, where: str, key: str, plant: Callable[[Path], Path],
                 source: str | None = None) -> None:
        self.kind, self.where, self.key, self.plant = kind, where, key, plant
        self.source = source  # file named in the problem, relative to the folder


def write_files(folder: Path, mission: dict | None = None, vehicle: dict | None = None,
                mission_text: str | None = None, vehicle_text: str | bytes | None = None
                ) -> Path:
    vehicle_path = folder / "rover.yaml"
    if isinstance(vehicle_text, bytes):
        vehicle_path.write_bytes(vehicle_text)
    else:
        vehicle_path.write_text(vehicle_text if vehicle_text is not None else yaml.safe_dump(
            {"/**": {"ros__parameters": vehicle or VEHICLE}}))
    path = folder / "mission.yaml"
    path.write_text(mission_text if mission_text is not None
                    else yaml.safe_dump(mission or MISSION, sort_keys=False))
    return path


def mission_with(change: Callable[[dict], None]) -> Callable[[Path], Path]:
    def plant(folder: Path) -> Path:
        mission = copy.deepcopy(MISSION)
        change(mission)
        return write_files(folder, mission=mission)
    return plant


def vehicle_with(change: Callable[[dict], None]) -> Callable[[Path], Path]:
    def plant(folder: Path) -> Path:
        vehicle = copy.deepcopy(VEHICLE)
        change(vehicle)
        write_files(folder, vehicle=vehicle)
        return folder / "rover.yaml"
    return plant


def mission_set(path: str, value: Any) -> Callable[[Path], Path]:
    return mission_with(lambda m: set_key(m, path, value))


def vehicle_set(path: str, value: Any) -> Callable[[Path], Path]:
    return vehicle_with(lambda v: set_key(v, path, value))


def raster_file(name: str, content: bytes | None, directory: bool = False
                ) -> Callable[[Path], Path]:
    def plant(folder: Path) -> Path:
        if directory:
            (folder / name).mkdir()
        elif content is not None:
            (folder / name).write_bytes(content)
        mission = copy.deepcopy(MISSION)
        mission["density"] = {"kind": "raster", "file": name, "origin": [0.0, 0.0],
                              "resolution": 1.0, "fill_value": 0.1}
        return write_files(folder, mission=mission)
    return plant


def text_files(mission_text: str | None = None, vehicle_text: str | bytes | None = None,
               load: str = "mission") -> Callable[[Path], Path]:
    def plant(folder: Path) -> Path:
        path = write_files(folder, mission_text=mission_text, vehicle_text=vehicle_text)
        return path if load == "mission" else folder / "rover.yaml"
    return plant


def directory_named(name: str) -> Callable[[Path], Path]:
    def plant(folder: Path) -> Path:
        (folder / name).mkdir()
        return folder / name
    return plant


def bytes_named(name: str, content: bytes) -> Callable[[Path], Path]:
    def plant(folder: Path) -> Path:
        (folder / name).write_bytes(content)
        return folder / name
    return plant


GOOD_MISSION_TEXT = yaml.safe_dump(MISSION, sort_keys=False)
GOOD_VEHICLE_TEXT = yaml.safe_dump({"/**": {"ros__parameters": VEHICLE}}, sort_keys=False)

CASES = [
    # required
    Case("required", "mission", "roster", mission_with(lambda m: m.pop("roster"))),
    Case("required", "mission", "roster[0].name", mission_with(
        lambda m: m["roster"][0].pop("name"))),
    Case("required", "vehicle", "vehicle.footprint_radius", vehicle_with(
        lambda v: drop_key(v, "vehicle.footprint_radius"))),
    Case("required", "density", "density.bumps[0].covariance", mission_with(
        lambda m: m["density"]["bumps"][0].pop("covariance"))),
    # unknown key
    Case("unknown key", "mission", "simulation.speedup", mission_set("simulation.speedup", 2)),
    Case("unknown key", "mission", "roster[1].colour", mission_set("roster[1].colour", "red")),
    Case("unknown key", "vehicle", "vehicle.wheel_count", vehicle_set("vehicle.wheel_count", 4)),
    Case("unknown key", "vehicle", "mpc.solver_name", vehicle_set("mpc.solver_name", "ipopt")),
    Case("unknown key", "vehicle", "mpc.solver.tolerance", vehicle_set("mpc.solver",
                                                                       {"tolerance": 1})),
    Case("unknown key", "density", "density.bumps[0].spread",
         mission_set("density.bumps[0].spread", 1.0)),
    # wrong type
    Case("not a number", "mission", "gate.noise_tolerance",
         mission_set("gate.noise_tolerance", "small")),
    Case("not a number", "vehicle", "vehicle.max_yaw_rate",
         vehicle_set("vehicle.max_yaw_rate", "fast")),
    Case("not a number", "vehicle", "mpc.sample_time", vehicle_set("mpc.sample_time", True)),
    Case("not a number", "density", "density.bumps[0].weight",
         mission_set("density.bumps[0].weight", "heavy")),
    Case("not an integer", "mission", "simulation.plant_substeps",
         mission_with(lambda m: set_key(m, "simulation.plant_substeps", 2.5))),
    Case("not an integer", "vehicle", "mpc.horizon", vehicle_set("mpc.horizon", 2.5)),
    # `1e9` is a number (YAML 1.2 core schema), and a real one is not an integer.
    Case("not an integer", "mission", "simulation.plant_substeps", text_files(
        mission_text=GOOD_MISSION_TEXT.replace("plant_substeps: 10", "plant_substeps: 1e9"))),
    Case("not true or false", "mission", "roster[0].simulated",
         mission_set("roster[0].simulated", "yes")),
    Case("not true or false", "vehicle", "mpc.solver.compile",
         vehicle_set("mpc.solver", {"compile": "yes"})),
    # not finite
    Case("not finite", "mission", "simulation.duration",
         mission_set("simulation.duration", float("inf"))),
    Case("not finite", "mission", "roster[0].initial_pose[2]",
         mission_set("roster[0].initial_pose", [1.0, 1.0, float("nan")])),
    Case("not finite", "vehicle", "vehicle.max_speed",
         vehicle_set("vehicle.max_speed", float("inf"))),
    Case("not finite", "vehicle", "mpc.state_weights[1]",
         vehicle_set("mpc.state_weights", [1.0, float("nan"), 1.0])),
    Case("not finite", "density", "density.bumps[0].mean[0]",
         mission_set("density.bumps[0].mean", [float("-inf"), 1.0])),
    Case("not finite", "density", "density.bumps[0].covariance[1][1]",
         mission_set("density.bumps[0].covariance", [[1.0, 0.0], [0.0, float("inf")]])),
    # below the range
    Case("below the range", "mission", "simulation.duration",
         mission_set("simulation.duration", -5.0)),
    Case("below the range", "mission", "gate.progress_tolerance",
         mission_set("gate.progress_tolerance", 0.0)),
    Case("below the range", "mission", "settle.speed", mission_set("settle.speed", -1.0)),
    Case("below the range", "vehicle", "vehicle.max_speed", vehicle_set("vehicle.max_speed", -1)),
    Case("below the range", "vehicle", "mpc.horizon", vehicle_set("mpc.horizon", 0)),
    Case("below the range", "vehicle", "mpc.input_weights[0]",
         vehicle_set("mpc.input_weights", [0.0, 1.0])),
    Case("below the range", "density", "density.background",
         mission_set("density.background", -1.0)),
    # above the range (issue: values that hang or overflow must be refused)
    Case("above the range", "vehicle", "mpc.horizon", vehicle_set("mpc.horizon", 100000)),
    Case("above the range", "vehicle", "vehicle.max_speed", vehicle_set("vehicle.max_speed",
                                                                        1e308)),
    Case("above the range", "vehicle", "mpc.substeps", vehicle_set("mpc.substeps", 10**6)),
    Case("above the range", "mission", "simulation.plant_substeps",
         mission_set("simulation.plant_substeps", 10**9)),
    Case("above the range", "mission", "simulation.duration",
         mission_set("simulation.duration", 1e308)),
    Case("above the range", "density", "density.bumps[0].weight",
         mission_set("density.bumps[0].weight", 1e308)),
    # not an option
    Case("not an option", "mission", "density.kind", mission_set("density.kind", "lumpy")),
    Case("not an option", "vehicle", "mpc.terminal", vehicle_set("mpc.terminal", "box")),
    Case("not an option", "vehicle", "mpc.solver.plugin",
         vehicle_set("mpc.solver", {"plugin": "magic"})),
    Case("not an option", "vehicle", "mpc.solver.path",
         vehicle_set("mpc.solver", {"path": "fastest"})),
    Case("not an option", "vehicle", "mpc.solver.qp",
         vehicle_set("mpc.solver", {"qp": "qrqp"})),
    # wrong length
    Case("wrong length", "mission", "roster[0].initial_pose",
         mission_set("roster[0].initial_pose", [1.0, 1.0])),
    Case("wrong length", "vehicle", "mpc.state_weights",
         vehicle_set("mpc.state_weights", [1.0, 1.0])),
    Case("wrong length", "density", "density.bumps[0].mean",
         mission_set("density.bumps[0].mean", [1.0])),
    # not a mapping
    Case("not a mapping", "mission", "gate", mission_set("gate", [1, 2])),
    Case("not a mapping", "vehicle", "mpc.solver", vehicle_set("mpc.solver", [1, 2])),
    Case("not a mapping", "density", "density", mission_set("density", "uniform")),
    # duplicate keys
    Case("duplicate key", "mission", "settle.distance", text_files(
        mission_text=GOOD_MISSION_TEXT.replace("  distance: 0.1",
                                               "  distance: 0.1\n  distance: 9"))),
    Case("duplicate key", "vehicle", "vehicle.max_speed", text_files(
        vehicle_text=GOOD_VEHICLE_TEXT.replace("      max_speed: 1.0",
                                               "      max_speed: 1.0\n      max_speed: 5.0"),
        load="vehicle")),
    # file faults
    Case("file not found", "mission", "", lambda folder: folder / "absent.yaml"),
    Case("file not found", "vehicle", "", lambda folder: folder / "absent_vehicle.yaml"),
    Case("file not found", "raster", "density.file", raster_file("frost.npy", None),
         source="mission.yaml"),
    Case("directory", "mission", "", directory_named("mission_dir.yaml")),
    Case("directory", "vehicle", "", directory_named("vehicle_dir.yaml")),
    Case("directory", "raster", "density.file", raster_file("frost.csv", None, directory=True),
         source="mission.yaml"),
    Case("binary", "mission", "", bytes_named("m.yaml", b"\x89PNG\r\n\x1a\n\x00\x00")),
    Case("binary", "vehicle", "", text_files(vehicle_text=b"\xff\xfe\xfd binary", load="vehicle")),
    Case("binary", "raster", "density.file", raster_file("frost.csv", b"1,2\n\xff,3\n"),
         source="mission.yaml"),
    Case("not YAML", "mission", "", text_files(mission_text="region: {vertices: [[0, 0]\n")),
    Case("not YAML", "vehicle", "", text_files(vehicle_text="/**: {ros__parameters: [\n",
                                               load="vehicle")),
    # names
    Case("unsafe name", "mission", "name", mission_set("name", "../../x")),
    Case("unsafe name", "mission", "roster[1].name", mission_set("roster[1].name", "rover-b")),
]


def load(path: Path) -> None:
    if path.name.startswith(("rover", "absent_vehicle", "vehicle_dir")):
        load_vehicle_file(path)
    else:
        load_mission(path)


def test_the_unplanted_files_load(tmp_path: Path) -> None:
    mission = load_mission(write_files(tmp_path))
    assert mission.robot_names == ("rover_a", "drone_b")


@pytest.mark.parametrize(
    "case", CASES, ids=[f"{c.kind}-{c.where}-{c.key or 'file'}" for c in CASES]
)
def test_each_fault_reads_the_same_in_every_file(tmp_path: Path, case: Case) -> None:
    path = case.plant(tmp_path)
    with pytest.raises(ConfigError) as caught:
        load(path)
    source = str(tmp_path / case.source) if case.source else str(path)
    found = [p for p in caught.value.problems if p.source == source and p.key == case.key]
    assert found, [str(p) for p in caught.value.problems]
    pattern = WORDING[case.kind]
    assert any(re.fullmatch(pattern, p.message) for p in found), (
        case.kind, [p.message for p in found])


def test_every_kind_of_fault_is_checked_in_two_kinds_of_file() -> None:
    files = {kind: {c.where for c in CASES if c.kind == kind} for kind in WORDING}
    single = {kind: wheres for kind, wheres in files.items()
              if len(wheres) < 2 and kind != "unsafe name"}
    assert not single, single


def test_every_problem_of_every_file_at_once(tmp_path: Path) -> None:
    mission = copy.deepcopy(MISSION)
    set_key(mission, "simulation.duration", float("inf"))
    set_key(mission, "density.bumps[0].weight", 1e308)
    set_key(mission, "name", "../../x")
    vehicle = copy.deepcopy(VEHICLE)
    set_key(vehicle, "mpc.horizon", 100000)
    path = write_files(tmp_path, mission=mission, vehicle=vehicle)
    with pytest.raises(ConfigError) as caught:
        load_mission(path)
    where = {(Path(p.source).name, p.key) for p in caught.value.problems}
    assert {("mission.yaml", "simulation.duration"), ("mission.yaml", "density.bumps[0].weight"),
            ("mission.yaml", "name"), ("rover.yaml", "mpc.horizon")} <= where


def test_exponent_numbers_are_numbers(tmp_path: Path) -> None:
    """`1e-1` is a float in YAML 1.2 and in ROS 2 parameter files (PyYAML alone reads a
    string), so a vehicle file written that way loads with the value meant."""
    path = tmp_path / "rover.yaml"
    path.write_text(GOOD_VEHICLE_TEXT.replace("sample_time: 0.1", "sample_time: 1e-1")
                    .replace("max_speed: 1.0", "max_speed: 2E0"))
    spec = load_vehicle_file(path)
    assert spec.mpc.sample_time == 0.1 and spec.model.max_speed == 2.0


def test_bounds_accept_their_own_limits(tmp_path: Path) -> None:
    """The upper bounds refuse only what is beyond them (values at the bound load)."""
    vehicle = copy.deepcopy(VEHICLE)
    vehicle["vehicle"]["max_speed"] = 100.0
    write_files(tmp_path, vehicle=vehicle)
    assert load_vehicle_file(tmp_path / "rover.yaml").model.max_speed == 100.0
    raster = np.ones((3, 3))
    np.save(tmp_path / "risk.npy", raster)
    mission = copy.deepcopy(MISSION)
    mission["density"] = {"kind": "raster", "file": "risk.npy", "origin": [0.0, 0.0],
                          "resolution": 1.0, "fill_value": 0.5, "scale": 1e12}
    mission["simulation"]["plant_substeps"] = 1000
    assert load_mission(write_files(tmp_path, mission=mission)).simulation.plant_substeps == 1000


@pytest.mark.parametrize(
    ("args", "key", "kind"),
    [
        (["simulate", "{mission}", "--duration", "inf"], "--duration", "not finite"),
        (["simulate", "{mission}", "--duration", "-1"], "--duration", "below the range"),
        (["simulate", "{mission}", "--seed", "-3"], "--seed", "below the range"),
        (["batch", "{mission}", "--seeds", "2", "--first-seed", "-5"], "--first-seed",
         "below the range"),
        (["batch", "{mission}", "--seeds", "0"], "--seeds", "below the range"),
    ],
)
def test_command_line_options_read_the_same(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], args: list[str], key: str, kind: str
) -> None:
    """Options of the offline commands are checked with the same wording (and the same
    bounds as the mission keys they override), together with the mission's problems and
    before any run."""
    mission = copy.deepcopy(MISSION)
    set_key(mission, "gate.noise_tolerance", "small")
    path = write_files(tmp_path, mission=mission)
    status = main([a.format(mission=path) for a in args])
    err = capsys.readouterr().err
    assert status == 2 and "Traceback" not in err
    line = next(ln.strip() for ln in err.splitlines() if f"command line: {key}: " in ln)
    assert re.fullmatch(WORDING[kind], line.split(f"command line: {key}: ", 1)[1]), line
    assert f"{path}: gate.noise_tolerance: must be a number" in err


def test_unknown_key_lists_every_allowed_key_even_when_some_are_missing(tmp_path: Path) -> None:
    mission = copy.deepcopy(MISSION)
    del mission["region"]
    mission["regoin"] = {}
    with pytest.raises(ConfigError) as caught:
        load_mission(write_files(tmp_path, mission=mission))
    [unknown] = [p.message for p in caught.value.problems if p.key == "regoin"]
    assert unknown == ("unknown key (allowed: density, density_updates, description, gate, "
                       "keep_apart, name, region, roster, settle, simulation)")


def test_a_retired_key_points_to_its_replacement(tmp_path: Path) -> None:
    mission = copy.deepcopy(MISSION)
    mission["gate"]["settle_distance"] = 0.1
    with pytest.raises(ConfigError) as caught:
        load_mission(write_files(tmp_path, mission=mission))
    [moved] = [p.message for p in caught.value.problems if p.key == "gate.settle_distance"]
    assert moved.startswith("moved to settle.distance")
