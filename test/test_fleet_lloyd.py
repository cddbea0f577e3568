"""Lloyd's algorithm against published centroidal Voronoi configurations."""

from __future__ import annotations

import math

import numpy as np
import pytest

from coverage_fleet.fleet.lloyd import lloyd
from coverage_fleet.geometry.density import (
    GaussianBump,
    GaussianBumpsDensity,
    RasterDensity,
    UniformDensity,
)
from coverage_fleet.geometry.polygon import uniform_moments
from coverage_fleet.geometry.region import ConvexRegion

UNIT_SQUARE = ConvexRegion.from_vertices([[0, 0], [1, 0], [1, 1], [0, 1]])
UNIFORM = UniformDensity()


def assert_non_increasing(costs: np.ndarray, relative: float) -> None:
    """Lloyd never raises H (Lloyd, "Least squares quantization in PCM", IEEE Trans.
    Information Theory 28(2), 1982; Du, Faber & Gunzburger, SIAM Review 41(4), 1999,
    sec. 5.2), up to the stated integration accuracy."""
    rises = np.diff(costs)
    assert np.all(rises <= relative * costs[:-1]), rises.max()


def test_four_agents_on_the_unit_square_reach_quarter_centres() -> None:
    """Uniform density, four agents: the CVT is the four quarter squares. Cost there:
    each quarter square of side 1/2 has polar moment about its centre
    (1/2)(1/2)((1/4)+(1/4))/12 = 1/96 (rectangle b*h*(b^2+h^2)/12, standard engineering
    handbook formula), times 4 = 1/24."""
    start = np.array([[0.1, 0.2], [0.9, 0.1], [0.3, 0.7], [0.6, 0.95]])
    result = lloyd(start, UNIT_SQUARE, UNIFORM, max_iterations=200, tolerance=1e-10)
    assert result.converged
    centres = np.array([[0.25, 0.25], [0.75, 0.25], [0.25, 0.75], [0.75, 0.75]])
    final = result.positions[-1]
    # Agent i ends in the quarter it started nearest to, here the same order.
    np.testing.assert_allclose(final, centres, atol=1e-8)
    assert result.costs[-1] == pytest.approx(1 / 24, rel=1e-9)
    assert result.costs[0] > 1 / 24
    assert_non_increasing(result.costs, 1e-12)


def test_one_dimensional_cvt_on_a_thin_strip() -> None:
    """Uniform density on [0, 1]: the n-generator CVT has generators at (2i - 1)/(2n)
    (Du, Faber & Gunzburger, "Centroidal Voronoi tessellations: applications and
    algorithms", SIAM Review 41(4), 1999, sec. 2.1). A 1 x 0.001 strip with agents on its
    centre line is that problem: bisectors are vertical, so only x matters."""
    n = 5
    rng = np.random.default_rng(4)
    x = np.sort(rng.uniform(0.02, 0.98, size=n))
    strip = ConvexRegion.from_vertices([[0, 0], [1, 0], [1, 0.001], [0, 0.001]])
    start = np.column_stack([x, np.full(n, 0.0005)])
    result = lloyd(start, strip, UNIFORM, max_iterations=2000, tolerance=1e-11)
    assert result.converged
    expected = (2 * np.arange(1, n + 1) - 1) / (2 * n)
    np.testing.assert_allclose(result.positions[-1, :, 0], expected, atol=1e-8)
    np.testing.assert_allclose(result.positions[-1, :, 1], 0.0005, atol=1e-12)
    assert_non_increasing(result.costs, 1e-12)


def jittered_hex_grid(count_hint: int, rng: np.random.Generator) -> np.ndarray:
    """A hexagonal lattice filling the unit square with about count_hint points, each
    nudged by 10 % of the spacing: a good start, so a few dozen iterations suffice."""
    spacing = math.sqrt(2.0 / (math.sqrt(3.0) * count_hint))
    row_gap = spacing * math.sqrt(3.0) / 2.0
    points = [
        ((c + 0.25 + 0.5 * (r % 2)) * spacing, (r + 0.5) * row_gap)
        for r in range(int(1.0 / row_gap) + 1)
        for c in range(int(1.0 / spacing) + 1)
    ]
    grid = np.array([p for p in points if p[0] < 1.0 and p[1] < 1.0])
    return np.clip(grid + rng.normal(scale=0.1 * spacing, size=grid.shape), 0.001, 0.999)


def test_many_agents_interior_cells_approach_the_regular_hexagon() -> None:
    """For many generators the optimal planar quantiser's cells are regular hexagons
    (Fejes Toth's theorem; Conway & Sloane, "Sphere Packings, Lattices and Groups",
    3rd ed., 1999, ch. 2 sec. 3 and ch. 21): normalised second moment
    G = J_c / (2 A^2) = 5 / (36 sqrt 3) = 0.0801875 (J_c: polar moment about the
    centroid, A: area). Tolerances for finite N: only cells not touching the square's
    boundary count (boundary cells are cut by the edges and are squarer, up to the
    square's 1/12 = 0.0833); their mean G within 0.5 % of the hexagon, every one within
    3 % (lattice defects left by the square's boundary)."""
    rng = np.random.default_rng(1)
    start = jittered_hex_grid(215, rng)
    assert len(start) >= 200
    result = lloyd(start, UNIT_SQUARE, UNIFORM, max_iterations=30, tolerance=1e-9)
    assert_non_increasing(result.costs, 1e-12)
    hexagon = 5.0 / (36.0 * math.sqrt(3.0))
    final = result.final
    normalised = []
    for cell, centroid in zip(final.cells, final.centroids, strict=True):
        if np.any((cell < 1e-9) | (cell > 1 - 1e-9)):
            continue
        area, _, polar = uniform_moments(cell, centroid)
        normalised.append(polar / (2.0 * area * area))
    normalised = np.array(normalised)
    assert len(normalised) >= 120
    assert np.mean(normalised) == pytest.approx(hexagon, rel=5e-3)
    assert np.all(np.abs(normalised / hexagon - 1.0) < 0.03)
    # Before Lloyd the jittered lattice is measurably farther from the hexagon optimum.
    assert result.costs[-1] < result.costs[0]


def test_narrow_gaussian_one_agent_goes_to_the_mean_in_one_step() -> None:
    """One agent owns the whole region, so its centroid is the density's mean; a bump far
    narrower than the region has that mean (property of the normal distribution)."""
    mean = np.array([0.62, 0.31])
    density = GaussianBumpsDensity([GaussianBump(1.0, mean, np.eye(2) * 1e-4)])
    result = lloyd(np.array([[0.1, 0.9]]), UNIT_SQUARE, density, tolerance=1e-9)
    np.testing.assert_allclose(result.positions[1, 0], mean, atol=1e-9)
    assert result.converged and result.iterations == 1
    # H at the mean is the bump's trace(cov) * weight: 2e-4.
    assert result.costs[-1] == pytest.approx(2e-4, rel=1e-6)


def test_gaussian_and_raster_densities_lower_the_cost_monotonically() -> None:
    rng = np.random.default_rng(6)
    start = rng.uniform(0.05, 0.95, size=(12, 2))
    bumps = GaussianBumpsDensity(
        [GaussianBump(1.0, np.array([0.3, 0.3]), np.diag([0.01, 0.02])),
         GaussianBump(0.5, np.array([0.8, 0.7]), np.array([[0.02, 0.01], [0.01, 0.02]]))],
        background=0.05)
    result = lloyd(start, UNIT_SQUARE, bumps, max_iterations=40, tolerance=1e-9)
    assert_non_increasing(result.costs, 1e-8)  # rounding of the moments
    assert result.costs[-1] < 0.7 * result.costs[0]
    # The agents gather where the mass is: more of them nearer the heavier bump.
    near_heavy = np.linalg.norm(result.positions[-1] - [0.3, 0.3], axis=1) < 0.3
    near_light = np.linalg.norm(result.positions[-1] - [0.8, 0.7], axis=1) < 0.3
    assert near_heavy.sum() > near_light.sum()

    centres = (np.arange(64) + 0.5) / 64
    x, y = np.meshgrid(centres, centres)
    raster = RasterDensity(1.0 + 3.0 * x * y, origin=[0, 0], resolution=1 / 64)
    result = lloyd(start, UNIT_SQUARE, raster, max_iterations=15, tolerance=1e-9)
    # Smooth raster: scanline error well below the cost decrease per step here.
    assert_non_increasing(result.costs, 1e-6)
    assert result.costs[-1] < result.costs[0]


def test_zero_iterations_and_bad_arguments() -> None:
    start = np.array([[0.2, 0.2], [0.8, 0.8]])
    result = lloyd(start, UNIT_SQUARE, UNIFORM, max_iterations=0)
    assert result.iterations == 0 and not result.converged
    with pytest.raises(ValueError, match="max_iterations"):
        lloyd(start, UNIT_SQUARE, UNIFORM, max_iterations=-1)
    with pytest.raises(ValueError, match="tolerance"):
        lloyd(start, UNIT_SQUARE, UNIFORM, tolerance=float("nan"))
