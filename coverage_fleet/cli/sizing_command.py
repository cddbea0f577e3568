"""`coverage-fleet sizing MISSION --sizes 2,4,6 [--mix KIND[:WEIGHT],...]...`: how many robots
of which kind does this area need? Sweeps fleet size and vehicle mix over seeds, each run
from random valid initial poses, and reports per configuration the settled cost, the CVT
gap, the time to settle, solver failures and the smallest clearance: a table on stdout,
sizing.json and sizing.png in the output folder.

A configuration is a fleet size and a mix. A mix names vehicle kinds (a vehicle file
relative to the mission, or a built-in name from config/vehicles) with whole-number
weights; a fleet of n robots gets n * weight / total robots of each kind, rounded by
largest remainder (the Hamilton method, common practice). Without --mix the mission's own
roster gives the mix. Runs go where --workers / --scheduler say (as for `batch`).
"""

from __future__ import annotations

import argparse
import dataclasses
import functools
import json
import math
import os
import shutil
import sys
import tempfile
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np

from coverage_fleet.cli.batch_command import add_placement_options, placement_from
from coverage_fleet.errors import ConfigError
from coverage_fleet.fleet.batch import run_seed
from coverage_fleet.fleet.density_updates import density_in_force
from coverage_fleet.fleet.mission import (
    DURATION_MAX,
    SEED_MAX,
    Mission,
    RobotEntry,
    load_mission_with,
    mission_settle_problems,
    resolve_vehicle_path,
    simulation_step,
    with_roster,
)
from coverage_fleet.fleet.parallel import run_all
from coverage_fleet.inputs.fields import Collector, integer_fault, number_fault
from coverage_fleet.inputs.outputs import check_output_location
from coverage_fleet.interrupts import interrupts_at_safe_points
from coverage_fleet.report.metrics import trial_metrics
from coverage_fleet.vehicles.loader import load_vehicle_file

#: Largest fleet in a study (each robot is a full MPC: beyond this a study takes days).
SIZE_MAX = 256
#: Runs per configuration at most.
SEEDS_MAX = 10_000

COLUMNS = (
    ("size", "size", "{:>4}"),
    ("mix", "mix", "{}"),
    ("settled_share", "settled", "{:>7.0%}"),
    ("settled_cost", "settled cost", "{:>12.5g}"),
    ("final_cost", "final cost", "{:>10.5g}"),
    ("cvt_gap", "CVT gap", "{:>7.2%}"),
    ("settle_time_s", "settle (s)", "{:>10.1f}"),
    ("solver_failures", "fails", "{:>5}"),
    ("smallest_clearance_m", "clear (m)", "{:>9.2f}"),
)


@dataclasses.dataclass(frozen=True)
class Kind:
    """One vehicle kind of a mix: its label (file stem), file and loaded spec."""

    label: str
    path: Path
    spec: Any  # VehicleSpec


def register(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser(
        "sizing",
        help="sweep fleet size and vehicle mix over seeds: settled cost, CVT gap, time to "
             "settle, failures and clearance per configuration",
    )
    parser.add_argument("mission", type=Path, help="mission file (YAML): region and density")
    parser.add_argument("--sizes", required=True,
                        help="fleet sizes, comma-separated (e.g. 2,4,6)")
    parser.add_argument(
        "--mix", action="append", metavar="KIND[:WEIGHT],...",
        help="a vehicle mix, e.g. differential_drive:2,multirotor:1 (KIND: a vehicle file "
             "or built-in name; WEIGHT: a whole number, default 1); repeat for more mixes; "
             "default: the mission's roster")
    parser.add_argument("--seeds", type=int, default=3, help="runs per configuration")
    parser.add_argument("--first-seed", type=int, default=0, help="seed of the first run")
    parser.add_argument("--duration", type=float, help="simulated seconds per run")
    parser.add_argument(
        "--out", type=Path,
        help="output folder (default: trials/<mission>-sizing-<UTC time>); never overwritten")
    add_placement_options(parser)
    parser.set_defaults(handler=run)


def parse_sizes(text: str, options: Collector) -> list[int]:
    sizes = []
    for part in str(text).split(","):
        try:
            size = int(part.strip())
        except ValueError:
            options.add("--sizes", f"must be whole numbers separated by commas, got {text!r}")
            return []
        fault = integer_fault(size, 1, SIZE_MAX)
        if fault:
            options.add("--sizes", f"{size}: {fault}")
        elif size in sizes:
            options.add("--sizes", f"{size} is listed twice")
        else:
            sizes.append(size)
    return sizes


def parse_mix(text: str, base_dir: Path, options: Collector,
              loaded: dict[Path, Kind]) -> dict[str, tuple[Kind, int]] | None:
    """{label: (kind, weight)} of one --mix value, or None (problems recorded)."""
    mix: dict[str, tuple[Kind, int]] = {}
    for part in str(text).split(","):
        name, _, weight_text = part.strip().partition(":")
        weight = 1
        if weight_text:
            try:
                weight = int(weight_text)
            except ValueError:
                weight = -1
            if weight < 1:
                options.add("--mix", f"{part.strip()!r}: the weight must be a whole number "
                            "of at least 1")
                return None
        path = resolve_vehicle_path(name, base_dir) if name else None
        if path is None:
            options.add("--mix", f"{name!r}: vehicle file not found (looked in {base_dir} and "
                        "the package's config/vehicles)")
            return None
        if path not in loaded:
            try:
                loaded[path] = Kind(path.stem, path, load_vehicle_file(path))
            except ConfigError as error:
                options.add("--mix", f"{name!r}: vehicle file {path} does not load "
                            f"({len(error.problems)} problem(s) below)")
                options.extend(error)
                return None
        kind = loaded[path]
        if kind.label in mix:
            options.add("--mix", f"{text!r}: {kind.label} is listed twice")
            return None
        mix[kind.label] = (kind, weight)
    return mix


def mission_mix(mission: Mission) -> dict[str, tuple[Kind, int]]:
    """The mission's roster as a mix: each vehicle file, weighted by its robot count."""
    mix: dict[str, tuple[Kind, int]] = {}
    for entry in mission.roster:
        label = entry.vehicle_path.stem
        kind, count = mix.get(label, (Kind(label, entry.vehicle_path, entry.vehicle), 0))
        mix[label] = (kind, count + 1)
    return mix


def split_fleet(size: int, weights: dict[str, int]) -> dict[str, int]:
    """Robots per kind: size * weight / total, rounded by largest remainder (ties: the
    order given)."""
    total = sum(weights.values())
    exact = {label: size * w / total for label, w in weights.items()}
    counts = {label: math.floor(q) for label, q in exact.items()}
    order = sorted(exact, key=lambda label: -(exact[label] - counts[label]))
    for label in order[: size - sum(counts.values())]:
        counts[label] += 1
    return counts


def build_roster(counts: dict[str, int], kinds: dict[str, Kind]) -> tuple[RobotEntry, ...]:
    """Robots named <kind>_<k>; initial poses are drawn per run (these are placeholders)."""
    roster = []
    for label, count in counts.items():
        for k in range(count):
            kind = kinds[label]
            roster.append(RobotEntry(name=f"{label}_{k + 1}", vehicle_path=kind.path,
                                     vehicle=kind.spec, initial_pose=(0.0, 0.0, 0.0)))
    return tuple(roster)


def roster_problems(mission: Mission, roster: tuple[RobotEntry, ...]) -> list[str]:
    """What makes this roster unusable with the mission's simulation and settle settings."""
    step = simulation_step(roster, mission.simulation)
    problems = []
    for kind in {entry.vehicle_path: entry for entry in roster}.values():
        ratio = kind.vehicle.mpc.sample_time / step
        if abs(ratio - round(ratio)) > 1e-6 or round(ratio) < 1:
            problems.append(f"sample time {kind.vehicle.mpc.sample_time:g} s of "
                            f"{kind.vehicle_path.stem} is not a whole multiple of the "
                            f"simulation step {step:g} s")
    problems += [f"settle.{key}: {message}" for key, message in mission_settle_problems(
        roster, mission.gate, mission.settle, mission.simulation)]
    return problems


def run_configuration(mission: Mission, job: tuple[tuple[RobotEntry, ...], int, float | None]
                      ) -> dict[str, Any]:
    """One run of one configuration (a worker task: module level, picklable arguments)."""
    roster, seed, duration = job
    sized = with_roster(mission, roster)
    footprints = {entry.name: entry.footprint_radius for entry in roster}
    # Judged with the density in force at the end (scripted updates included).
    final_density = density_in_force(mission.density, mission.density_updates,
                                     duration or mission.simulation.duration)
    metrics = functools.partial(trial_metrics, region=mission.region, density=final_density,
                                footprints=footprints)
    return run_seed(sized, (seed, duration, metrics))


def summarise_configuration(runs: list[dict[str, Any]]) -> dict[str, Any]:
    """Per configuration: share of runs settled; mean cost at rest (settled runs) and at
    the end (all runs); mean CVT gap; mean and longest time to settle; solver failures
    added up; the smallest clearance of any run."""
    settled = [r for r in runs if r.get("settled")]

    def mean(values: list[Any]) -> float | None:
        values = [float(v) for v in values if v is not None]
        return float(np.mean(values)) if values else None

    clearances = [r["smallest_clearance_m"] for r in runs
                  if r.get("smallest_clearance_m") is not None]
    return {
        "runs": len(runs),
        "settled_runs": len(settled),
        "settled_share": len(settled) / len(runs) if runs else 0.0,
        "settled_cost": mean([r["final_cost"] for r in settled]),
        "final_cost": mean([r["final_cost"] for r in runs]),
        "final_cost_min": min((r["final_cost"] for r in runs), default=None),
        "final_cost_max": max((r["final_cost"] for r in runs), default=None),
        "cvt_gap": mean([r.get("cvt_gap") for r in runs]),
        "settle_time_s": mean([r.get("settled_time_s") for r in settled]),
        "settle_time_max_s": max((r["settled_time_s"] for r in settled), default=None),
        "solver_failures": int(sum(r.get("solver_failures", 0) for r in runs)),
        "smallest_clearance_m": min(clearances) if clearances else None,
    }


def mix_text(counts: dict[str, int]) -> str:
    return " + ".join(f"{count} {label}" for label, count in counts.items() if count)


def table_rows(configurations: list[dict[str, Any]]) -> list[str]:
    widths = {key: len(title) for key, title, _ in COLUMNS}
    cells_per_row = []
    for configuration in configurations:
        values = {"size": configuration["size"], "mix": mix_text(configuration["counts"]),
                  **configuration["summary"]}
        cells = {}
        for key, _, fmt in COLUMNS:
            value = values.get(key)
            cells[key] = "-" if value is None else fmt.format(value).strip()
            widths[key] = max(widths[key], len(cells[key]))
        cells_per_row.append(cells)
    lines = ["  ".join(f"{title:>{widths[key]}}" if key != "mix" else
                       f"{title:<{widths[key]}}" for key, title, _ in COLUMNS)]
    for cells in cells_per_row:
        lines.append("  ".join(f"{cells[key]:>{widths[key]}}" if key != "mix" else
                               f"{cells[key]:<{widths[key]}}" for key, _, _ in COLUMNS))
    return lines


def plot_sizing(path: Path, configurations: list[dict[str, Any]]) -> None:
    """Final cost (mean, min-max bar; filled marker where every run settled) and mean
    time to settle against fleet size, one line per mix."""
    import matplotlib.pyplot as plt

    import coverage_fleet.report.figures  # noqa: F401  (selects the Agg backend)

    figure, (cost_axes, time_axes) = plt.subplots(1, 2, figsize=(11, 4.2))
    by_mix: dict[str, list[dict[str, Any]]] = {}
    for configuration in configurations:
        by_mix.setdefault(configuration["mix_label"], []).append(configuration)
    for label, group in by_mix.items():
        group = sorted(group, key=lambda c: c["size"])
        sizes = [c["size"] for c in group]
        summaries = [c["summary"] for c in group]
        mean = np.array([s["final_cost"] for s in summaries], dtype=float)
        low = mean - np.array([s["final_cost_min"] for s in summaries], dtype=float)
        high = np.array([s["final_cost_max"] for s in summaries], dtype=float) - mean
        line = cost_axes.errorbar(sizes, mean, yerr=[low, high], marker="o", capsize=3,
                                  label=label)
        colour = line[0].get_color()
        for size, summary, value in zip(sizes, summaries, mean, strict=True):
            if summary["settled_share"] < 1.0:  # hollow: not every run settled
                cost_axes.plot(size, value, "o", markerfacecolor="white",
                               markeredgecolor=colour, zorder=5)
        times = [s["settle_time_s"] for s in summaries]
        shown = [(n, t) for n, t in zip(sizes, times, strict=True) if t is not None]
        if shown:
            time_axes.plot(*zip(*shown, strict=True), marker="s", color=colour, label=label)
    if not time_axes.lines:
        time_axes.text(0.5, 0.5, "no run settled within its duration", ha="center",
                       va="center", transform=time_axes.transAxes)
    cost_axes.set(xlabel="fleet size", ylabel="coverage cost at the end of the run",
                  title="cost (mean, min-max; hollow: not all runs settled)")
    time_axes.set(xlabel="fleet size", ylabel="time to settle (s, settled runs)",
                  title="time to settle (mean)")
    for axes in (cost_axes, time_axes):
        axes.grid(True, alpha=0.3)
        axes.xaxis.get_major_locator().set_params(integer=True)
    cost_axes.legend(fontsize="small")
    figure.tight_layout()
    figure.savefig(path, dpi=110)
    plt.close(figure)


def run(args: argparse.Namespace) -> int:
    options = Collector("command line")
    sizes = parse_sizes(args.sizes, options)
    options.check("--seeds", integer_fault(args.seeds, 1, SEEDS_MAX))
    options.check("--first-seed", integer_fault(args.first_seed, 0,
                                                SEED_MAX - max(args.seeds, 1) + 1))
    if args.duration is not None:
        options.check("--duration", number_fault(
            args.duration, minimum=0.0, exclusive_minimum=True, maximum=DURATION_MAX))
    placement = placement_from(args, options)
    base_dir = Path(args.mission).resolve().parent
    loaded: dict[Path, Kind] = {}
    mixes = [parse_mix(text, base_dir, options, loaded) for text in args.mix or []]
    mission = load_mission_with(args.mission, options)
    if not args.mix:
        mixes = [mission_mix(mission)]
    if any(mix is None for mix in mixes):
        options.raise_if_any()

    configurations = []
    for mix in mixes:
        assert mix is not None
        kinds = {label: kind for label, (kind, _) in mix.items()}
        weights = {label: weight for label, (_, weight) in mix.items()}
        mix_label = ", ".join(f"{label}:{w}" for label, w in weights.items())
        for size in sizes:
            counts = split_fleet(size, weights)
            roster = build_roster(counts, kinds)
            for problem in roster_problems(mission, roster):
                options.add("--mix", f"{mix_label} at size {size}: {problem}")
            configurations.append({"size": size, "mix_label": mix_label, "counts": counts,
                                   "roster": roster})
    options.raise_if_any()

    stamp = datetime.now(UTC).strftime("%Y%m%dT%H%M%SZ")
    out = args.out or Path("trials") / f"{mission.name}-sizing-{stamp}"
    if out.exists():
        raise ConfigError.single(str(out), "--out", "already exists; a study is never "
                                 "overwritten")
    check_output_location(out, "--out")
    seeds = list(range(args.first_seed, args.first_seed + args.seeds))
    jobs = [(c["roster"], seed, args.duration) for c in configurations for seed in seeds]
    finished = 0

    def progress(index: int, row: dict[str, Any]) -> None:
        nonlocal finished
        finished += 1
        configuration = configurations[index // len(seeds)]
        print(f"sizing: run {finished}/{len(jobs)} done (size {configuration['size']}, "
              f"{mix_text(configuration['counts'])}, seed {row['seed']}: {row['outcome']})",
              file=sys.stderr, flush=True)

    # Announced inside the safe-point scope (batch_command.py says why).
    with interrupts_at_safe_points():
        print(f"sizing: {len(configurations)} configurations x {len(seeds)} seeds = {len(jobs)} "
              f"runs on {placement.describe()}", file=sys.stderr)
        rows = run_all(run_configuration, mission, jobs, placement, progress)
    for number, configuration in enumerate(configurations):
        runs = rows[number * len(seeds):(number + 1) * len(seeds)]
        configuration["runs"] = runs
        configuration["summary"] = summarise_configuration(runs)
    for line in table_rows(configurations):
        print(line)

    document = {
        "mission": str(mission.source),
        "seeds": seeds,
        "duration_s": args.duration,
        "configurations": [{key: value for key, value in c.items() if key != "roster"}
                           for c in configurations],
    }
    out.parent.mkdir(parents=True, exist_ok=True)
    staging = Path(tempfile.mkdtemp(prefix=f".{out.name}.", suffix=".partial", dir=out.parent))
    try:
        (staging / "sizing.json").write_text(json.dumps(document, indent=2) + "\n")
        plot_sizing(staging / "sizing.png", configurations)
        os.rename(staging, out)
    except BaseException:
        shutil.rmtree(staging, ignore_errors=True)
        raise
    print(f"study written to {out} (sizing.json, sizing.png)")
    return 0
