"""`coverage-fleet simulate MISSION`: run a mission offline to completion and write a trial
directory (log, mission as run, report)."""

from __future__ import annotations

import argparse
import sys
import time
from datetime import UTC, datetime
from pathlib import Path
from typing import Any, TextIO

from coverage_fleet.control.solver_chain import describe_path
from coverage_fleet.errors import ConfigError
from coverage_fleet.fleet.controller_pool import (
    ROBOTS_PER_WORKER_MIN,
    default_simulation_workers,
)
from coverage_fleet.fleet.mission import (
    DURATION_MAX,
    SEED_MAX,
    Mission,
    load_mission_with,
)
from coverage_fleet.fleet.parallel import WORKERS_MAX, default_workers
from coverage_fleet.fleet.simulation import StepInfo, simulate_mission
from coverage_fleet.fleet.trial import TrialLog
from coverage_fleet.inputs.fields import Collector, integer_fault, number_fault
from coverage_fleet.inputs.outputs import check_output_location, output_fault
from coverage_fleet.interrupts import interrupts_at_safe_points
from coverage_fleet.report.trial import write_mission_trial

SAFETY_NOTE = (
    "Offline plan only: before real trials check the plan with qualified operators, keep an "
    "emergency stop within reach, enforce a geofence on each robot and follow local rules."
)


class ProgressBar:
    """Plain-text progress on a stream: rewrites one line on a terminal, otherwise prints a
    line every tenth of the run."""

    def __init__(self, label: str, stream: TextIO | None = None, width: int = 24) -> None:
        self.label = label
        self.stream = stream or sys.stderr
        self.width = width
        self.interactive = bool(getattr(self.stream, "isatty", lambda: False)())
        self._last_wall = 0.0
        self._last_decile = -1
        self._last_info: StepInfo | None = None
        self._shown: StepInfo | None = None

    def __call__(self, info: StepInfo, force: bool = False) -> None:
        self._last_info = info
        fraction = min(1.0, info.time / info.duration) if info.duration > 0 else 1.0
        if self.interactive and not force:
            now = time.monotonic()
            if now - self._last_wall < 0.2 and fraction < 1.0:
                return
            self._last_wall = now
        elif not force:
            decile = int(fraction * 10)
            if decile == self._last_decile:
                return
            self._last_decile = decile
        self._shown = info
        filled = round(fraction * self.width)
        bar = "#" * filled + "-" * (self.width - filled)
        line = (
            f"{self.label} [{bar}] t={info.time:7.1f}/{info.duration:.1f} s  "
            f"cost={info.cost:.4g}  generation {info.generation}"
        )
        if self.interactive:
            self.stream.write("\r" + line)
        else:
            self.stream.write(line + "\n")
        self.stream.flush()

    def finish(self, message: str) -> None:
        if self._last_info is not None and self._last_info is not self._shown:
            self(self._last_info, force=True)
        if self.interactive:
            self.stream.write("\n")
        self.stream.write(f"{self.label}: {message}\n")
        self.stream.flush()


def placement_text(workers: int) -> str:
    if workers == 1:
        return "this process"
    others = workers - 1
    return f"this process and {others} worker process{'es' if others > 1 else ''}"


def default_trial_directory(mission: Mission, seed: int) -> Path:
    stamp = datetime.now(UTC).strftime("%Y%m%dT%H%M%SZ")
    return Path("trials") / f"{mission.name}-seed{seed}-{stamp}"


def check_output_free(out: Path) -> None:
    if out.exists():
        raise ConfigError.single(str(out), "--out", "already exists; a trial is never overwritten")


def simulate_to_trial(
    mission: Mission,
    out: Path,
    seed: int | None = None,
    duration: float | None = None,
    progress: ProgressBar | None = None,
    workers: int = 1,
) -> tuple[Path, TrialLog, dict[str, Any]]:
    """Simulate the mission and write its trial directory; returns (path, log, metrics).
    workers > 1: the controllers run over that many processes, this one included (same
    log)."""
    check_output_free(out)
    with interrupts_at_safe_points():
        log = simulate_mission(mission, seed=seed, duration=duration, on_step=progress,
                               workers=workers)
    path, metrics = write_mission_trial(out, mission, log)
    return path, log, metrics


def summary_lines(metrics: dict[str, Any]) -> list[str]:
    outcome = metrics.get("outcome", "duration reached")
    if outcome == "settled":
        ending = f"settled within tolerance after {metrics['settled_time_s']:.1f} s"
    elif outcome == "stuck":
        ending = (
            f"STUCK after {metrics['stuck_time_s']:.1f} s (gate shut, every robot still, "
            "not all within the settle distance of their centroids)"
        )
    else:
        ending = f"NOT settled: duration reached at {metrics['simulated_time_s']:.1f} s"
    return [
        f"fleet {ending}; {metrics['generations']} generations",
        f"final cost {metrics['final_cost']:.6g}; largest distance to a cell centroid "
        f"{metrics['final_largest_distance_to_centroid_m']:.3g} m",
        f"CVT gap {100 * metrics['cvt_gap']:.3g} % (cost decrease Lloyd's iteration still "
        "finds from the final positions; 0 at a centroidal Voronoi configuration)",
        f"limit violations {metrics['limit_violations']}; solver failures "
        f"{metrics['solver_failures']}"
        + _keep_apart_brakes(metrics),
        *_clearance_line(metrics),
    ]


def _keep_apart_brakes(metrics: dict[str, Any]) -> str:
    brakes = metrics.get("keep_apart_brakes", 0)
    if not brakes:
        return ""
    return (
        f"; keep-apart brakes {brakes} (ticks without the neighbours' positions: at start "
        "until the first snapshot, or snapshots too old)"
    )


def _clearance_line(metrics: dict[str, Any]) -> list[str]:
    clearance = metrics.get("smallest_clearance_m")
    if clearance is None:
        return []
    where = metrics.get("clearance_measured_on", "logged states")
    line = f"smallest clearance between two robots' footprints {clearance:.3f} m (on the {where})"
    if not metrics.get("footprints_overlap", clearance < 0):
        return [line]
    pairs = ", ".join("/".join(pair) for pair in metrics.get("overlap_pairs", []))
    first = metrics.get("overlap_first_time_s")
    when = "" if first is None else f" first at {first:.2f} s"
    return [line, f"FOOTPRINTS OVERLAP: {pairs or 'two robots'} touched{when} "
                  f"({metrics.get('overlap_samples', 1)} samples); check keep_apart and the "
                  "robots' localisation before any trial with people near"]


def register(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser(
        "simulate",
        help="simulate a mission offline and write a trial directory with a report",
        description="Simulate a mission offline (closed loop: partition, reference gate, one "
        "MPC per robot) and write a trial directory: CSV logs, the mission as run, a report.",
    )
    parser.add_argument("mission", type=Path, help="mission file (YAML)")
    parser.add_argument(
        "--out",
        type=Path,
        help="trial directory to create (default: trials/<mission>-seed<N>-<UTC time>)",
    )
    parser.add_argument("--seed", type=int, help="noise seed (default: the mission's)")
    parser.add_argument("--duration", type=float, help="simulated seconds (default: the mission's)")
    parser.add_argument(
        "--workers", type=int,
        help="processes for the robots' controllers, this one included (default: one per "
             "core, here "
             f"{default_workers()}, when each gets at least {ROBOTS_PER_WORKER_MIN} robots; "
             "1 runs everything in this process); the result is the same either way")
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    options = Collector("command line")
    if args.duration is not None:
        options.check("--duration", number_fault(
            args.duration, minimum=0.0, exclusive_minimum=True, maximum=DURATION_MAX))
    if args.seed is not None:
        options.check("--seed", integer_fault(args.seed, 0, SEED_MAX))
    if args.out is not None:
        options.check("--out", output_fault(args.out))
    if args.workers is not None:
        options.check("--workers", integer_fault(args.workers, 1, WORKERS_MAX))
    mission = load_mission_with(args.mission, options)
    workers = (args.workers if args.workers is not None
               else default_simulation_workers(len(mission.roster)))
    seed = mission.simulation.seed if args.seed is None else args.seed
    out = args.out or default_trial_directory(mission, seed)
    check_output_location(out, "--out")
    real = [entry.name for entry in mission.roster if not entry.simulated]
    if real:
        print(
            f"simulate: note: {', '.join(real)} marked 'simulated: false' (real robots) are "
            "simulated too; this is an offline run",
            file=sys.stderr,
        )
    print(f"simulate: controllers on {placement_text(workers)}", file=sys.stderr)
    for line in sorted({describe_path(entry.vehicle.mpc) for entry in mission.roster}):
        print(f"simulate: {line}", file=sys.stderr)
    progress = ProgressBar("simulate")
    path, _, metrics = simulate_to_trial(mission, out, seed, args.duration, progress, workers)
    progress.finish("done")
    for line in summary_lines(metrics):
        print(line)
    print(SAFETY_NOTE)
    print(f"trial written to {path}")
    print(f"report: {path / 'report'}")
    return 0
