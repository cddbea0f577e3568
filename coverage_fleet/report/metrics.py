"""Figures of merit of one trial, as plain numbers (written to report/metrics.json)."""

from __future__ import annotations

from typing import Any

import numpy as np

from coverage_fleet.fleet.lloyd import held_lloyd, lloyd
from coverage_fleet.fleet.settling import HeldCells
from coverage_fleet.fleet.trial import RobotLog, TrialLog
from coverage_fleet.geometry.density import Density
from coverage_fleet.geometry.partition import compute_partition
from coverage_fleet.geometry.region import ConvexRegion


def distances_to_centroids(
    positions: np.ndarray, region: ConvexRegion, density: Density
) -> tuple[np.ndarray, float]:
    """Each robot's distance to the centroid of its own cell, and the cost H, at `positions`."""
    partition = compute_partition(positions, region, density)
    return np.linalg.norm(positions - partition.centroids, axis=1), float(partition.cost)


#: Lloyd's iteration for the CVT gap runs until no agent would move farther than this (m) ...
CVT_GAP_STEP_TOLERANCE = 1e-6
#: ... or this many iterations.
CVT_GAP_MAX_ITERATIONS = 5000


def cvt_gap(positions: np.ndarray, region: ConvexRegion, density: Density) -> dict[str, Any]:
    """How far `positions` are from a centroidal Voronoi configuration, in cost: the
    relative decrease (H_start - H_lloyd) / H_start that Lloyd's iteration achieves when
    started from them (0 at a CVT, whose configurations are exactly Lloyd's fixed points:
    Du, Faber & Gunzburger, SIAM Review 41(4), 1999, sec. 5.2). Lloyd converges to a
    nearby CVT, not necessarily the best one, so this measures how unfinished the run is,
    not how good its CVT is."""
    result = lloyd(
        positions, region, density,
        max_iterations=CVT_GAP_MAX_ITERATIONS, tolerance=CVT_GAP_STEP_TOLERANCE,
    )
    start, end = float(result.costs[0]), float(np.min(result.costs))
    return {
        "cvt_gap": (start - end) / start if start > 0 else 0.0,
        "lloyd_cost_from_final": end,
        "lloyd_iterations": result.iterations,
        "lloyd_converged": result.converged,
    }


def held_cvt_gap(
    positions: np.ndarray, names: list[str], region: ConvexRegion, density: Density,
    held: HeldCells,
) -> dict[str, Any]:
    """The CVT gap judged under keep-apart: the relative cost decrease (H_start - H_held) /
    H_start that Lloyd's iteration *constrained to the same buffered cells* achieves from
    `positions` (fleet/lloyd.held_lloyd: every step to the point of the agent's buffered
    cell nearest its centroid, cells pulled in by the MPC's pad). 0 when no robot could get
    closer to its centroid without leaving its cell: the run is as finished as avoidance
    allows, even where the plain `cvt_gap` (unconstrained Lloyd) is not 0 because robots
    are held apart at their cell boundaries. Two robots pressing on their shared line rest
    anywhere within a short family of positions (neither cell lets them slide apart), so
    0 means "no robot can get closer within its cell", not "the best configuration the
    cells allow"; the plain `cvt_gap` beside it shows what keeping apart costs."""
    result = held_lloyd(
        positions, region, density,
        np.array([held.radii[n] for n in names]), held.margin,
        np.array([held.pads[n] for n in names]),
        max_iterations=CVT_GAP_MAX_ITERATIONS, tolerance=CVT_GAP_STEP_TOLERANCE,
    )
    start, end = float(result.costs[0]), float(np.min(result.costs))
    return {
        "held_cvt_gap": (start - end) / start if start > 0 else 0.0,
        "held_lloyd_cost_from_final": end,
        "held_lloyd_iterations": result.iterations,
        "held_lloyd_converged": result.converged,
    }


def closest_approach(log: TrialLog, footprints: dict[str, float] | None = None) -> dict[str, Any]:
    """Smallest centre distance between any two robots over the run, and (with footprint
    radii) the smallest clearance between their footprint discs, with any overlap flagged.

    The clearance is taken from every sample there is: the logged states (odometry of the
    ROS graph, the ticks offline) and, offline, the plant's own path at every RK4 substep
    (`log.plant_clearance`, fleet/plants.py), the finer record. Keys:
    smallest_clearance_m (m; negative: footprints overlapped), smallest_clearance_time_s,
    smallest_clearance_robots, clearance_measured_on ("plant substeps" when the run has
    them, else "logged states"), footprints_overlap (bool), overlap_first_time_s,
    overlap_pairs (each pair that overlapped at some sample), overlap_samples.

    Robots' rows need not share times (a recording of the ROS graph logs each robot as its
    messages arrive): each pair is compared at the union of its sample times within the
    span both cover, positions linearly interpolated between samples."""
    names = list(log.robots)
    if len(names) < 2:
        return {"closest_approach_m": None, "smallest_clearance_m": None}
    radii = {n: 0.0 for n in names} if footprints is None else footprints
    closest = np.inf
    samples: list[tuple[float, float, tuple[str, str]]] = []  # (time, clearance, pair)
    best: tuple[float, float, tuple[str, str]] | None = None
    for a_index, a in enumerate(names):
        for b in names[a_index + 1:]:
            times, gap = _pair_gaps(log.robots[a], log.robots[b])
            if not len(gap):
                continue
            closest = min(closest, float(gap.min()))
            clearance = gap - radii[a] - radii[b]
            k = int(np.argmin(clearance))
            if best is None or clearance[k] < best[1]:
                best = (float(times[k]), float(clearance[k]), (a, b))
            samples.extend(
                (float(t), float(c), (a, b)) for t, c in zip(times, clearance, strict=True)
                if c < 0
            )
    result: dict[str, Any] = {"closest_approach_m": float(closest) if np.isfinite(closest)
                              else None}
    if footprints is None:
        return result
    plant = [(c.time, c.clearance, (c.robot_a, c.robot_b)) for c in log.plant_clearance]
    for sample in plant:
        if best is None or sample[1] < best[1]:
            best = sample
    samples.extend(sample for sample in plant if sample[1] < 0)
    overlaps = sorted(samples)
    result.update({
        "smallest_clearance_m": None if best is None else best[1],
        "smallest_clearance_time_s": None if best is None else best[0],
        "smallest_clearance_robots": None if best is None else list(best[2]),
        "clearance_measured_on": "plant substeps" if plant else "logged states",
        "footprints_overlap": bool(overlaps),
        "overlap_first_time_s": overlaps[0][0] if overlaps else None,
        "overlap_pairs": [list(pair) for pair in sorted({pair for _, _, pair in overlaps})],
        "overlap_samples": len(overlaps),
    })
    return result


def _pair_gaps(
    a: RobotLog, b: RobotLog, extra_times: np.ndarray | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """(times, centre distances) of two robots: at their shared sample times, or, when
    their rows differ, at the union of their sample times (and `extra_times`) within the
    span both cover, positions linearly interpolated between samples."""
    ta, tb = np.asarray(a.time, float), np.asarray(b.time, float)
    pa, pb = a.positions(), b.positions()
    if len(ta) == 0 or len(tb) == 0:
        return np.zeros(0), np.zeros(0)
    if extra_times is None and len(ta) == len(tb) and np.array_equal(ta, tb):
        return ta, np.linalg.norm(pa - pb, axis=1)
    start, stop = max(ta[0], tb[0]), min(ta[-1], tb[-1])
    times = np.union1d(ta, tb)
    if extra_times is not None:
        times = np.union1d(times, extra_times)
    times = times[(times >= start) & (times <= stop)]

    def at(t: np.ndarray, p: np.ndarray) -> np.ndarray:
        return np.column_stack([np.interp(times, t, p[:, 0]), np.interp(times, t, p[:, 1])])

    return times, np.linalg.norm(at(ta, pa) - at(tb, pb), axis=1)


def clearance_over_time(
    log: TrialLog, footprints: dict[str, float] | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """(times, smallest clearance between any two robots' footprint discs at each time);
    without footprints, the smallest centre distance. Times are every robot's sample times;
    a pair counts where both robots were logged (NaN where no pair was)."""
    names = list(log.robots)
    radii = {n: 0.0 for n in names} if footprints is None else footprints
    times = np.unique(np.concatenate(
        [np.asarray(r.time, float) for r in log.robots.values()] or [np.zeros(0)]
    ))
    smallest = np.full(len(times), np.inf)
    for a_index, a in enumerate(names):
        for b in names[a_index + 1:]:
            pair_times, gaps = _pair_gaps(log.robots[a], log.robots[b], times)
            index = np.searchsorted(times, pair_times)
            smallest[index] = np.minimum(smallest[index], gaps - radii[a] - radii[b])
    return times, np.where(np.isfinite(smallest), smallest, np.nan)


def plant_clearance_over_time(log: TrialLog) -> tuple[np.ndarray, np.ndarray]:
    """(times, smallest footprint clearance) per plant step at the plant's substeps
    (offline runs; empty arrays for a run of the ROS graph)."""
    return (np.array([c.time for c in log.plant_clearance], float),
            np.array([c.clearance for c in log.plant_clearance], float))


def trial_metrics(
    log: TrialLog,
    region: ConvexRegion,
    density: Density,
    footprints: dict[str, float] | None = None,
    held: HeldCells | None = None,
) -> dict[str, Any]:
    """outcome (settled / stuck / duration reached) and its time, final_cost, the CVT gap
    (and, with `held`, the buffered cells of a keep-apart run, the held CVT gap),
    final_largest_distance_to_centroid, generations, the reason of each opening and the
    times of density updates, limit_violations, solver_failures, keep_apart_brakes (ticks
    braked for want of the neighbours' positions, not solver failures),
    solve-time statistics and the opening costs."""
    names = list(log.robots)
    final = np.array([log.robots[n].positions()[-1] for n in names])
    to_centroid, final_cost = distances_to_centroids(final, region, density)
    solve = {}
    for name in names:
        times = log.robots[name].solve_times()
        solve[name] = {
            "solves": len(times),
            "median_s": float(np.median(times)) if len(times) else None,
            "p95_s": float(np.percentile(times, 95)) if len(times) else None,
            "max_s": float(np.max(times)) if len(times) else None,
        }
    return {
        "mission": log.mission_name,
        "seed": log.seed,
        "simulated_time_s": float(log.time[-1]) if log.time else 0.0,
        "duration_s": log.duration,
        "outcome": log.outcome,
        "settled": log.settled_time is not None,
        "settled_time_s": log.settled_time,
        "stuck_time_s": log.stuck_time,
        "final_cost": final_cost,
        **cvt_gap(final, region, density),
        "keep_apart": held is not None,
        **(held_cvt_gap(final, names, region, density, held) if held is not None else {}),
        "final_largest_distance_to_centroid_m": float(np.max(to_centroid)),
        "final_distance_to_centroid_m": {
            n: float(d) for n, d in zip(names, to_centroid, strict=True)
        },
        "generations": len(log.openings),
        "opening_costs": [o.cost for o in log.openings],
        "opening_reasons": [o.reason for o in log.openings],
        # Times of the generations a new density started (cost may jump there).
        "density_update_times_s": [o.time for o in log.openings if o.reason == "density"],
        "limit_violations": len(log.violations),
        "solver_failures": sum(log.robots[n].solver_failures() for n in names),
        "keep_apart_brakes": sum(log.robots[n].keep_apart_brakes() for n in names),
        **closest_approach(log, footprints),
        "solve_time": solve,
        "wall_time_s": log.wall_time,
    }
