"""Densities: Gaussian moments against scipy.integrate, raster
scanline moments against exact cell-by-cell clipping with shapely, the PGM reader against
Pillow, and the configuration errors the mission loader relies on."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
import shapely
from PIL import Image
from scipy import integrate

from coverage_fleet.errors import ConfigError
from coverage_fleet.geometry.density import (
    GaussianBump,
    GaussianBumpsDensity,
    RasterDensity,
    UniformDensity,
    density_from_config,
    load_raster_values,
)
from coverage_fleet.geometry.partition import compute_partition, voronoi_cells
from coverage_fleet.geometry.polygon import uniform_moments
from coverage_fleet.geometry.region import ConvexRegion

SQUARE = ConvexRegion.from_vertices([[0, 0], [4, 0], [4, 3], [0, 3]])


# --- Gaussian bumps ---------------------------------------------------------------------


def one_d(f, low: float, high: float) -> float:
    value, _ = integrate.quad(f, low, high, epsabs=0.0, epsrel=1e-13, limit=200)
    return value


@pytest.mark.parametrize(
    ("sigma_x", "sigma_y", "mean"),
    [
        (0.3, 0.5, (1.1, 2.2)),
        (2.0, 1.5, (1.1, 2.2)),
        (0.05, 0.08, (1.1, 2.2)),
        (0.7, 0.4, (2.0, 0.0)),  # the mean on an edge of the rectangle
        (0.7, 0.4, (4.0, 3.0)),  # the mean on a corner
        (0.6, 0.2, (5.5, 1.0)),  # the mean outside, the bump partly in
    ],
)
def test_gaussian_moments_on_a_rectangle_match_scipy_quad(sigma_x, sigma_y, mean) -> None:
    """Axis-aligned bump: the moments factorise into 1-D integrals, computed with
    scipy.integrate.quad (QUADPACK) as the reference. The closed form
    (geometry/gaussian_moments.py) agrees to 1e-12; the quadrature it replaced was good to
    1e-9 (worst seen 6e-10). A mean on an edge or a corner puts an edge's line through the
    origin of the whitened coordinates (h = 0 there)."""
    mean = np.array(mean, dtype=float)
    weight = 3.0
    density = GaussianBumpsDensity([GaussianBump(weight, mean, np.diag([sigma_x**2,
                                                                        sigma_y**2]))])
    agent = np.array([2.5, 1.0])

    def pdf(t, mu, s):
        return math.exp(-0.5 * ((t - mu) / s) ** 2) / (s * math.sqrt(2 * math.pi))

    x0 = one_d(lambda t: pdf(t, mean[0], sigma_x), 0, 4)
    y0 = one_d(lambda t: pdf(t, mean[1], sigma_y), 0, 3)
    x1 = one_d(lambda t: (t - agent[0]) * pdf(t, mean[0], sigma_x), 0, 4)
    y1 = one_d(lambda t: (t - agent[1]) * pdf(t, mean[1], sigma_y), 0, 3)
    x2 = one_d(lambda t: (t - agent[0]) ** 2 * pdf(t, mean[0], sigma_x), 0, 4)
    y2 = one_d(lambda t: (t - agent[1]) ** 2 * pdf(t, mean[1], sigma_y), 0, 3)
    got = density.moments([SQUARE.vertices], agent[None])
    assert got.mass[0] == pytest.approx(weight * x0 * y0, rel=1e-12)
    np.testing.assert_allclose(got.first[0], weight * np.array([x1 * y0, x0 * y1]),
                               rtol=1e-12, atol=1e-15)
    assert got.polar[0] == pytest.approx(weight * (x2 * y0 + x0 * y2), rel=1e-12)


def test_correlated_gaussian_on_a_triangle_matches_scipy_dblquad() -> None:
    """Rotated covariance over the triangle (0,0), (3,0), (1,2): reference
    scipy.integrate.dblquad over the two x-ranges where the upper edge is one line."""
    cov = np.array([[0.5, 0.3], [0.3, 0.4]])
    mean = np.array([1.2, 0.6])
    density = GaussianBumpsDensity([GaussianBump(1.0, mean, cov)], background=0.1)
    inverse = np.linalg.inv(cov)
    norm = 1.0 / (2 * math.pi * math.sqrt(np.linalg.det(cov)))
    agent = np.array([0.5, 0.5])

    def phi(y, x):
        d = np.array([x, y]) - mean
        return 0.1 + norm * math.exp(-0.5 * d @ inverse @ d)

    def over_triangle(g) -> float:
        left, _ = integrate.dblquad(lambda y, x: g(y, x) * phi(y, x), 0, 1, 0,
                                    lambda x: 2 * x, epsabs=1e-13, epsrel=1e-12)
        right, _ = integrate.dblquad(lambda y, x: g(y, x) * phi(y, x), 1, 3, 0,
                                     lambda x: 3 - x, epsabs=1e-13, epsrel=1e-12)
        return left + right

    mass = over_triangle(lambda y, x: 1.0)
    fx = over_triangle(lambda y, x: x - agent[0])
    polar = over_triangle(lambda y, x: (x - agent[0]) ** 2 + (y - agent[1]) ** 2)
    got = density.moments([np.array([[0, 0], [3, 0], [1, 2]], dtype=float)], agent[None])
    assert got.mass[0] == pytest.approx(mass, rel=1e-11)
    assert got.first[0, 0] == pytest.approx(fx, rel=1e-11)
    assert got.polar[0] == pytest.approx(polar, rel=1e-11)


@pytest.mark.parametrize(
    ("low", "side"), [((3.0, 0.2), 0.01), ((2.5, 1.1), 0.001), ((2.0, 0.7), 0.05)]
)
def test_small_cell_far_from_a_bump_keeps_its_relative_precision(low, side) -> None:
    """Cells of 1 mm to 5 cm, 4-6 standard deviations from a bump, no background: their
    mass is 1e-7 to 1e-13 of the bump's, so terms of the bump's own size that cancel would
    leave errors of 1e-5 of it (measured before geometry/gaussian_moments.py took the
    winding number whole and Owen's identity for edges pointing at the bump) and a
    centroid anywhere. Reference: the bump is isotropic, so the moments factorise into
    1-D integrals (scipy.integrate.quad, QUADPACK), as in the rectangle test above."""
    sigma = 0.5
    density = GaussianBumpsDensity([GaussianBump(1.0, np.zeros(2), np.eye(2) * sigma**2)])
    low = np.array(low)
    square = low + side * np.array([[0, 0], [1, 0], [1, 1], [0, 1]], dtype=float)

    def pdf(t):
        return math.exp(-0.5 * (t / sigma) ** 2) / (sigma * math.sqrt(2 * math.pi))

    x0 = one_d(pdf, low[0], low[0] + side)
    y0 = one_d(pdf, low[1], low[1] + side)
    x1 = one_d(lambda t: (t - low[0]) * pdf(t), low[0], low[0] + side)
    got = density.moments([square], low[None])
    # abs=0: pytest.approx's default absolute tolerance (1e-12) would pass any mass here.
    assert got.mass[0] == pytest.approx(x0 * y0, rel=1e-9, abs=0.0)
    centroid = low + got.first[0] / got.mass[0]
    assert np.all(centroid > low) and np.all(centroid < low + side)
    # Measured: within 3e-7 of the side (the first moment about a point 2.7 m from the
    # bump's centre cancels terms 1e3 times its size); 3e-5 of it before.
    assert abs(centroid[0] - (low[0] + x1 / x0)) < 1e-6 * side


def test_gaussian_evaluate_is_the_normal_pdf() -> None:
    # Bivariate normal density formula (common practice), at the mean and one point off it.
    cov = np.array([[0.5, 0.3], [0.3, 0.4]])
    density = GaussianBumpsDensity([GaussianBump(2.0, np.zeros(2), cov)], background=0.25)
    d = np.array([0.3, -0.2])
    expected = 0.25 + 2.0 * math.exp(-0.5 * d @ np.linalg.inv(cov) @ d) / (
        2 * math.pi * math.sqrt(np.linalg.det(cov)))
    np.testing.assert_allclose(density.evaluate(np.array([d])), [expected], rtol=1e-12)


# --- raster -------------------------------------------------------------------------------


def exact_raster_moments(values, origin, h, polygon, about):
    """Reference for a piecewise-constant raster: clip every raster cell against the
    polygon with shapely (GEOS) and add up value x closed-form moments of each piece."""
    target = shapely.Polygon(polygon)
    rows, cols = values.shape
    mass, first, polar = 0.0, np.zeros(2), 0.0
    for r in range(rows):
        for c in range(cols):
            x0, y0 = origin[0] + c * h, origin[1] + r * h
            piece = target.intersection(shapely.box(x0, y0, x0 + h, y0 + h))
            if piece.is_empty or piece.area == 0.0:
                continue
            ring = np.array(shapely.geometry.polygon.orient(piece).exterior.coords)[:-1]
            m, f, p = uniform_moments(ring, about)
            mass += values[r, c] * m
            first += values[r, c] * f
            polar += values[r, c] * p
    return mass, first, polar


def test_constant_raster_reproduces_closed_form_polygon_moments() -> None:
    rng = np.random.default_rng(5)
    raster = RasterDensity(np.full((30, 40), 2.5), origin=[0.0, 0.0], resolution=0.1)
    agents = rng.uniform([0.2, 0.2], [3.8, 2.8], size=(12, 2))
    cells = voronoi_cells(agents, SQUARE)
    got = raster.moments(cells, agents)
    closed = UniformDensity(2.5).moments(cells, agents)
    np.testing.assert_allclose(got.mass, closed.mass, rtol=1e-11)
    np.testing.assert_allclose(got.first, closed.first, rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(got.polar, closed.polar, rtol=1e-10)


def test_random_raster_against_exact_clipping() -> None:
    """Noisy 30 x 40 raster (values 0.5..1.5 cell to cell): the scanline moments are the
    exact integrals of the piecewise-constant field, so they match cell-by-cell clipping
    to rounding (bounds 1e-10 relative, 1e-10 cells for centroids)."""
    rng = np.random.default_rng(8)
    h = 0.1
    values = rng.uniform(0.5, 1.5, size=(30, 40))
    origin = np.array([0.0, 0.0])
    raster = RasterDensity(values, origin=origin, resolution=h)
    agents = rng.uniform([0.2, 0.2], [3.8, 2.8], size=(6, 2))
    cells = voronoi_cells(agents, SQUARE)
    got = raster.moments(cells, agents)
    for i, cell in enumerate(cells):
        mass, first, polar = exact_raster_moments(values, origin, h, cell, agents[i])
        assert got.mass[i] == pytest.approx(mass, rel=1e-10)
        centroid_gap = np.linalg.norm(got.first[i] / got.mass[i] - first / mass)
        assert centroid_gap < 1e-10 * h
        assert got.polar[i] == pytest.approx(polar, rel=1e-10)
    # Cells tile the square, so the masses add up to the whole raster's mass.
    assert got.mass.sum() == pytest.approx(values.sum() * h * h, rel=1e-12)


def test_raster_far_from_the_map_origin_with_vertical_and_horizontal_edges() -> None:
    """A UTM-like origin (500 km east, 4000 km north) and a polygon with axis-parallel and
    oblique edges, partly outside the grid (zero there): still the exact integral."""
    rng = np.random.default_rng(9)
    h = 0.5
    origin = np.array([500_000.0, 4_000_000.0])
    values = rng.uniform(0.0, 2.0, size=(12, 16))
    raster = RasterDensity(values, origin=origin, resolution=h)
    polygon = origin + np.array([[1.0, -1.0], [9.0, -1.0], [9.0, 4.0], [6.3, 7.7], [1.0, 5.0]])
    about = origin + np.array([4.0, 2.0])
    got = raster.moments([polygon], about[None])
    mass, first, polar = exact_raster_moments(values, origin, h, polygon, about)
    assert got.mass[0] == pytest.approx(mass, rel=1e-9)
    np.testing.assert_allclose(got.first[0], first, rtol=1e-8, atol=1e-9 * mass)
    assert got.polar[0] == pytest.approx(polar, rel=1e-8)


def test_raster_beyond_its_grid_uses_fill_value() -> None:
    raster = RasterDensity(np.ones((10, 10)), origin=[0.0, 0.0], resolution=0.2, fill_value=3.0)
    region = ConvexRegion.from_vertices([[-1, 0], [2, 0], [2, 2], [-1, 2]])
    # Inside the grid (2 x 2 m at value 1) plus the strip x in [-1, 0] (2 m^2 at value 3).
    assert raster.mass_in(region) == pytest.approx(4.0 + 6.0, rel=1e-12)
    np.testing.assert_allclose(raster.evaluate(np.array([[0.5, 0.5], [-0.5, 0.5]])), [1, 3])
    plain = RasterDensity(np.ones((10, 10)), origin=[0.0, 0.0], resolution=0.2)
    assert plain.mass_in(region) == pytest.approx(4.0, rel=1e-12)
    # The partition sees the same field: cells straddling the grid's west edge add up.
    agents = np.array([[-0.5, 1.0], [0.3, 0.4], [1.5, 1.5], [0.1, 1.9]])
    result = compute_partition(agents, region, raster)
    assert result.masses.sum() == pytest.approx(10.0, rel=1e-12)


def test_raster_constructor_rejects_nonsense() -> None:
    with pytest.raises(ValueError, match="2-D"):
        RasterDensity(np.ones(4), origin=[0, 0], resolution=1.0)
    with pytest.raises(ValueError, match="non-negative"):
        RasterDensity(-np.ones((2, 2)), origin=[0, 0], resolution=1.0)
    with pytest.raises(ValueError, match="resolution"):
        RasterDensity(np.ones((2, 2)), origin=[0, 0], resolution=0.0)


def test_raster_cell_layout_rows_south_first_in_memory() -> None:
    values = np.array([[1.0, 2.0], [3.0, 4.0]])  # row 0 is the south row in memory
    raster = RasterDensity(values, origin=[10.0, 20.0], resolution=1.0)
    got = raster.evaluate(np.array([[10.5, 20.5], [11.5, 20.5], [10.5, 21.5], [11.5, 21.5]]))
    np.testing.assert_array_equal(got, [1, 2, 3, 4])


# --- files --------------------------------------------------------------------------------


@pytest.mark.parametrize("suffix", [".pgm", ".png"])
def test_images_8_and_16_bit_scale_to_full_scale(tmp_path: Path, suffix: str) -> None:
    """Images written by Pillow (PIL), a general-purpose image library; the full scale of
    an n-bit greyscale sample is 2**n - 1 (PNG specification, W3C 2003, section 12.5 sBIT
    and 4.1 image data; Netpbm PGM specification, netpbm.sourceforge.net/doc/pgm.html)."""
    rng = np.random.default_rng(2)
    small = rng.integers(0, 256, size=(7, 11), dtype=np.uint8)
    Image.fromarray(small).save(tmp_path / f"eight{suffix}")
    np.testing.assert_array_equal(load_raster_values(tmp_path / f"eight{suffix}"),
                                  small / 255.0)
    wide = rng.integers(0, 65536, size=(5, 9)).astype(np.uint16)
    Image.fromarray(wide).save(tmp_path / f"sixteen{suffix}")
    np.testing.assert_array_equal(load_raster_values(tmp_path / f"sixteen{suffix}"),
                                  wide / 65535.0)


def test_pgm_plain_ascii_with_comments(tmp_path: Path) -> None:
    # Layout from the Netpbm PGM specification (netpbm.sourceforge.net/doc/pgm.html),
    # comments in the header and a maxval other than 255: values are samples / maxval.
    (tmp_path / "plain.pgm").write_text(
        "P2\n# invented frost pocket\n4 2 # width height\n15\n0 3 7 15\n# row two\n1 2 3 4\n"
    )
    values = load_raster_values(tmp_path / "plain.pgm")
    np.testing.assert_allclose(values, [[0, 3 / 15, 7 / 15, 1.0], [1 / 15, 2 / 15, 3 / 15,
                                                                     4 / 15]])


@pytest.mark.parametrize(
    ("name", "content", "fragment"),
    [
        ("bad.pgm", b"P6\n1 1\n255\n\x00\x00\x00", "greyscale"),
        ("bad.pgm", b"P5\n4 4\n255\n\x00\x01", "cannot read it as a PGM"),
        ("bad.pgm", b"P5\n2 x\n255\n\x00\x00", "PGM"),
        ("bad.pgm", b"GIF89a", "not a PGM image"),
        ("bad.png", b"\x89PNG\r\n\x1a\n\x00", "PNG"),
    ],
)
def test_malformed_images_are_reported(tmp_path: Path, name: str, content: bytes,
                                       fragment: str) -> None:
    (tmp_path / name).write_bytes(content)
    with pytest.raises(ValueError, match=fragment):
        load_raster_values(tmp_path / name)


def test_colour_png_is_refused(tmp_path: Path) -> None:
    Image.fromarray(np.zeros((2, 2, 3), dtype=np.uint8)).save(tmp_path / "colour.png")
    with pytest.raises(ValueError, match=r"greyscale.*'RGB'"):
        load_raster_values(tmp_path / "colour.png")


def test_npy_and_csv_files_first_row_is_north(tmp_path: Path) -> None:
    grid = np.array([[5.0, 6.0], [1.0, 2.0]])  # as written: top row = north
    np.save(tmp_path / "risk.npy", grid)
    np.savetxt(tmp_path / "risk.csv", grid, delimiter=",", header="invented")
    for name in ("risk.npy", "risk.csv"):
        density = density_from_config(
            {"kind": "raster", "file": name, "origin": [0, 0], "resolution": 1.0},
            source="mission.yaml", base_dir=tmp_path)
        north_west, south_east = density.evaluate(np.array([[0.5, 1.5], [1.5, 0.5]]))
        assert (north_west, south_east) == (5.0, 2.0)


# --- configuration --------------------------------------------------------------------------


def config_problems(mapping, base_dir=None, region=None) -> list[str]:
    with pytest.raises(ConfigError) as info:
        density_from_config(mapping, source="mission.yaml", base_dir=base_dir, region=region)
    return [str(p) for p in info.value.problems]


def test_config_builds_each_kind(tmp_path: Path) -> None:
    assert isinstance(density_from_config({"kind": "uniform"}, "m.yaml"), UniformDensity)
    bumps = density_from_config(
        {"kind": "gaussian_bumps", "background": 0.1,
         "bumps": [{"weight": 2, "mean": [1, 1], "covariance": [[0.2, 0], [0, 0.3]]}]},
        "m.yaml", region=SQUARE)
    assert isinstance(bumps, GaussianBumpsDensity)
    raster = density_from_config(
        {"kind": "raster", "values": [[1, 2], [3, 4]], "origin": [0, 0], "resolution": 2.0,
         "scale": 0.5}, "m.yaml", region=SQUARE)
    assert isinstance(raster, RasterDensity)
    # North row first, scaled: (1, 2) is the north row.
    np.testing.assert_allclose(raster.evaluate(np.array([[1, 3], [3, 1]])), [0.5, 2.0])


def test_config_reports_every_problem_with_its_key() -> None:
    messages = config_problems({
        "kind": "gaussian_bumps", "background": -1, "colour": "red",
        "bumps": [
            {"weight": 0, "mean": [1, 1], "covariance": [[1, 0], [0, 1]]},
            {"weight": 1, "mean": [1], "covariance": [[1, 2], [2, 1]]},
            {"weight": 1, "mean": [1, 1], "covariance": [[1, 0.5], [0.2, 1]], "spread": 2},
            {"weight": 1},
        ],
    })
    expected = [
        "mission.yaml: density.colour: unknown key",
        "mission.yaml: density.background: must be at least 0",
        "mission.yaml: density.bumps[0].weight: must be greater than 0",
        "mission.yaml: density.bumps[1].mean: must be a list of 2 numbers (x, y in metres)",
        "mission.yaml: density.bumps[1].covariance: must be positive definite",
        "mission.yaml: density.bumps[2].spread: unknown key",
        "mission.yaml: density.bumps[2].covariance: must be symmetric",
        "mission.yaml: density.bumps[3].mean: is required",
        "mission.yaml: density.bumps[3].covariance: is required",
    ]
    for fragment in expected:
        assert any(m.startswith(fragment) for m in messages), (fragment, messages)
    assert len(messages) == len(expected)


@pytest.mark.parametrize(
    ("mapping", "fragment"),
    [
        ("uniform", "density: must be a mapping"),
        ({"kind": "fog"}, "density.kind: must be one of 'uniform', 'gaussian_bumps', 'raster'"),
        ({"kind": "uniform", "value": 0}, "density.value: must be greater than 0"),
        ({"kind": "uniform", "value": float("nan")}, "density.value: must be finite, got nan"),
        ({"kind": "uniform", "value": True}, "density.value: must be a number, got True"),
        ({"kind": "gaussian_bumps", "bumps": []}, "density.bumps: must be a non-empty list"),
        ({"kind": "raster", "origin": [0, 0], "resolution": 1}, "exactly one of 'file'"),
        ({"kind": "raster", "values": [[1, -1]], "origin": [0, 0], "resolution": 1},
         "density.values: raster values must be non-negative"),
        ({"kind": "raster", "values": [[1, float("inf")]], "origin": [0, 0], "resolution": 1},
         "density.values[0][1]: must be finite, got inf"),
        ({"kind": "raster", "values": [[1, 2], [3]], "origin": [0, 0], "resolution": 1},
         "density.values: must be"),
        ({"kind": "raster", "values": [[1]], "origin": [0, 0], "resolution": 0},
         "density.resolution: must be at least 0.001, got 0"),
        ({"kind": "raster", "values": [[1]], "resolution": 1}, "density.origin: is required"),
        ({"kind": "raster", "file": "missing.pgm", "origin": [0, 0], "resolution": 1},
         "density.file: file not found"),
        ({"kind": "raster", "file": "risk.tif", "origin": [0, 0], "resolution": 1},
         "density.file: file not found"),
    ],
)
def test_config_errors(tmp_path: Path, mapping, fragment: str) -> None:
    messages = config_problems(mapping, base_dir=tmp_path)
    assert any(fragment in m for m in messages), messages


def test_config_unknown_raster_file_type(tmp_path: Path) -> None:
    (tmp_path / "risk.tif").write_bytes(b"II*\x00")
    messages = config_problems({"kind": "raster", "file": "risk.tif", "origin": [0, 0],
                                "resolution": 1}, base_dir=tmp_path)
    assert any("unknown raster file type '.tif'" in m for m in messages), messages


def test_config_checks_against_the_region() -> None:
    small = {"kind": "raster", "values": [[1, 1], [1, 1]], "origin": [0, 0], "resolution": 1}
    messages = config_problems(small, region=SQUARE)
    assert any("the raster covers x 0..2, y 0..2 m but the region spans x 0..4, y 0..3 m"
               in m for m in messages), messages
    density_from_config({**small, "fill_value": 0.5}, "mission.yaml", region=SQUARE)
    zeros = {"kind": "raster", "values": [[0] * 4] * 3, "origin": [0, 0], "resolution": 1}
    assert any("no mass inside the region" in m for m in config_problems(zeros, region=SQUARE))
    far = {"kind": "gaussian_bumps",
           "bumps": [{"weight": 1, "mean": [100, 100], "covariance": [[1, 0], [0, 1]]}]}
    assert any("outside the region" in m for m in config_problems(far, region=SQUARE))


def test_raster_edges_through_grid_corners_and_along_grid_lines() -> None:
    """Edges that pass exactly through grid corners (a row and a column crossing at the
    same point), run along grid lines, or start on them: still the exact integral."""
    rng = np.random.default_rng(13)
    values = rng.uniform(0.0, 2.0, size=(9, 11))
    origin = np.array([0.0, 0.0])
    polygon = np.array([[1.0, 1.0], [6.0, 1.0], [9.0, 4.0], [9.0, 7.0], [4.0, 8.0],
                        [1.0, 5.0]])
    about = np.array([4.5, 3.5])
    raster = RasterDensity(values, origin=origin, resolution=1.0)
    got = raster.moments([polygon], about[None])
    mass, first, polar = exact_raster_moments(values, origin, 1.0, polygon, about)
    assert got.mass[0] == pytest.approx(mass, rel=1e-12)
    np.testing.assert_allclose(got.first[0], first, rtol=1e-11, atol=1e-12 * mass)
    assert got.polar[0] == pytest.approx(polar, rel=1e-11)


def test_raster_moments_do_not_depend_on_the_order_of_the_polygons() -> None:
    """The cells are integrated in a locality order of their own; each polygon's moments
    must come back in its own slot whatever order the caller used (common practice)."""
    rng = np.random.default_rng(14)
    raster = RasterDensity(rng.uniform(0.5, 1.5, size=(60, 80)), origin=[0, 0],
                           resolution=0.05)
    agents = rng.uniform([0.1, 0.1], [3.9, 2.9], size=(50, 2))
    cells = voronoi_cells(agents, SQUARE)
    straight = raster.moments(cells, agents)
    shuffle = rng.permutation(len(cells))
    shuffled = raster.moments([cells[i] for i in shuffle], agents[shuffle])
    np.testing.assert_allclose(shuffled.mass, straight.mass[shuffle], rtol=1e-13)
    np.testing.assert_allclose(shuffled.first, straight.first[shuffle], rtol=1e-12,
                               atol=1e-15)
    np.testing.assert_allclose(shuffled.polar, straight.polar[shuffle], rtol=1e-12)


def test_a_nanometre_wide_cell_far_east_keeps_its_centroid() -> None:
    """A cell 1 nm wide inside one raster column, 90 columns east of the grid's edge: phi
    is constant across it in x, so its centroid is its middle in x (common practice). The
    prefix sums from the west edge are ~1e5 times larger than the cell's own integrals;
    the per-row reference column keeps them from cancelling into the answer."""
    rng = np.random.default_rng(15)
    raster = RasterDensity(rng.uniform(0.5, 1.5, size=(40, 100)), origin=[-0.1, -0.05],
                           resolution=0.05)
    x0 = -0.1 + 90.3 * 0.05
    sliver = np.array([[x0, 0.0], [x0 + 1e-9, 0.0], [x0 + 1e-9, 0.7], [x0, 0.7]])
    got = raster.moments([sliver], np.array([[x0, 0.0]]))
    assert got.mass[0] > 0
    offset = got.first[0, 0] / got.mass[0]  # centroid, east of the cell's west side
    assert 0.0 < offset < 1e-9  # inside the cell (before: 14 nm off, outside it)
    assert abs(offset - 0.5e-9) < 1e-10  # within a tenth of its width of the middle
