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


# --- the offline commands, one table -----------------------------------------------------
# Every row: a folder planted with a fault, a command line of one of the offline commands,
# and the one line the command must print (`file: key.path: problem`, or `command line:
# --option: problem`). Each must end with exit status 2, no traceback, and the folder (which
# is also the working directory, where default outputs would go) exactly as before.
# Outside references: exit status 2 for bad usage (argparse, Python documentation, "Exiting
# methods"); duplicate mapping keys are an error (YAML 1.2.2, section 3.2.1.1; from memory);
# sysfs lets no process create files in it, root included (Linux kernel documentation,
# "sysfs - The filesystem for exporting kernel objects"; from memory).

REPO = Path(__file__).resolve().parents[1]
ROVER_TEXT = (REPO / "config" / "vehicles" / "differential_drive.yaml").read_text()
FLOOR = 1e9  # larger than any bound in the package: "above the range" whatever it is


def plant_mission(change: Callable[[dict], None] | None = None, text: str | None = None,
                  raw: bytes | None = None, vehicle: str | None = None):
    """A folder with mission.yaml (GOOD changed) and rover.yaml (the shipped rover file,
    changed by `vehicle` replacements "old=>new")."""

    def plant(folder: Path) -> None:
        rover = ROVER_TEXT
        for replacement in (vehicle or "").split(";") if vehicle else []:
            old, new = replacement.split("=>")
            assert old in rover, old
            rover = rover.replace(old, new)
        (folder / "rover.yaml").write_text(rover)
        mission = copy.deepcopy(GOOD)
        mission["roster"][0]["vehicle"] = "rover.yaml"
        if change:
            change(mission)
        path = folder / "mission.yaml"
        if raw is not None:
            path.write_bytes(raw)
        elif text is not None:
            path.write_text(text)
        else:
            path.write_text(yaml.safe_dump(mission, sort_keys=False))
        (folder / "a_file").write_text("not a folder\n")
        (folder / "a_folder").mkdir()
        (folder / "existing.json").write_text("{}\n")

    return plant


def raster_density(**extra: Any) -> Callable[[dict], None]:
    def change(mission: dict) -> None:
        mission["density"] = {"kind": "raster", "file": "risk.npy", "origin": [0.0, 0.0],
                              "resolution": 1.0, "fill_value": 0.1, **extra}
    return change


def bump(weight: float, variance: float) -> Callable[[dict], None]:
    def change(mission: dict) -> None:
        mission["density"] = {"kind": "gaussian_bumps", "background": 0.1, "bumps": [
            {"weight": weight, "mean": [4.0, 4.0],
             "covariance": [[variance, 0.0], [0.0, variance]]}]}
    return change


GOOD_TEXT = yaml.safe_dump({**GOOD, "roster": [{**GOOD["roster"][0], "vehicle": "rover.yaml"},
                                              *GOOD["roster"][1:]]}, sort_keys=False)
M, V, CL = "{mission}", "{vehicle}", "command line"
SIM = ["simulate", M]
BATCH = ["batch", M, "--seeds", "2", "--workers", "1"]
SIZING = ["sizing", M, "--sizes", "2", "--seeds", "1", "--workers", "1"]
SYSFS = "/sys/kernel/coverage_fleet_out"

# (id, plant, command line, source, key, words)
OFFLINE = [
    ("binary-mission", plant_mission(raw=b"\x89PNG\r\n\x1a\n\x00\xff"), SIM, M, "",
     "is not UTF-8 text"),
    ("duration-inf", plant_mission(), [*SIM, "--duration", "inf"], CL, "--duration",
     "must be finite, got inf"),
    ("batch-duration-inf", plant_mission(), [*BATCH, "--duration", "inf"], CL, "--duration",
     "must be finite"),
    ("sizing-duration-inf", plant_mission(), [*SIZING, "--duration", "inf"], CL, "--duration",
     "must be finite"),
    ("duration-huge", plant_mission(), [*SIM, "--duration", "1e308"], CL, "--duration",
     "must be at most"),
    ("raster-scale-1e308", plant_mission(raster_density(scale=1e308)), SIM, M,
     "density.scale", "must be at most"),
    ("bump-weight-1e308", plant_mission(bump(1e308, 1.0)), SIM, M,
     "density.bumps[0].weight", "must be at most"),
    ("bump-covariance-1e-300", plant_mission(bump(2.0, 1e-300)), SIM, M,
     "density.bumps[0].covariance", "variances must lie in"),
    ("raster-is-a-folder", plant_mission(raster_density(file="a_folder")), SIM, M,
     "density.file", "is a directory, not a file"),
    ("batch-first-seed-negative", plant_mission(), [*BATCH, "--first-seed", "-5"], CL,
     "--first-seed", "must be at least 0, got -5"),
    ("batch-no-seeds", plant_mission(), ["batch", M, "--seeds", "0"], CL, "--seeds",
     "must be at least 1"),
    ("seed-negative", plant_mission(), [*SIM, "--seed", "-3"], CL, "--seed",
     "must be at least 0"),
    ("out-below-a-file", plant_mission(), [*SIM, "--out", "a_file/trial"], CL, "--out",
     "is a file, not a folder"),
    ("out-in-unwritable-folder", plant_mission(), [*SIM, "--out", SYSFS], CL, "--out",
     "is not writable"),
    ("json-below-a-file", plant_mission(), [*BATCH, "--json", "a_file/summary.json"], CL,
     "--json", "is a file, not a folder"),
    ("json-in-unwritable-folder", plant_mission(), [*BATCH, "--json", f"{SYSFS}.json"], CL,
     "--json", "is not writable"),
    ("json-exists", plant_mission(), [*BATCH, "--json", "existing.json"], CL, "--json",
     "already exists"),
    ("sizing-out-below-a-file", plant_mission(), [*SIZING, "--out", "a_file/study"], CL,
     "--out", "is a file, not a folder"),
    ("duplicate-mission-key", plant_mission(text=GOOD_TEXT.replace(
        "  distance: 0.1", "  distance: 0.1\n  distance: 9")), SIM, M, "settle.distance",
     "duplicate key"),
    ("duplicate-vehicle-key", plant_mission(vehicle="max_speed: 1.0 =>max_speed: 1.0\n"
                                            "      max_speed: 5.0 "),
     ["vehicle", V], V, "vehicle.max_speed", "duplicate key"),
    ("horizon-100000", plant_mission(vehicle="horizon: 20=>horizon: 100000"), SIM, V,
     "mpc.horizon", "must be at most"),
    ("vehicle-horizon-100000", plant_mission(vehicle="horizon: 20=>horizon: 100000"),
     ["vehicle", V], V, "mpc.horizon", "must be at most"),
    ("plant-substeps-1e9", plant_mission(text=GOOD_TEXT.replace(
        "  seed: 1", "  seed: 1\n  plant_substeps: 1e9")), SIM, M,
     "simulation.plant_substeps", "must be an integer"),
    ("plant-substeps-huge", plant_mission(set_key("simulation.plant_substeps", int(FLOOR))),
     SIM, M, "simulation.plant_substeps", "must be at most"),
    ("unknown-solver-option", plant_mission(
        vehicle="fatrop.mu_init: 0.0001=>fatrop.mu_init: 0.0001\n          no_such_option: 3"),
     SIM, V, "mpc.solver.options.no_such_option", "unknown option for the fatrop solver"),
    ("terminal-unknown-solver-option", plant_mission(
        vehicle="fatrop.mu_init: 0.0001=>fatrop.mu_init: 0.0001\n          no_such_option: 3"),
     ["terminal", V], V, "mpc.solver.options.no_such_option", "unknown option"),
    ("solver-option-wrong-type", plant_mission(
        vehicle="fatrop.mu_init: 0.0001=>fatrop.mu_init: 0.0001\n          print_time: 'x'"),
     ["vehicle", V], V, "mpc.solver.options.print_time", "wrong type for this option"),
    ("max-speed-1e308", plant_mission(vehicle="max_speed: 1.0 =>max_speed: 1.0e308 "),
     ["vehicle", V], V, "vehicle.max_speed", "must be at most"),
    ("mission-name-escapes", plant_mission(set_key("name", "../../x")), SIM, M, "name",
     "is not a safe file name"),
    ("batch-mission-name-escapes", plant_mission(set_key("name", "../../x")), BATCH, M,
     "name", "is not a safe file name"),
]


def snapshot(folder: Path) -> set[str]:
    return {str(p.relative_to(folder)) for p in folder.rglob("*")}


@pytest.mark.parametrize(("plant", "argv", "source", "key", "words"),
                         [case[1:] for case in OFFLINE], ids=[case[0] for case in OFFLINE])
def test_offline_commands_refuse_bad_input_before_any_work(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch,
    plant, argv: list[str], source: str, key: str, words: str,
) -> None:
    if SYSFS in " ".join(argv) and not Path("/sys/kernel").is_dir():
        pytest.skip("no sysfs here: no folder that even root cannot write in")
    plant(tmp_path)
    monkeypatch.chdir(tmp_path)
    before = snapshot(tmp_path)
    names = {"mission": str(tmp_path / "mission.yaml"), "vehicle": str(tmp_path / "rover.yaml")}
    status, err = run_cli([a.format(**names) for a in argv], capsys)
    assert status == 2, err
    assert "Traceback" not in err
    prefix = f"{source.format(**names)}: {key}: " if key else f"{source.format(**names)}: "
    line = next((ln.strip() for ln in err.splitlines() if ln.strip().startswith(prefix)), None)
    assert line is not None, err
    assert words in line, line
    assert snapshot(tmp_path) == before
    assert not Path(SYSFS).exists() and not Path(f"{SYSFS}.json").exists()


def test_the_table_has_thirty_cases_over_every_offline_command() -> None:
    assert len(OFFLINE) >= 30
    assert {case[2][0] for case in OFFLINE} >= {"simulate", "batch", "sizing", "vehicle",
                                                "terminal"}


def test_the_default_solver_is_the_one_options_are_checked_against() -> None:
    from coverage_fleet.control.solver_chain import DEFAULT_PLUGIN
    from coverage_fleet.vehicles.settings import SOLVER_PLUGINS

    assert SOLVER_PLUGINS[0] == DEFAULT_PLUGIN
