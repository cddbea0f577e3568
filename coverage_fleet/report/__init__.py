"""Trial report: PNG figures and metrics.json for one trial (fleet and below, matplotlib)."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

from coverage_fleet.fleet.trial import TrialLog
from coverage_fleet.geometry.density import Density
from coverage_fleet.geometry.region import ConvexRegion

FIGURES = (
    "trajectories.png", "cost.png", "distances.png", "solve_times.png", "motion.png",
    "clearance.png",
)


def write_report(
    directory: str | Path,
    log: TrialLog,
    region: ConvexRegion,
    density: Density,
    settle_distance: float,
    footprints: dict[str, float] | None = None,
    map_origin: str | None = None,
    extra_metrics: dict[str, Any] | None = None,
    held: Any = None,
) -> dict[str, Any]:
    """Write metrics.json and the figures into `directory`; returns the metrics (with
    `extra_metrics`, e.g. the provenance, added). `map_origin` (a geodetic mission's
    origin, LocalFrame.describe) labels the map axes. `held` (fleet/settling.HeldCells, a
    keep-apart run's buffered cells) adds the held CVT gap."""
    from coverage_fleet.report import figures
    from coverage_fleet.report.metrics import trial_metrics

    directory = Path(directory)
    metrics = {**trial_metrics(log, region, density, footprints, held), **(extra_metrics or {})}
    (directory / "metrics.json").write_text(json.dumps(metrics, indent=2) + "\n")
    figures.plot_trajectories(directory / "trajectories.png", log, region, density,
                              map_origin)
    figures.plot_cost(directory / "cost.png", log)
    figures.plot_distances(directory / "distances.png", log, settle_distance)
    figures.plot_solve_times(directory / "solve_times.png", log)
    figures.plot_motion(directory / "motion.png", log)
    figures.plot_clearance(directory / "clearance.png", log, footprints)
    return metrics
