"""Time the partition on a raster density against a plain labelling baseline, same run.

Scenario (invented): an orchard frost-watch block of 256 m x 256 m, a 512 x 512 raster of
frost risk (0.5 m cells: a cold-air drainage ridge plus a few frost pockets), a convex
block boundary inside the raster, 100 robots at random positions.
Fleet scale: the same block as a 1024 x 1024 raster (0.25 m cells) with 1000 robots;
method and baseline as below, timed in the same run (target: method at least 20x faster
than the plain labelling). Its accuracy lines compare against the plain labelling only
(an 8 x 8 sub-sampled reference would take minutes at that size).

- method:   coverage_fleet.geometry.partition.compute_partition (bounded Voronoi cells by
            half-plane clipping; raster moments from per-row prefix sums, exact for the
            piecewise-constant field: masses, centroids and polar moments).
- baseline: label every raster cell centre inside the block with its nearest robot
            (scipy.spatial.cKDTree query), then np.bincount for masses and centroids.
            The in-block cell centres and weights are prepared once, outside the timing.
- accuracy: both against a reference that labels an 8 x 8 sub-grid of every raster cell
            (64x finer sampling of the same piecewise-constant field; its own error is of
            the order of 1/8 cell at the cell boundaries).

- accuracy-matched baseline: the same labelling on a 4 x 4 sub-grid of every cell (16x the
            points), the cheapest labelling whose centroid error approaches the method's;
            timed with fewer repeats, and printed with its error, so the ratio "at equal
            accuracy" can be read off beside the plain one.

Prints medians, their ratio (target: method at least 10x faster at equal accuracy) and the
largest centroid differences, and the load average, since the machine may be shared.
Single-threaded on both sides; method and baseline alternate within each repeat, so a
burst of load elsewhere hits both. The first call compiles the partition's numba loops
(or loads them from numba's cache); the warm-up keeps that out of the timing.
Run: .venv/bin/python benchmarks/partition_benchmark.py [--scale small|fleet|both]
"""

from __future__ import annotations

import argparse
import os
import statistics
import time

import numpy as np
from scipy.spatial import cKDTree

from coverage_fleet.geometry.density import RasterDensity
from coverage_fleet.geometry.partition import compute_partition
from coverage_fleet.geometry.region import ConvexRegion

SIZE = 512
RESOLUTION = 0.5  # metres per cell
AGENTS = 100
REPEATS = 15
FLEET_SIZE = 1024
FLEET_RESOLUTION = 0.25
FLEET_AGENTS = 1000
FLEET_REPEATS = 9
SUPERSAMPLE = 8
MATCHED_SUBSAMPLE = 4
MATCHED_REPEATS = 5


def frost_risk_raster(size: int = SIZE, resolution: float = RESOLUTION) -> np.ndarray:
    """Invented frost risk: a diagonal cold-air drainage band, three frost pockets, and
    cell-to-cell noise (so the raster is not smooth at the cell scale). Row 0 = south."""
    rng = np.random.default_rng(7)
    centres = (np.arange(size) + 0.5) * resolution
    x, y = np.meshgrid(centres, centres)
    field = 0.2 + np.exp(-(((x - y) / 40.0) ** 2))
    for cx, cy, s, w in ((60, 180, 12, 2.0), (190, 70, 20, 1.5), (150, 200, 8, 3.0)):
        field += w * np.exp(-((x - cx) ** 2 + (y - cy) ** 2) / (2 * s * s))
    return field * rng.uniform(0.8, 1.2, size=field.shape)


REGION_VERTICES = [[8, 4], [240, 12], [252, 150], [200, 250], [30, 244], [4, 120]]


def labelling(points: np.ndarray, weights: np.ndarray, agents: np.ndarray
              ) -> tuple[np.ndarray, np.ndarray]:
    """Baseline: nearest agent of every sample point, then sums by label."""
    _, label = cKDTree(agents).query(points)
    n = len(agents)
    mass = np.bincount(label, weights=weights, minlength=n)
    cx = np.bincount(label, weights=weights * points[:, 0], minlength=n)
    cy = np.bincount(label, weights=weights * points[:, 1], minlength=n)
    return mass, np.column_stack([cx, cy]) / mass[:, None]


def median_seconds(action, repeats: int) -> float:
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        action()
        times.append(time.perf_counter() - start)
    return statistics.median(times)


def alternating_medians(first, second, repeats: int) -> tuple[float, float]:
    """Median wall time of two actions run in turn, so both see the same machine load."""
    times: tuple[list[float], list[float]] = ([], [])
    for _ in range(repeats):
        for action, record in ((first, times[0]), (second, times[1])):
            start = time.perf_counter()
            action()
            record.append(time.perf_counter() - start)
    return statistics.median(times[0]), statistics.median(times[1])


def load_line() -> str:
    one, five, _ = os.getloadavg()
    return f"load average {one:.1f} (1 min), {five:.1f} (5 min) on {os.cpu_count()} cores"


def fleet_scale() -> None:
    """1000 robots on a 1024 x 1024 raster: method against the plain labelling."""
    values = frost_risk_raster(FLEET_SIZE, FLEET_RESOLUTION)
    density = RasterDensity(values, origin=[0.0, 0.0], resolution=FLEET_RESOLUTION)
    region = ConvexRegion.from_vertices(REGION_VERTICES, source="benchmark")
    rng = np.random.default_rng(11)
    low, high = np.array(region.bounds[:2]), np.array(region.bounds[2:])
    candidates = rng.uniform(low, high, size=(10 * FLEET_AGENTS, 2))
    agents = candidates[region.contains(candidates)][:FLEET_AGENTS]
    centres = (np.arange(FLEET_SIZE) + 0.5) * FLEET_RESOLUTION
    cx, cy = np.meshgrid(centres, centres)
    all_points = np.column_stack([cx.ravel(), cy.ravel()])
    inside = region.contains(all_points)
    points = all_points[inside]
    weights = values.ravel()[inside] * FLEET_RESOLUTION**2

    compute_partition(agents, region, density)  # warm-up (numba cache, imports)
    labelling(points, weights, agents)
    method_s, baseline_s = alternating_medians(
        lambda: compute_partition(agents, region, density),
        lambda: labelling(points, weights, agents), FLEET_REPEATS)
    result = compute_partition(agents, region, density)
    base_mass, base_centroids = labelling(points, weights, agents)
    total = density.mass_in(region)
    print(f"partition benchmark, fleet scale: {len(agents)} agents, {FLEET_SIZE}x{FLEET_SIZE} "
          f"raster ({FLEET_RESOLUTION} m cells), {FLEET_REPEATS} repeats alternating, "
          f"median wall time; {load_line()}")
    print(f"{'method':<64}{'median ms':>12}")
    print(f"{'compute_partition (cells; exact masses, centroids, polar moments)':<64}"
          f"{method_s * 1e3:>12.2f}")
    print(f"{'labelling baseline (cKDTree query + bincount)':<64}{baseline_s * 1e3:>12.2f}")
    print(f"{'speed-up (baseline / method; target 20x)':<64}{baseline_s / method_s:>12.1f}x")
    print(f"{'centroid difference, method vs baseline (m, largest)':<64}"
          f"{float(np.max(np.linalg.norm(result.centroids - base_centroids, axis=1))):>12.4f}")
    print(f"{'cell masses summed vs the region mass, relative (method)':<64}"
          f"{abs(result.masses.sum() - total) / total:>12.1e}")
    print(f"{'cell masses summed vs the region mass, relative (baseline)':<64}"
          f"{abs(base_mass.sum() - total) / total:>12.1e}")
    print()


def small_scale() -> None:
    values = frost_risk_raster()
    density = RasterDensity(values, origin=[0.0, 0.0], resolution=RESOLUTION)
    region = ConvexRegion.from_vertices(REGION_VERTICES, source="benchmark")
    rng = np.random.default_rng(11)
    low, high = np.array(region.bounds[:2]), np.array(region.bounds[2:])
    candidates = rng.uniform(low, high, size=(10 * AGENTS, 2))
    agents = candidates[region.contains(candidates)][:AGENTS]

    centres = (np.arange(SIZE) + 0.5) * RESOLUTION
    cx, cy = np.meshgrid(centres, centres)
    all_points = np.column_stack([cx.ravel(), cy.ravel()])
    inside = region.contains(all_points)
    points = all_points[inside]
    weights = values.ravel()[inside] * RESOLUTION**2

    compute_partition(agents, region, density)  # warm-up (first-call imports, caches)
    labelling(points, weights, agents)
    method_s, baseline_s = alternating_medians(
        lambda: compute_partition(agents, region, density),
        lambda: labelling(points, weights, agents), REPEATS)

    result = compute_partition(agents, region, density)
    base_mass, base_centroids = labelling(points, weights, agents)

    # Reference: 8 x 8 sub-samples per raster cell, each carrying 1/64 of the cell's mass.
    offsets = (np.arange(SUPERSAMPLE) + 0.5) / SUPERSAMPLE - 0.5
    ox, oy = np.meshgrid(offsets * RESOLUTION, offsets * RESOLUTION)
    fine = (all_points[:, None, :] + np.column_stack([ox.ravel(), oy.ravel()])[None]
            ).reshape(-1, 2)
    fine_weights = np.repeat(values.ravel() * RESOLUTION**2 / SUPERSAMPLE**2,
                             SUPERSAMPLE**2)
    fine_inside = region.contains(fine)
    ref_mass, ref_centroids = labelling(fine[fine_inside], fine_weights[fine_inside], agents)

    def subsampled(factor: int) -> tuple[np.ndarray, np.ndarray]:
        steps = (np.arange(factor) + 0.5) / factor - 0.5
        sx, sy = np.meshgrid(steps * RESOLUTION, steps * RESOLUTION)
        pts = (all_points[:, None, :] + np.column_stack([sx.ravel(), sy.ravel()])[None]
               ).reshape(-1, 2)
        w = np.repeat(values.ravel() * RESOLUTION**2 / factor**2, factor**2)
        keep = region.contains(pts)
        return pts[keep], w[keep]

    matched_points, matched_weights = subsampled(MATCHED_SUBSAMPLE)
    matched_s = median_seconds(
        lambda: labelling(matched_points, matched_weights, agents), MATCHED_REPEATS)
    _, matched_centroids = labelling(matched_points, matched_weights, agents)

    def largest(a: np.ndarray, b: np.ndarray) -> float:
        return float(np.max(np.linalg.norm(a - b, axis=1)))

    def largest_relative(a: np.ndarray, b: np.ndarray) -> float:
        return float(np.max(np.abs(a - b) / b))

    rows = [
        ("compute_partition (cells; exact masses, centroids, polar moments)", method_s),
        ("labelling baseline (cKDTree query + bincount)", baseline_s),
        (f"labelling on {MATCHED_SUBSAMPLE}x{MATCHED_SUBSAMPLE} sub-samples per cell "
         f"({MATCHED_REPEATS} repeats)", matched_s),
    ]
    print(f"partition benchmark: {len(agents)} agents, {SIZE}x{SIZE} raster "
          f"({RESOLUTION} m cells), {REPEATS} repeats alternating, median wall time; "
          f"{load_line()}")
    print(f"{'method':<64}{'median ms':>12}")
    for name, seconds in rows:
        print(f"{name:<64}{seconds * 1e3:>12.2f}")
    print(f"{'speed-up (baseline / method)':<64}{baseline_s / method_s:>12.1f}x")
    print(f"{'speed-up at closer accuracy (sub-sampled labelling / method)':<64}"
          f"{matched_s / method_s:>12.1f}x")
    print()
    print(f"{'accuracy (metres; one raster cell = ' + str(RESOLUTION) + ' m)':<64}"
          f"{'largest':>12}")
    print(f"{'centroid difference, method vs baseline':<64}"
          f"{largest(result.centroids, base_centroids):>12.4f}")
    print(f"{'centroid error vs 8x8 sub-sampled reference, method':<64}"
          f"{largest(result.centroids, ref_centroids):>12.4f}")
    print(f"{'centroid error vs 8x8 sub-sampled reference, baseline':<64}"
          f"{largest(base_centroids, ref_centroids):>12.4f}")
    grid = f"{MATCHED_SUBSAMPLE}x{MATCHED_SUBSAMPLE}"
    matched_label = f"centroid error vs 8x8 sub-sampled reference, {grid} labelling"
    print(f"{matched_label:<64}"
          f"{largest(matched_centroids, ref_centroids):>12.4f}")
    print(f"{'relative mass error vs reference, method':<64}"
          f"{largest_relative(result.masses, ref_mass):>12.2e}")
    print(f"{'relative mass error vs reference, baseline':<64}"
          f"{largest_relative(base_mass, ref_mass):>12.2e}")
    print("(the method integrates the piecewise-constant raster exactly: its 'error' above is")
    print(" the sub-sampled reference's own; the baseline's is its cell-centre labelling)")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--scale", choices=("small", "fleet", "both"), default="both")
    scale = parser.parse_args().scale
    if scale in ("fleet", "both"):
        fleet_scale()
    if scale in ("small", "both"):
        small_scale()


if __name__ == "__main__":
    main()
