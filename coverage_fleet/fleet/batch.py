"""Many runs of one mission over seeds, each from random valid initial poses."""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import Any

import numpy as np

from coverage_fleet.errors import ConfigError
from coverage_fleet.fleet.mission import Mission
from coverage_fleet.fleet.parallel import Placement, run_all
from coverage_fleet.fleet.simulation import simulate_mission
from coverage_fleet.fleet.trial import TrialLog

#: Draws per robot before giving up on placing it (a crowded region cannot hold the fleet).
MAX_DRAWS_PER_ROBOT = 2000


def random_initial_poses(
    mission: Mission, rng: np.random.Generator
) -> dict[str, tuple[float, float, float]]:
    """Uniformly random poses inside the region (footprint discs inside), apart by the
    robots' footprints, with uniformly random headings (rejection sampling)."""
    x0, y0, x1, y1 = mission.region.bounds
    A, b = mission.region.halfspaces()
    placed: dict[str, tuple[float, float, float]] = {}
    radii: dict[str, float] = {}
    for entry in mission.roster:
        radius = entry.footprint_radius
        for _ in range(MAX_DRAWS_PER_ROBOT):
            point = np.array([rng.uniform(x0, x1), rng.uniform(y0, y1)])
            if np.any(A @ point > b - radius):
                continue
            if any(
                math.dist(point, other[:2]) < radius + radii[name] for name, other in placed.items()
            ):
                continue
            placed[entry.name] = (
                float(point[0]),
                float(point[1]),
                float(rng.uniform(-np.pi, np.pi)),
            )
            radii[entry.name] = radius
            break
        else:
            raise ConfigError.single(
                str(mission.source),
                "roster",
                f"could not place {entry.name!r} at random: the region is too crowded for "
                "the fleet's footprints",
            )
    return placed


#: Whole layouts tried before packed starts give up (each robot gets MAX_DRAWS_PER_ROBOT).
PACKED_LAYOUT_ATTEMPTS = 50


def packed_initial_poses(
    mission: Mission, rng: np.random.Generator, gap: float
) -> dict[str, tuple[float, float, float]]:
    """Random poses with the fleet packed together: a stress test of keeping apart.

    Guarantees (footprint discs of the roster's radii r_i, clearance = centre distance
    minus both radii):
    - every footprint lies inside the region (the centre inside the region shrunk by r_i);
    - no two footprints overlap (every clearance >= 0);
    - every robot has at least one other within `gap` metres of clearance (and the robots
      form one connected group under that relation).
    How: the first robot (roster order) is placed uniformly in the shrunk region; each
    next one beside a uniformly chosen robot already placed, at a clearance drawn
    uniformly from [0, gap] in a uniform direction, and kept when it fits (rejection
    sampling); a layout that cannot be completed is redrawn. Headings are uniform. All
    draws come from `rng`, so a seed gives the same poses everywhere."""
    if not gap >= 0.0:
        raise ValueError(f"gap must be >= 0, got {gap}")
    A, b = mission.region.halfspaces()
    x0, y0, x1, y1 = mission.region.bounds
    entries = list(mission.roster)
    for _ in range(PACKED_LAYOUT_ATTEMPTS):
        centres: list[np.ndarray] = []
        radii: list[float] = []
        for index, entry in enumerate(entries):
            radius = entry.footprint_radius
            for _ in range(MAX_DRAWS_PER_ROBOT):
                if index == 0:
                    point = np.array([rng.uniform(x0, x1), rng.uniform(y0, y1)])
                else:
                    anchor = int(rng.integers(len(centres)))
                    distance = radii[anchor] + radius + rng.uniform(0.0, gap)
                    angle = rng.uniform(-np.pi, np.pi)
                    point = centres[anchor] + distance * np.array([np.cos(angle), np.sin(angle)])
                if np.any(A @ point > b - radius):
                    continue
                if any(math.dist(point, c) < radius + r for c, r in zip(centres, radii,
                                                                      strict=True)):
                    continue
                centres.append(point)
                radii.append(radius)
                break
            else:
                break
        if len(centres) == len(entries):
            return {
                e.name: (float(c[0]), float(c[1]), float(rng.uniform(-np.pi, np.pi)))
                for e, c in zip(entries, centres, strict=True)
            }
    raise ConfigError.single(
        str(mission.source), "roster",
        f"could not pack the fleet within {gap:g} m of each other inside the region",
    )


def start_poses(
    mission: Mission, seed: int, packed_gap: float | None = None
) -> dict[str, tuple[float, float, float]]:
    """The seed's start poses: spread at random (`random_initial_poses`) or, with a gap,
    packed (`packed_initial_poses`)."""
    rng = np.random.default_rng(seed)
    if packed_gap is None:
        return random_initial_poses(mission, rng)
    return packed_initial_poses(mission, rng, packed_gap)


MetricsFunction = Callable[[TrialLog], dict[str, Any]]


def run_seed(mission: Mission, job: tuple[Any, ...]) -> dict[str, Any]:
    """One run: `job` = (seed, duration, metrics[, packed_gap]): initial poses drawn with
    the seed (`start_poses`), the simulation, its metrics (plus seed and initial poses). A
    pure function of its arguments, so it gives the same row in this process or on any
    worker."""
    seed, duration, metrics, *rest = job
    poses = start_poses(mission, seed, rest[0] if rest else None)
    log = simulate_mission(mission, seed=seed, duration=duration, initial_poses=poses)
    row = dict(metrics(log)) if metrics is not None else {}
    row["seed"] = seed
    row["initial_poses"] = {n: list(p) for n, p in poses.items()}
    return row


def run_batch(
    mission: Mission,
    seeds: list[int],
    duration: float | None = None,
    metrics: MetricsFunction | None = None,
    on_run: Callable[[int, dict[str, Any]], None] | None = None,
    placement: Placement | None = None,
    packed_gap: float | None = None,
) -> list[dict[str, Any]]:
    """One simulation per seed from random initial poses drawn with that seed (packed
    within `packed_gap` metres when given: `packed_initial_poses`); returns one
    metrics mapping per run, in seed order (`metrics(log)`, plus seed and initial poses).
    Runs execute where `placement` says (default: one after another in this process);
    `metrics` must then be picklable (a module-level function or a functools.partial of
    one). `on_run(seed, row)` is called as each run finishes."""
    jobs = [(seed, duration, metrics, packed_gap) for seed in seeds]

    def done(index: int, row: dict[str, Any]) -> None:
        if on_run is not None:
            on_run(seeds[index], row)

    return run_all(run_seed, mission, jobs, placement or Placement(), done)


def summarise(rows: list[dict[str, Any]], keys: tuple[str, ...]) -> dict[str, dict[str, float]]:
    """Mean, min and max of each numeric key over the runs (None entries are skipped)."""
    summary = {}
    for key in keys:
        values = [float(r[key]) for r in rows if r.get(key) is not None]
        if values:
            summary[key] = {
                "mean": float(np.mean(values)),
                "min": float(np.min(values)),
                "max": float(np.max(values)),
                "runs": len(values),
            }
    return summary
