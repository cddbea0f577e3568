"""`coverage-fleet batch MISSION --seeds N`: the mission over many seeds from random valid
initial poses; a table on stdout and a JSON summary. Seeds run in parallel on a local
cluster with one worker per core (`--workers`), or on an existing Dask cluster
(`--scheduler`); fleet/parallel.py says how and why."""

from __future__ import annotations

import argparse
import functools
import json
import os
import sys
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from coverage_fleet.errors import ConfigError
from coverage_fleet.fleet.batch import run_batch, summarise
from coverage_fleet.fleet.density_updates import density_in_force
from coverage_fleet.fleet.mission import (
    DURATION_MAX,
    SEED_MAX,
    load_mission_with,
    with_keep_apart,
)
from coverage_fleet.fleet.parallel import (
    WORKERS_MAX,
    Placement,
    default_workers,
    scheduler_address_fault,
)
from coverage_fleet.inputs.fields import Collector, integer_fault, number_fault
from coverage_fleet.inputs.outputs import check_output_location, output_fault
from coverage_fleet.interrupts import interrupts_at_safe_points
from coverage_fleet.report.metrics import trial_metrics

COLUMNS = (
    ("seed", "seed", "{:>4}"),
    ("outcome", "outcome", "{:>16}"),
    ("settled_time_s", "settled (s)", "{:>11.1f}"),
    ("generations", "gens", "{:>4}"),
    ("final_cost", "final cost", "{:>11.5g}"),
    ("cvt_gap", "CVT gap", "{:>7.2%}"),
    ("held_cvt_gap", "held gap", "{:>8.2%}"),
    ("final_largest_distance_to_centroid_m", "max dist (m)", "{:>12.3g}"),
    ("limit_violations", "limits", "{:>6}"),
    ("solver_failures", "fails", "{:>5}"),
    ("smallest_clearance_m", "clear (m)", "{:>9.3f}"),
    ("footprints_overlap", "overlap", "{!s:>7}"),
    ("wall_time_s", "wall (s)", "{:>8.1f}"),
)
SUMMARY_KEYS = (
    "settled_time_s",
    "generations",
    "final_cost",
    "cvt_gap",
    "held_cvt_gap",
    "final_largest_distance_to_centroid_m",
    "limit_violations",
    "solver_failures",
    "smallest_clearance_m",
    "wall_time_s",
)


#: Runs in one batch: a day of runs of a few seconds each; more is a typing mistake.
BATCH_SEEDS_MAX = 100_000
#: Largest --packed-starts gap (m): beyond a few hundred metres nothing is packed.
PACKED_GAP_MAX = 1000.0


def table_header() -> str:
    return "  ".join(f"{title:>{max(len(title), 4)}}" for _, title, _ in COLUMNS)


def table_row(row: dict[str, Any]) -> str:
    cells = []
    for key, title, fmt in COLUMNS:
        value = row.get(key)
        text = "-" if value is None else fmt.format(value).strip()
        cells.append(f"{text:>{max(len(title), 4)}}")
    return "  ".join(cells)


def register(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser(
        "batch",
        help="simulate a mission over many seeds from random initial poses and summarise",
    )
    parser.add_argument("mission", type=Path, help="mission file (YAML)")
    parser.add_argument("--seeds", type=int, required=True, help="number of runs")
    parser.add_argument("--first-seed", type=int, default=0, help="seed of the first run")
    parser.add_argument("--duration", type=float, help="simulated seconds per run")
    parser.add_argument(
        "--packed-starts", type=float, metavar="GAP",
        help="start the fleet packed together instead of spread out: every footprint inside "
             "the region, no two overlapping, every robot within GAP metres (footprint to "
             "footprint) of at least one other; drawn with each run's seed "
             "(fleet/batch.packed_initial_poses)")
    parser.add_argument(
        "--keep-apart", choices=("mission", "on", "off"), default="mission",
        help="buffered cells in every robot's MPC: as the mission says (default), or forced "
             "on or off for this batch (off: the comparison without avoidance)")
    parser.add_argument(
        "--json",
        type=Path,
        help="summary file to write (default: trials/<mission>-batch-<UTC time>.json)",
    )
    add_placement_options(parser)
    parser.set_defaults(handler=run)


def add_placement_options(parser: argparse.ArgumentParser) -> None:
    """--workers / --scheduler: where the runs execute (shared with other studies)."""
    parser.add_argument(
        "--workers", type=int,
        help=f"local worker processes (default: one per core, here {default_workers()}; "
             "1 runs everything in this process)")
    parser.add_argument(
        "--scheduler", metavar="ADDRESS",
        help="run on an existing Dask cluster instead, e.g. tcp://127.0.0.1:8786 (its "
             "workers need this package installed)")


def placement_from(args: argparse.Namespace, options: Collector) -> Placement:
    """The placement the command line asks for; problems go to `options`."""
    if args.workers is not None:
        options.check("--workers", integer_fault(args.workers, 1, WORKERS_MAX))
    if args.scheduler is not None:
        options.check("--scheduler", scheduler_address_fault(args.scheduler))
        if args.workers is not None:
            options.add("--workers", "cannot be combined with --scheduler (the cluster's "
                        "own workers run the seeds)")
        return Placement(scheduler=args.scheduler)
    workers = args.workers if isinstance(args.workers, int) else default_workers()
    return Placement(workers=max(1, workers))


def run(args: argparse.Namespace) -> int:
    options = Collector("command line")
    options.check("--seeds", integer_fault(args.seeds, 1, BATCH_SEEDS_MAX))
    options.check("--first-seed", integer_fault(args.first_seed, 0,
                                                SEED_MAX - max(args.seeds, 1) + 1))
    if args.duration is not None:
        options.check("--duration", number_fault(
            args.duration, minimum=0.0, exclusive_minimum=True, maximum=DURATION_MAX))
    placement = placement_from(args, options)
    if args.packed_starts is not None:
        options.check("--packed-starts", number_fault(
            args.packed_starts, minimum=0.0, maximum=PACKED_GAP_MAX))
    if args.json is not None:
        options.check("--json", output_fault(args.json))
    mission = load_mission_with(args.mission, options)
    if args.keep_apart != "mission":
        mission = with_keep_apart(mission, args.keep_apart == "on")
    stamp = datetime.now(UTC).strftime("%Y%m%dT%H%M%SZ")
    out = args.json or Path("trials") / f"{mission.name}-batch-{stamp}.json"
    if out.exists():
        raise ConfigError.single(
            str(out), "--json", "already exists; a summary is never overwritten"
        )
    check_output_location(out, "--json")
    seeds = list(range(args.first_seed, args.first_seed + args.seeds))
    footprints = {e.name: e.footprint_radius for e in mission.roster}
    starts = ("random spread" if args.packed_starts is None
              else f"packed within {args.packed_starts:g} m")
    finished: dict[int, dict[str, Any]] = {}
    shown = 0

    def show(seed: int, row: dict[str, Any]) -> None:
        # Rows print in seed order whatever order the workers finish in.
        nonlocal shown
        finished[seed] = row
        while shown < len(seeds) and seeds[shown] in finished:
            print(table_row(finished[seeds[shown]]), flush=True)
            shown += 1
        print(f"batch: run {len(finished)}/{len(seeds)} done (seed {seed})", file=sys.stderr)

    # Announced inside the safe-point scope, so a Ctrl-C right after the announcement is
    # always taken there (a process started with SIGINT ignored, as shells start background
    # jobs, used to drop one that came before the scope began).
    with interrupts_at_safe_points():
        print(f"batch: {len(seeds)} runs on {placement.describe()}; starts {starts}; keep-apart "
              f"{'on' if mission.keep_apart.enabled else 'off'}", file=sys.stderr)
        print(table_header())
        rows = run_batch(
            mission,
            seeds,
            duration=args.duration,
            # Judged with the density in force at the end (scripted updates included).
            metrics=functools.partial(trial_metrics, region=mission.region,
                                      density=density_in_force(
                                          mission.density, mission.density_updates,
                                          args.duration or mission.simulation.duration),
                                      footprints=footprints,
                                      held=mission.settle.cells),
            on_run=show,
            placement=placement,
            packed_gap=args.packed_starts,
        )
    summary = summarise(rows, SUMMARY_KEYS)
    print("summary over", len(rows), "runs:")
    for key, stats in summary.items():
        print(f"  {key}: mean {stats['mean']:.4g}  min {stats['min']:.4g}  max {stats['max']:.4g}")
    overlaps = sum(bool(r.get("footprints_overlap")) for r in rows)
    if overlaps:
        print(f"FOOTPRINTS OVERLAP in {overlaps} of {len(rows)} runs (column 'overlap')")
    document = {"mission": str(mission.source), "seeds": seeds, "summary": summary,
                "keep_apart": mission.keep_apart.enabled, "packed_starts": args.packed_starts,
                "runs": rows}
    out.parent.mkdir(parents=True, exist_ok=True)
    staging = out.with_name(f".{out.name}.partial")
    staging.write_text(json.dumps(document, indent=2) + "\n")
    os.replace(staging, out)
    print(f"summary written to {out}")
    return 0
