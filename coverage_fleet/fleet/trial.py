"""Trial logs and trial directories.

A TrialLog is what one run of the fleet produced (offline simulation or, later, the ROS
graph): per tick the fleet's cost and generation, per robot its state, input, target,
distance, progress flags and solver outcome, and every gate opening. `write_trial` puts it
on disk as CSV files next to the mission as run and a report, atomically: everything is
written into a temporary folder beside the destination and renamed at the end, so an error
or Ctrl-C never leaves a half-written trial behind.

Layout of a trial directory:

    mission.yaml          the mission as run (seed, duration, poses; the roster names the
                          copies in vehicles/, other file paths resolved)
    vehicles/<robot>.yaml the vehicle file each robot ran with (sha256 in metrics.json)
    fleet.csv             time, generation, cost, largest_distance
    robots/<name>.csv     time, generation, <state names>, <input names>, target_x, target_y,
                          distance, no_farther, closer, controller_ran, solve_time, status,
                          solver_ok, fallback
    gate_openings.csv     generation, time, reason, cost, robot, position_x, position_y,
                          target_x, target_y, distance
    violations.csv        time, robot, limit, value, bound
    plant_clearance.csv   time, clearance, robot_a, robot_b: per plant step the smallest
                          clearance between two footprints at the plant's RK4 substeps
                          (offline runs; empty for runs of the ROS graph)
    report/               metrics.json (with provenance) and PNG figures
                          (coverage_fleet.report)
    recording.mcap        runs of the ROS graph: the recording the trial was built from
    logs/                 runs of the ROS graph: one log file per node process
"""

from __future__ import annotations

import csv
import math
import os
import shutil
import tempfile
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import yaml

from coverage_fleet.control.fallbacks import FALLBACK_KEEP_APART_BRAKE
from coverage_fleet.control.gate import GateOpening


@dataclass
class RobotLog:
    """Per-tick record of one robot."""

    name: str
    vehicle_kind: str
    state_names: tuple[str, ...]
    input_names: tuple[str, ...]
    position_indices: tuple[int, int]
    time: list[float] = field(default_factory=list)
    generation: list[int] = field(default_factory=list)
    state: list[np.ndarray] = field(default_factory=list)
    input: list[np.ndarray] = field(default_factory=list)
    target: list[np.ndarray] = field(default_factory=list)
    distance: list[float] = field(default_factory=list)
    no_farther: list[bool] = field(default_factory=list)
    closer: list[bool] = field(default_factory=list)
    controller_ran: list[bool] = field(default_factory=list)
    solve_time: list[float] = field(default_factory=list)
    status: list[str] = field(default_factory=list)
    solver_ok: list[bool] = field(default_factory=list)
    #: What the controller applied instead of a solution (control/fallbacks.py).
    fallback: list[str] = field(default_factory=list)

    def positions(self) -> np.ndarray:
        """(T, 2) positions over the run."""
        i, j = self.position_indices
        states = np.asarray(self.state)
        return states[:, [i, j]] if len(states) else np.zeros((0, 2))

    def solve_times(self) -> np.ndarray:
        """Solve times (s) of the ticks where the controller ran."""
        ran = np.asarray(self.controller_ran, bool)
        return np.asarray(self.solve_time, float)[ran]

    def solver_failures(self) -> int:
        """Ticks whose solve failed (a keep-apart brake attempts no solve: not counted)."""
        ran = np.asarray(self.controller_ran, bool) & ~self._keep_apart_braked()
        return int(np.sum(~np.asarray(self.solver_ok, bool)[ran]))

    def keep_apart_brakes(self) -> int:
        """Ticks the controller braked because it did not know its neighbours' positions
        (at start-up until the first snapshot arrives; later, when snapshots stop)."""
        return int(np.sum(self._keep_apart_braked()))

    def _keep_apart_braked(self) -> np.ndarray:
        ran = np.asarray(self.controller_ran, bool)
        braked = np.zeros(len(ran), dtype=bool)
        for k, kind in enumerate(self.fallback[: len(ran)]):
            braked[k] = ran[k] and kind == FALLBACK_KEEP_APART_BRAKE
        return braked


@dataclass(frozen=True)
class LimitViolation:
    """A state, input or region limit exceeded by more than the check's tolerance."""

    time: float
    robot: str
    limit: str
    value: float
    bound: float


@dataclass(frozen=True)
class ClearanceSample:
    """The smallest clearance between two robots' footprint discs (m; negative: overlap)
    over one plant step, at the plant's substeps (fleet/plants.py): when and which pair."""

    time: float
    clearance: float
    robot_a: str
    robot_b: str


@dataclass
class TrialLog:
    """Everything one run of the fleet produced."""

    mission_name: str
    seed: int
    step: float
    duration: float
    time: list[float] = field(default_factory=list)
    generation: list[int] = field(default_factory=list)
    cost: list[float] = field(default_factory=list)
    largest_distance: list[float] = field(default_factory=list)
    robots: dict[str, RobotLog] = field(default_factory=dict)
    openings: list[GateOpening] = field(default_factory=list)
    violations: list[LimitViolation] = field(default_factory=list)
    #: Offline runs: one sample per plant step (the finest record of how close robots came).
    plant_clearance: list[ClearanceSample] = field(default_factory=list)
    #: Simulated time at which the settle monitor first reported the fleet settled within
    #: tolerance (fleet/settling.py), None if it never did.
    settled_time: float | None = None
    #: Simulated time at which it first reported the fleet stuck, None if it never did.
    stuck_time: float | None = None
    #: Wall-clock seconds the run took (informative only).
    wall_time: float = 0.0

    @property
    def outcome(self) -> str:
        """How the run ended: "settled", "stuck" or "duration reached"."""
        if self.settled_time is not None:
            return "settled"
        if self.stuck_time is not None:
            return "stuck"
        return "duration reached"

    def final_positions(self) -> dict[str, np.ndarray]:
        return {name: log.positions()[-1] for name, log in self.robots.items()}


# --- writing ------------------------------------------------------------------------------


def _fmt(value: Any) -> str:
    if isinstance(value, bool | np.bool_):
        return "1" if value else "0"
    if isinstance(value, float | np.floating):
        return "nan" if math.isnan(value) else repr(float(value))
    return str(value)


def _write_csv(path: Path, header: list[str], rows: list[list[Any]]) -> None:
    with path.open("w", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow(header)
        for row in rows:
            writer.writerow([_fmt(v) for v in row])


def write_log(directory: Path, log: TrialLog) -> None:
    """The CSV files of a trial (see the module docstring for the columns)."""
    _write_csv(
        directory / "fleet.csv",
        ["time", "generation", "cost", "largest_distance"],
        [
            list(r)
            for r in zip(log.time, log.generation, log.cost, log.largest_distance, strict=True)
        ],
    )
    robots_dir = directory / "robots"
    robots_dir.mkdir()
    for name, robot in log.robots.items():
        header = [
            "time",
            "generation",
            *robot.state_names,
            *robot.input_names,
            "target_x",
            "target_y",
            "distance",
            "no_farther",
            "closer",
            "controller_ran",
            "solve_time",
            "status",
            "solver_ok",
            "fallback",
        ]
        rows = []
        for k in range(len(robot.time)):
            rows.append(
                [
                    robot.time[k],
                    robot.generation[k],
                    *robot.state[k].tolist(),
                    *robot.input[k].tolist(),
                    *robot.target[k].tolist(),
                    robot.distance[k],
                    robot.no_farther[k],
                    robot.closer[k],
                    robot.controller_ran[k],
                    robot.solve_time[k],
                    robot.status[k],
                    robot.solver_ok[k],
                    robot.fallback[k] if k < len(robot.fallback) else "",
                ]
            )
        _write_csv(robots_dir / f"{name}.csv", header, rows)
    opening_rows = []
    for opening in log.openings:
        for name, target in opening.targets.items():
            opening_rows.append(
                [
                    opening.generation,
                    opening.time,
                    opening.reason,
                    opening.cost,
                    name,
                    *opening.positions[name].tolist(),
                    *target.tolist(),
                    opening.distances[name],
                ]
            )
    _write_csv(
        directory / "gate_openings.csv",
        [
            "generation",
            "time",
            "reason",
            "cost",
            "robot",
            "position_x",
            "position_y",
            "target_x",
            "target_y",
            "distance",
        ],
        opening_rows,
    )
    _write_csv(
        directory / "violations.csv",
        ["time", "robot", "limit", "value", "bound"],
        [[v.time, v.robot, v.limit, v.value, v.bound] for v in log.violations],
    )
    _write_csv(
        directory / "plant_clearance.csv",
        ["time", "clearance", "robot_a", "robot_b"],
        [[c.time, c.clearance, c.robot_a, c.robot_b] for c in log.plant_clearance],
    )


#: Log columns measured on the wall clock: they differ between two runs of the same
#: mission and seed, everything else agrees bit for bit.
WALL_CLOCK_COLUMNS = ("solve_time",)


def log_texts_without_wall_clock(log: TrialLog) -> dict[str, str]:
    """The CSV files of `log` (as `write_log` writes them) by relative path, without the
    wall-clock columns: what two runs of the same mission and seed are compared by."""
    with tempfile.TemporaryDirectory() as folder:
        write_log(Path(folder), log)
        texts = {}
        for path in sorted(Path(folder).rglob("*.csv")):
            with path.open(newline="") as handle:
                rows = list(csv.reader(handle))
            dropped = [k for k, title in enumerate(rows[0]) if title in WALL_CLOCK_COLUMNS]
            kept = [[v for k, v in enumerate(row) if k not in dropped] for row in rows]
            texts[str(path.relative_to(folder))] = "\n".join(",".join(r) for r in kept)
    return texts


def write_trial(
    directory: str | Path,
    mission_as_run: dict[str, Any],
    log: TrialLog,
    report: Callable[[Path], Any] | None = None,
    files: Mapping[str, bytes | Path] | None = None,
    move_files: bool = False,
) -> Path:
    """Write a trial directory atomically and return its path.

    `mission_as_run` is the mission mapping to record (see mission_as_run()); `report`, when
    given, is called with the report/ folder inside the temporary directory and writes the
    figures and metrics there. `files` go into the trial under their relative names: bytes
    are written, paths (files or folders) copied, or moved with `move_files` (the launcher's
    recording and node logs). Refuses to overwrite an existing directory.
    """
    final = Path(directory).resolve()
    if final.exists():
        raise FileExistsError(f"trial directory {final} already exists; choose another --out")
    final.parent.mkdir(parents=True, exist_ok=True)
    staging = Path(tempfile.mkdtemp(prefix=f".{final.name}.", suffix=".partial", dir=final.parent))
    try:
        with (staging / "mission.yaml").open("w") as handle:
            handle.write(
                f"# Mission as run by coverage-fleet ({log.mission_name}, seed {log.seed}).\n"
            )
            yaml.safe_dump(mission_as_run, handle, sort_keys=False, default_flow_style=None)
        write_log(staging, log)
        for name, content in (files or {}).items():
            _place(staging / name, content, move_files)
        if report is not None:
            report_dir = staging / "report"
            report_dir.mkdir()
            report(report_dir)
        os.rename(staging, final)
    except BaseException:
        shutil.rmtree(staging, ignore_errors=True)
        raise
    return final


def _place(target: Path, content: bytes | Path, move: bool) -> None:
    target.parent.mkdir(parents=True, exist_ok=True)
    if isinstance(content, bytes):
        target.write_bytes(content)
    elif move:
        shutil.move(str(content), str(target))
    elif Path(content).is_dir():
        shutil.copytree(content, target)
    else:
        shutil.copyfile(content, target)


# --- reading ------------------------------------------------------------------------------


def read_csv(path: str | Path) -> list[dict[str, str]]:
    """Rows of one of the trial's CSV files as dictionaries of strings."""
    with Path(path).open(newline="") as handle:
        return list(csv.DictReader(handle))


def _flag(text: str) -> bool:
    return text == "1"


def read_trial_log(directory: str | Path, mission: Any) -> TrialLog:
    """The TrialLog a trial directory's CSV files hold (write_log's inverse: floats are
    written with repr, so they read back exactly). `mission` (a fleet.mission.Mission,
    normally the trial's mission as run) gives each robot's state and input names; the
    settle outcome, step and wall time come from report/metrics.json when present."""
    import json

    directory = Path(directory)
    metrics_path = directory / "report" / "metrics.json"
    metrics = json.loads(metrics_path.read_text()) if metrics_path.is_file() else {}
    simulation = (mission.raw or {}).get("simulation") or {}
    log = TrialLog(
        mission_name=mission.name,
        seed=int(metrics.get("seed", simulation.get("seed", 0))),
        step=0.0,
        duration=float(metrics.get("duration_s", simulation.get("duration", 0.0))),
        settled_time=metrics.get("settled_time_s"),
        stuck_time=metrics.get("stuck_time_s"),
        wall_time=float(metrics.get("wall_time_s", 0.0)),
    )
    for row in read_csv(directory / "fleet.csv"):
        log.time.append(float(row["time"]))
        log.generation.append(int(row["generation"]))
        log.cost.append(float(row["cost"]))
        log.largest_distance.append(float(row["largest_distance"]))
    steps = []
    for entry in mission.roster:
        model = entry.vehicle.model
        robot = RobotLog(
            name=entry.name,
            vehicle_kind=model.kind,
            state_names=tuple(model.state_names),
            input_names=tuple(model.input_names),
            position_indices=tuple(model.position_indices),
        )
        for row in read_csv(directory / "robots" / f"{entry.name}.csv"):
            robot.time.append(float(row["time"]))
            robot.generation.append(int(row["generation"]))
            robot.state.append(np.array([float(row[n]) for n in robot.state_names]))
            robot.input.append(np.array([float(row[n]) for n in robot.input_names]))
            robot.target.append(np.array([float(row["target_x"]), float(row["target_y"])]))
            robot.distance.append(float(row["distance"]))
            robot.no_farther.append(_flag(row["no_farther"]))
            robot.closer.append(_flag(row["closer"]))
            robot.controller_ran.append(_flag(row["controller_ran"]))
            robot.solve_time.append(float(row["solve_time"]))
            robot.status.append(row["status"])
            robot.solver_ok.append(_flag(row["solver_ok"]))
            robot.fallback.append(row["fallback"])
        log.robots[entry.name] = robot
        if len(robot.time) > 1:
            steps.append(np.diff(robot.time))
    log.step = float(np.median(np.concatenate(steps))) if steps else 0.0
    openings: dict[int, dict[str, Any]] = {}
    for row in read_csv(directory / "gate_openings.csv"):
        generation = int(row["generation"])
        opening = openings.setdefault(
            generation,
            {"time": float(row["time"]), "reason": row["reason"], "cost": float(row["cost"]),
             "positions": {}, "targets": {}, "distances": {}},
        )
        name = row["robot"]
        opening["positions"][name] = np.array(
            [float(row["position_x"]), float(row["position_y"])]
        )
        opening["targets"][name] = np.array([float(row["target_x"]), float(row["target_y"])])
        opening["distances"][name] = float(row["distance"])
    log.openings = [GateOpening(generation=g, **values) for g, values in sorted(openings.items())]
    log.violations = [
        LimitViolation(float(r["time"]), r["robot"], r["limit"], float(r["value"]),
                       float(r["bound"]))
        for r in read_csv(directory / "violations.csv")
    ]
    # Trials written before the plant clearance was recorded have no such file.
    clearance_path = directory / "plant_clearance.csv"
    log.plant_clearance = [
        ClearanceSample(float(r["time"]), float(r["clearance"]), r["robot_a"], r["robot_b"])
        for r in (read_csv(clearance_path) if clearance_path.is_file() else [])
    ]
    return log
