"""The keep-apart study: the same packed starts with the buffered cells on and off.

For each mission and each seed the fleet starts packed (fleet/batch.packed_initial_poses:
every footprint inside the region, none overlapping, each robot within `gap` metres of
another) and runs offline twice, with keep-apart on and off (fleet/mission.with_keep_apart;
the same seed gives the same starts and noise both times). Each run keeps only what the
criteria need (`study_row`): how it ended, when it settled, and the smallest clearance
between two footprints over the whole run, measured on the plants' paths at every RK4
substep (fleet/plants.py; report/metrics.closest_approach).

The criteria (issue 12), per mission:
- no overlap with keep-apart on: the smallest clearance of every run >= 0 at every sample;
- settled fraction with keep-apart on >= 95 % of the fraction without;
- keep-apart off shows overlaps in some run (positive control: the starts are packed
  enough for robots that do not avoid each other to touch).
Runs execute where the placement says (fleet/parallel.py), like `coverage-fleet batch`.
"""

from __future__ import annotations

import functools
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from coverage_fleet.fleet.batch import run_batch
from coverage_fleet.fleet.mission import Mission, with_keep_apart
from coverage_fleet.fleet.parallel import Placement
from coverage_fleet.fleet.trial import TrialLog
from coverage_fleet.report.metrics import closest_approach

#: The settled fraction with keep-apart on must be at least this share of the one without.
SETTLED_SHARE_MIN = 0.95


def study_row(log: TrialLog, footprints: dict[str, float]) -> dict[str, Any]:
    """What one run contributes to the study (module docstring)."""
    clearance = closest_approach(log, footprints)
    return {
        "outcome": log.outcome,
        "settled": log.settled_time is not None,
        "settled_time_s": log.settled_time,
        "simulated_time_s": float(log.time[-1]) if log.time else 0.0,
        "smallest_clearance_m": clearance["smallest_clearance_m"],
        "clearance_measured_on": clearance.get("clearance_measured_on"),
        "footprints_overlap": clearance.get("footprints_overlap", False),
        "overlap_pairs": clearance.get("overlap_pairs", []),
    }


def run_side(
    mission: Mission,
    seeds: Sequence[int],
    gap: float,
    duration: float | None,
    keep_apart: bool,
    placement: Placement,
    on_run: Callable[[int, dict[str, Any]], None] | None = None,
) -> list[dict[str, Any]]:
    """One row per seed (`study_row`, plus seed and starts) with keep-apart on or off."""
    chosen = with_keep_apart(mission, keep_apart)
    footprints = {e.name: e.footprint_radius for e in mission.roster}
    return run_batch(
        chosen, list(seeds), duration=duration,
        metrics=functools.partial(study_row, footprints=footprints),
        on_run=on_run, placement=placement, packed_gap=gap,
    )


def distribution(values: Sequence[float]) -> dict[str, float] | None:
    """min, 5th percentile, median, 95th percentile, max (numpy's linear percentiles)."""
    if not len(values):
        return None
    array = np.asarray(values, float)
    return {
        "min": float(array.min()),
        "p5": float(np.percentile(array, 5)),
        "median": float(np.median(array)),
        "p95": float(np.percentile(array, 95)),
        "max": float(array.max()),
    }


def side_summary(rows: Sequence[dict[str, Any]]) -> dict[str, Any]:
    """Runs, overlapping runs, the smallest clearance per run, the settled fraction and the
    time to settle over the runs that settled."""
    clearances = [r["smallest_clearance_m"] for r in rows if r["smallest_clearance_m"] is not None]
    settled = [r for r in rows if r["settled"]]
    return {
        "runs": len(rows),
        "overlapping_runs": sum(bool(r["footprints_overlap"]) for r in rows),
        "smallest_clearance_m": distribution(clearances),
        "settled_fraction": len(settled) / len(rows) if rows else 0.0,
        "settled_time_s": distribution([r["settled_time_s"] for r in settled]),
    }


@dataclass(frozen=True)
class Criterion:
    name: str
    passed: bool
    detail: str


def criteria(on: dict[str, Any], off: dict[str, Any]) -> list[Criterion]:
    """The study's three criteria for one mission (module docstring)."""
    lowest = (on["smallest_clearance_m"] or {}).get("min")
    share_needed = SETTLED_SHARE_MIN * off["settled_fraction"]
    return [
        Criterion(
            "no overlap with keep-apart on",
            on["overlapping_runs"] == 0 and lowest is not None and lowest >= 0.0,
            f"{on['overlapping_runs']} of {on['runs']} runs overlapped; smallest clearance "
            + ("-" if lowest is None else f"{lowest:.4f} m"),
        ),
        Criterion(
            "settled fraction on >= 95 % of off",
            on["settled_fraction"] >= share_needed - 1e-12,
            f"on {on['settled_fraction']:.0%} vs off {off['settled_fraction']:.0%} "
            f"(needs >= {share_needed:.0%})",
        ),
        Criterion(
            "keep-apart off overlaps (positive control)",
            off["overlapping_runs"] > 0,
            f"{off['overlapping_runs']} of {off['runs']} runs overlapped",
        ),
    ]


def _spread(found: dict[str, float] | None, unit: str, digits: int) -> str:
    if found is None:
        return "-"
    return "  ".join(f"{key} {found[key]:.{digits}f}{unit}"
                     for key in ("min", "p5", "median", "p95", "max"))


def summary_lines(mission_name: str, on: dict[str, Any], off: dict[str, Any],
                  found: list[Criterion]) -> list[str]:
    """The printed block of one mission: both distributions and the criteria."""
    lines = [f"{mission_name}:"]
    for label, side in (("keep-apart on ", on), ("keep-apart off", off)):
        lines += [
            f"  {label}: {side['runs']} runs, {side['overlapping_runs']} with overlapping "
            f"footprints, settled {side['settled_fraction']:.0%}",
            f"    smallest clearance per run (m): "
            f"{_spread(side['smallest_clearance_m'], '', 4)}",
            f"    time to settle (s, settled runs): {_spread(side['settled_time_s'], '', 1)}",
        ]
    lines += [f"  {'PASS' if c.passed else 'FAIL'}  {c.name}: {c.detail}" for c in found]
    return lines
