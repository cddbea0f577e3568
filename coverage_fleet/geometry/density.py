"""Importance densities phi(q) >= 0 over the map plane, and their moments over convex cells.

Every density answers one batched question, `moments(polygons, about)`: per polygon the
mass, the first moment and the polar second moment about a point (the agent). That is all
the partition needs, and batching lets the raster density answer for all cells at once.

Three kinds, each with the integration that suits it:
- UniformDensity: exact closed-form polygon moments.
- GaussianBumpsDensity: background (exact) + bumps in closed form in each bump's whitened
  coordinates (Owen's T function and the normal distribution function over the cells'
  edges: geometry/gaussian_moments.py).
- RasterDensity: a piecewise-constant grid, integrated exactly from per-row prefix sums.

Raster layout (files and inline values alike): rows are listed north first, i.e. the first
row of the file is the largest y, like a map image (the ROS map_server convention); the
`origin` is the south-west corner of the south-west cell, in metres in the `map` frame.
In a mission whose region is given in longitude/latitude the corner may be given as
`origin_lonlat` instead: it is converted to the map frame like the region, and the grid's
columns run east and its rows north in the map frame (geometry/geodetic.py).
"""

from __future__ import annotations

import io
import math
from abc import ABC, abstractmethod
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from coverage_fleet.errors import ConfigError, Problem
from coverage_fleet.geometry.gaussian_moments import standard_normal_moments
from coverage_fleet.geometry.geodetic import LocalFrame, check_lonlat
from coverage_fleet.geometry.raster_moments import (
    boundary_sums,
    cell_table,
    locality_order,
)
from coverage_fleet.geometry.region import COORDINATE_MAX, ConvexRegion
from coverage_fleet.inputs.fields import (
    Collector,
    FieldReader,
    number_fault,
    number_text,
    required_message,
    type_message,
)
from coverage_fleet.inputs.reader import decode_text, read_bytes

#: A cell that lies wholly beyond +-BUMP_CUTOFF standard deviations of a bump along an axis
#: gets none of it (the mass left out is below 2 * erfc(8.5 / sqrt(2)) ~ 2e-17 of the
#: bump): exactly 0 rather than a sum of closed-form terms that cancel to rounding noise,
#: which would give a cell holding nothing else a centroid anywhere.
BUMP_CUTOFF = 8.5


@dataclass(frozen=True)
class CellMoments:
    """Per polygon i: mass = int phi, first = int (q - a_i) phi, polar = int ||q - a_i||^2 phi,
    with a_i the `about` point (the agent), so centroid = a_i + first / mass."""

    mass: np.ndarray
    first: np.ndarray
    polar: np.ndarray


class Density(ABC):
    """A non-negative importance density on the plane (units: 1 / m^2, any scale)."""

    @abstractmethod
    def evaluate(self, points: np.ndarray) -> np.ndarray:
        """phi at each point of an (M, 2) array."""

    @abstractmethod
    def moments(self, polygons: Sequence[np.ndarray], about: np.ndarray) -> CellMoments:
        """Moments of phi over each convex CCW polygon, about the matching row of `about`."""

    def mass_in(self, region: ConvexRegion) -> float:
        """Total mass of the density inside the region."""
        return float(self.moments([region.vertices], region.centroid[None, :]).mass[0])

    def check_region(self, region: ConvexRegion, source: str, key: str) -> list[Problem]:
        """Problems with using this density on `region` (empty list if none). The base check:
        some mass must lie inside, or no centroid would mean anything."""
        mass = self.mass_in(region)
        if not (np.isfinite(mass) and mass > 0.0):
            return [Problem(source, key, "the density has no mass inside the region")]
        return []


def _as_about(about: np.ndarray, count: int) -> np.ndarray:
    about = np.asarray(about, dtype=float).reshape(-1, 2)
    if len(about) != count:
        raise ValueError(f"need one 'about' point per polygon ({count}), got {len(about)}")
    return about


class UniformDensity(Density):
    """phi = value everywhere: every place matters equally."""

    def __init__(self, value: float = 1.0) -> None:
        self.value = float(value)

    def evaluate(self, points: np.ndarray) -> np.ndarray:
        return np.full(len(np.atleast_2d(points)), self.value)

    def moments(self, polygons: Sequence[np.ndarray], about: np.ndarray) -> CellMoments:
        """Closed-form polygon moments (polygon.uniform_moments), all polygons at once."""
        about = _as_about(about, len(polygons))
        count = len(polygons)
        mass = np.zeros(count)
        first = np.zeros((count, 2))
        polar = np.zeros(count)
        used = np.array([i for i, p in enumerate(polygons) if len(p) >= 3], dtype=np.int64)
        if len(used) == 0:
            return CellMoments(mass, first, polar)
        lengths = np.array([len(polygons[i]) for i in used])
        stop = np.cumsum(lengths)
        start = stop - lengths
        following = np.arange(stop[-1]) + 1
        following[stop - 1] = start
        local = np.concatenate([polygons[i] for i in used]) - np.repeat(about[used], lengths,
                                                                         axis=0)
        x, y = local[:, 0], local[:, 1]
        xn, yn = x[following], y[following]
        cross = x * yn - xn * y
        terms = np.stack([
            0.5 * cross,
            (x + xn) * cross / 6.0,
            (y + yn) * cross / 6.0,
            (x * x + x * xn + xn * xn + y * y + y * yn + yn * yn) * cross / 12.0,
        ])
        sums = np.add.reduceat(terms, start, axis=1) * self.value
        mass[used] = sums[0]
        first[used] = sums[1:3].T
        polar[used] = sums[3]
        return CellMoments(mass, first, polar)


@dataclass(frozen=True)
class GaussianBump:
    """weight * N(q; mean, covariance): `weight` is the bump's mass over the whole plane."""

    weight: float
    mean: np.ndarray
    covariance: np.ndarray


class GaussianBumpsDensity(Density):
    """phi(q) = background + sum_k weight_k * N(q; mean_k, cov_k): a few hot spots."""

    def __init__(self, bumps: Sequence[GaussianBump], background: float = 0.0) -> None:
        self.bumps = list(bumps)
        self.background = float(background)
        self._chol = [np.linalg.cholesky(b.covariance) for b in self.bumps]

    def evaluate(self, points: np.ndarray) -> np.ndarray:
        pts = np.atleast_2d(np.asarray(points, dtype=float))
        total = np.full(len(pts), self.background)
        for bump, chol in zip(self.bumps, self._chol, strict=True):
            z = np.linalg.solve(chol, (pts - bump.mean).T).T
            norm = bump.weight / (2.0 * math.pi * chol[0, 0] * chol[1, 1])
            total += norm * np.exp(-0.5 * np.einsum("ij,ij->i", z, z))
        return total

    def moments(self, polygons: Sequence[np.ndarray], about: np.ndarray) -> CellMoments:
        about = _as_about(about, len(polygons))
        count = len(polygons)
        if self.background > 0.0:
            base = UniformDensity(self.background).moments(polygons, about)
            mass, first, polar = base.mass.copy(), base.first.copy(), base.polar.copy()
        else:
            mass, first, polar = np.zeros(count), np.zeros((count, 2)), np.zeros(count)
        used = np.array([i for i, p in enumerate(polygons) if len(p) >= 3], dtype=np.int64)
        if len(used) == 0 or not self.bumps:
            return CellMoments(mass, first, polar)
        lengths = np.array([len(polygons[i]) for i in used])
        starts = np.cumsum(lengths) - lengths
        vertices = np.concatenate([polygons[i] for i in used])
        lows = np.minimum.reduceat(vertices, starts)
        highs = np.maximum.reduceat(vertices, starts)
        for bump, chol in zip(self.bumps, self._chol, strict=True):
            # Axis-aligned reach of the bump's cut-off: cells beyond it get nothing of it.
            reach = BUMP_CUTOFF * np.sqrt(np.diag(bump.covariance))
            near = ~(np.any(lows > bump.mean + reach, axis=1)
                     | np.any(highs < bump.mean - reach, axis=1))
            if not near.any():
                continue
            cells = used[near]
            # Whitened coordinates z = L^-1 (q - mean): the bump is the standard normal
            # there (det L > 0 keeps the polygons counter-clockwise), and
            # int f(q) N(q; mean, L L') dq = int f(mean + L z) phi(z) dz.
            picked = np.repeat(near, lengths)
            local = np.linalg.solve(chol, (vertices[picked] - bump.mean).T).T
            near_lengths = lengths[near]
            z_mass, z_first, z_second = standard_normal_moments(
                local, np.cumsum(near_lengths) - near_lengths, len(cells)
            )
            offset = bump.mean - about[cells]  # mean - a_i
            lifted = z_first @ chol.T  # L int z phi
            gram = chol.T @ chol
            mass[cells] += bump.weight * z_mass
            first[cells] += bump.weight * (offset * z_mass[:, None] + lifted)
            polar[cells] += bump.weight * (
                np.einsum("ij,ij->i", offset, offset) * z_mass
                + 2.0 * np.einsum("ij,ij->i", offset, lifted)
                + np.einsum("kij,ij->k", z_second, gram)
            )
        return CellMoments(mass, first, polar)

    def check_region(self, region: ConvexRegion, source: str, key: str) -> list[Problem]:
        if self.background == 0.0:
            total = sum(b.weight for b in self.bumps)
            if not self.mass_in(region) >= 1e-9 * total:
                return [Problem(source, key, "the bumps lie (almost) entirely outside the "
                                "region, so the density has no mass there")]
        return super().check_region(region, source, key)


@dataclass(frozen=True)
class _Grid:
    """A raster grid and the per-cell table the boundary integration reads
    (raster_moments.cell_table)."""

    values: np.ndarray  # (rows, cols), row 0 = south
    origin: np.ndarray  # south-west corner, metres
    resolution: float
    table: np.ndarray  # (rows * cols, 4)

    @classmethod
    def build(cls, values: np.ndarray, origin: np.ndarray, resolution: float) -> _Grid:
        return cls(values=values, origin=origin, resolution=resolution,
                   table=cell_table(values))


class RasterDensity(Density):
    """A piecewise-constant grid of values: cell (r, c) covers
    x in origin_x + [c, c+1) * resolution, y in origin_y + [r, r+1) * resolution (row 0 is
    the south row here; files list north first, see the module docstring). Outside the grid
    phi = fill_value if one was given, else 0 (check_region then insists that the grid
    covers the region).

    Integration over convex polygons (`moments`), all polygons in one vectorised pass, is
    exact for the piecewise-constant field (up to rounding): by Green's theorem each moment
    is a boundary integral of per-row prefix sums of phi, x phi, x^2 phi; every edge is cut
    where it crosses a row or column boundary, and on each piece the integrand is a
    polynomial with a closed-form integral. Cost: O(row and column crossings) per polygon
    -- its perimeter in cells -- never its area. Exactness matters beyond accuracy: the
    reference gate relies on the coverage cost decreasing at every opening, which holds
    for the computed cost only if the integration adds no error of its own.
    """

    def __init__(
        self,
        values: np.ndarray,
        origin: Sequence[float],
        resolution: float,
        fill_value: float | None = None,
    ) -> None:
        self.values = np.asarray(values, dtype=float)
        self.origin = np.asarray(origin, dtype=float).reshape(2)
        self.resolution = float(resolution)
        self.fill_value = None if fill_value is None else float(fill_value)
        # Programmer checks; files and mission mappings go through density_from_config,
        # which reports these as ConfigError problems with their keys.
        if self.values.ndim != 2 or self.values.size == 0:
            raise ValueError(f"raster values must be a non-empty 2-D array, got shape "
                             f"{self.values.shape}")
        if not (np.all(np.isfinite(self.values)) and self.values.min() >= 0.0):
            raise ValueError("raster values must be finite and non-negative")
        if not (math.isfinite(self.resolution) and self.resolution > 0.0):
            raise ValueError(f"raster resolution must be positive, got {resolution!r}")
        self._grid = _Grid.build(self.values, self.origin, self.resolution)
        self._padded: dict[tuple[int, int, int, int], _Grid] = {}

    @property
    def extent(self) -> tuple[float, float, float, float]:
        """(x_min, y_min, x_max, y_max) covered by the grid, metres."""
        rows, cols = self.values.shape
        x0, y0 = self.origin
        return (x0, y0, x0 + cols * self.resolution, y0 + rows * self.resolution)

    def evaluate(self, points: np.ndarray) -> np.ndarray:
        pts = np.atleast_2d(np.asarray(points, dtype=float))
        rows, cols = self.values.shape
        col = np.floor((pts[:, 0] - self.origin[0]) / self.resolution).astype(int)
        row = np.floor((pts[:, 1] - self.origin[1]) / self.resolution).astype(int)
        inside = (row >= 0) & (row < rows) & (col >= 0) & (col < cols)
        out = np.full(len(pts), 0.0 if self.fill_value is None else self.fill_value)
        out[inside] = self.values[row[inside], col[inside]]
        return out

    def _grid_for(self, low: np.ndarray, high: np.ndarray) -> _Grid:
        """The grid, padded with fill_value (aligned to the same cells) if the polygons
        reach beyond it; without a fill value outside is 0 and needs no padding."""
        if self.fill_value is None:
            return self._grid
        rows, cols = self.values.shape
        h = self.resolution
        left = max(0, math.ceil((self.origin[0] - low[0]) / h))
        bottom = max(0, math.ceil((self.origin[1] - low[1]) / h))
        right = max(0, math.ceil((high[0] - self.origin[0]) / h) - cols)
        top = max(0, math.ceil((high[1] - self.origin[1]) / h) - rows)
        if left == bottom == right == top == 0:
            return self._grid
        key = (left, bottom, right, top)
        if key not in self._padded:
            padded = np.pad(self.values, ((bottom, top), (left, right)),
                            constant_values=self.fill_value)
            origin = self.origin - h * np.array([left, bottom], dtype=float)
            self._padded = {key: _Grid.build(padded, origin, h)}  # keep one: regions are fixed
        return self._padded[key]

    def moments(self, polygons: Sequence[np.ndarray], about: np.ndarray) -> CellMoments:
        about = _as_about(about, len(polygons))
        count = len(polygons)
        mass = np.zeros(count)
        first = np.zeros((count, 2))
        polar = np.zeros(count)
        used = [i for i, p in enumerate(polygons) if len(p) >= 3]
        if not used:
            return CellMoments(mass, first, polar)
        stacked = np.concatenate([polygons[i] for i in used])
        grid = self._grid_for(stacked.min(axis=0), stacked.max(axis=0))
        h = grid.resolution
        rows, cols = grid.values.shape
        # Green's theorem: for a CCW polygon P, integral over P of y^b x^a phi dA equals
        # the boundary integral of y^b F_a(x, y) dy, with F_a(x, y) = integral from the
        # grid's west edge to x of s^a phi(s, y) ds: per-row prefix sums. Each edge is cut
        # where it crosses a row or column boundary; on each piece phi is one cell value,
        # F_a is a polynomial along the piece and the piece's integral is closed-form
        # (raster_moments.boundary_sums walks the pieces).
        # Neighbouring cells one after another: they share edges and raster rows.
        order = np.asarray(used)[locality_order(about[used])]
        lengths = np.array([len(polygons[i]) for i in order])
        starts = np.concatenate([[0], np.cumsum(lengths)])
        local = (np.concatenate([polygons[i] for i in order]) - grid.origin) / h
        scale = np.array([h**2, h**3, h**4, h**3, h**4])[:, None]
        sums = np.zeros((5, count))
        corners = np.zeros((count, 2))
        found, shift = boundary_sums(local, starts, grid.table, rows, cols)
        sums[:, order] = found * scale
        corners[order] = shift.T * h  # each polygon's moments are about its own corner
        mass, sx, sxx, sy, syy = sums
        second = sxx + syy
        a = about - grid.origin - corners  # about, from each polygon's corner, metres
        first = np.column_stack([sx - a[:, 0] * mass, sy - a[:, 1] * mass])
        polar = second - 2.0 * (a[:, 0] * sx + a[:, 1] * sy) + (a * a).sum(axis=1) * mass
        return CellMoments(mass, first, polar)

    def check_region(self, region: ConvexRegion, source: str, key: str) -> list[Problem]:
        if self.fill_value is None:
            gx0, gy0, gx1, gy1 = self.extent
            x0, y0, x1, y1 = region.bounds
            slack = 1e-9 * region.extent
            if x0 < gx0 - slack or y0 < gy0 - slack or x1 > gx1 + slack or y1 > gy1 + slack:
                return [Problem(
                    source, key,
                    f"the raster covers x {gx0:g}..{gx1:g}, y {gy0:g}..{gy1:g} m but the region "
                    f"spans x {x0:g}..{x1:g}, y {y0:g}..{y1:g} m; enlarge the raster, move its "
                    "origin, or set fill_value for the uncovered part",
                )]
        return super().check_region(region, source, key)


# ---------------------------------------------------------------------------------------
# Raster files


#: Greyscale image modes Pillow gives for the raster image files, and the full scale each
#: divides by: 8-bit images ("L") by 255, 16-bit ones by 65535 (PNG opens as "I;16", a PGM
#: with maxval above 255 as "I"). Pillow rescales a PGM's samples from its maxval to the
#: full scale of its bit depth (rounded to whole counts), so a pixel's value is
#: sample / maxval up to that rounding.
IMAGE_FULL_SCALE = {"L": 255.0, "I;16": 65535.0, "I;16B": 65535.0, "I;16L": 65535.0,
                    "I": 65535.0}
#: Raster image types and the Pillow plugin that reads each (PGM is in the PPM plugin).
IMAGE_FORMATS = {".pgm": "PPM", ".png": "PNG"}


def image_values(data: bytes, suffix: str) -> np.ndarray:
    """Pixels of a greyscale PGM or PNG image (8 or 16 bit) divided by the full scale of
    its bit depth, so 0..1, first row = top, read with Pillow. Raises ValueError with a
    plain description on anything else (colour, palette or alpha images, damaged files)."""
    from PIL import Image, UnidentifiedImageError

    kind = IMAGE_FORMATS[suffix]
    label = suffix[1:].upper()
    try:
        with Image.open(io.BytesIO(data), formats=[kind]) as image:
            mode = image.mode
            pixels = np.array(image) if mode in IMAGE_FULL_SCALE else None
    except UnidentifiedImageError:
        raise ValueError(f"not a {label} image") from None
    # Pillow reports damaged headers as ValueError or SyntaxError, short data as OSError.
    except (OSError, ValueError, SyntaxError, Image.DecompressionBombError) as exc:
        raise ValueError(f"cannot read it as a {label} image: {exc}") from None
    if pixels is None:
        raise ValueError(f"must be a greyscale image of 8 or 16 bits, got Pillow mode "
                         f"{mode!r}; save it as greyscale")
    if mode == "I" and (pixels.min() < 0 or pixels.max() > 65535):
        raise ValueError("must be a greyscale image of 8 or 16 bits (samples beyond 0..65535)")
    return pixels.astype(float) / IMAGE_FULL_SCALE[mode]


def load_raster_values(path: Path) -> np.ndarray:
    """Values of a raster file as written (first row = north); see raster_values."""
    path = Path(path)
    return raster_values(read_bytes(path), path.suffix, str(path))


def raster_values(data: bytes, suffix: str, source: str) -> np.ndarray:
    """Values of raster file content as written (first row = north): .npy (2-D numeric
    array), .csv (comma-separated rows, '#' comments), .pgm or .png (greyscale, 8 or 16
    bit: pixels / full scale, so 0..1; see image_values).
    Raises ValueError with a plain description on malformed content (ConfigError for text
    that is not UTF-8)."""
    suffix = suffix.lower()
    if suffix == ".npy":
        try:
            values = np.load(io.BytesIO(data), allow_pickle=False)
        except (ValueError, OSError, EOFError) as exc:
            raise ValueError(f"cannot read it as .npy: {exc}") from None
        if not isinstance(values, np.ndarray) or values.dtype.kind not in "biuf":
            raise ValueError(f"the array must be numeric, got dtype "
                             f"{getattr(values, 'dtype', type(values).__name__)}")
    elif suffix == ".csv":
        text = decode_text(data, source)
        try:
            values = np.loadtxt(io.StringIO(text), delimiter=",", comments="#", ndmin=2,
                                dtype=float)
        except ValueError as exc:
            raise ValueError(f"cannot read it as CSV numbers: {exc}") from None
    elif suffix in IMAGE_FORMATS:
        values = image_values(data, suffix)
    else:
        raise ValueError(f"unknown raster file type {suffix!r} (use .npy, .csv, .pgm, .png)")
    values = np.asarray(values, dtype=float)
    if values.ndim != 2 or values.size == 0:
        raise ValueError(f"the raster must be a non-empty 2-D array, got shape {values.shape}")
    return values


# ---------------------------------------------------------------------------------------
# Construction from a mission file's mapping


#: Bounds of density inputs (values beyond them overflow the moments or are typing
#: mistakes): densities, bump weights and scales up to 1e12 (any unit; only ratios matter),
#: coordinates within 1e7 m of the map origin (a continent), variances from 1e-6 m^2
#: (a 1 mm spread) to 1e12 m^2, raster cells from 1 mm to 10 km.
DENSITY_VALUE_MAX = 1e12
VARIANCE_MIN = 1e-6
VARIANCE_MAX = 1e12
RESOLUTION_MIN = 1e-3
RESOLUTION_MAX = 1e4


def _point(read: FieldReader, name: str, hint: str) -> tuple[float, ...] | None:
    return read.numbers(name, length=2, hint=hint, minimum=-COORDINATE_MAX,
                        maximum=COORDINATE_MAX)


def _gaussian_bumps(read: FieldReader, out: Collector) -> GaussianBumpsDensity | None:
    background = read.non_negative("background", 0.0, maximum=DENSITY_VALUE_MAX)
    bumps_value = read.raw("bumps")
    if not isinstance(bumps_value, list) or not bumps_value:
        read.problem("bumps", required_message("a non-empty list of {weight, mean, covariance}")
                     if bumps_value is None else type_message(
                         "a non-empty list of {weight, mean, covariance}", bumps_value))
        return None
    bumps = []
    for index, item in enumerate(bumps_value):
        bump = out.fields(item, f"{read.key('bumps')}[{index}]")
        weight = bump.positive("weight", maximum=DENSITY_VALUE_MAX)
        mean = _point(bump, "mean", "x, y in metres")
        cov = bump.matrix("covariance", 2, 2, hint="[[sxx, sxy], [sxy, syy]] in m^2")
        bump.check_unknown()
        if cov is not None:
            matrix = np.asarray(cov)
            if abs(matrix[0, 1] - matrix[1, 0]) > 1e-12 * max(1.0, float(np.abs(matrix).max())):
                bump.problem("covariance", "must be symmetric")
                cov = None
            else:
                low, high = np.linalg.eigvalsh(matrix)
                if low <= 0.0:
                    bump.problem("covariance", "must be positive definite (variances in m^2, "
                                 "|rho| < 1)")
                    cov = None
                elif low < VARIANCE_MIN or high > VARIANCE_MAX:
                    bump.problem("covariance", f"variances must lie in [{VARIANCE_MIN:g}, "
                                 f"{VARIANCE_MAX:g}] m^2, got eigenvalues {low:g} and {high:g}")
                    cov = None
        if not bump.problems and cov is not None and mean is not None:
            bumps.append(GaussianBump(weight, np.asarray(mean), np.asarray(cov)))
    if out.problems:
        return None
    return GaussianBumpsDensity(bumps, background)


def _raster_origin(read: FieldReader, out: Collector, frame: LocalFrame | None
                   ) -> tuple[float, ...] | None:
    """`origin` (map frame, metres) or `origin_lonlat` (converted through the mission's
    frame): exactly one."""
    if not read.has("origin_lonlat"):
        return _point(read, "origin", "x, y of the south-west corner, metres")
    corner = read.raw("origin_lonlat")
    if read.has("origin"):
        read.raw("origin")
        out.add(read.section, "give exactly one of 'origin' (metres, map frame) or "
                "'origin_lonlat' (WGS 84 longitude, latitude)")
        return None
    if frame is None:
        read.problem("origin_lonlat", "needs a region given in longitude/latitude "
                     "(region.geojson); give 'origin' in metres instead")
        return None
    problems = check_lonlat(corner, out.source, read.key("origin_lonlat"))
    if problems:
        out.extend(problems)
        return None
    return tuple(float(v) for v in frame.to_map(np.asarray(corner, dtype=float))[0])


def _raster(read: FieldReader, out: Collector, base_dir: Path | None,
            frame: LocalFrame | None) -> RasterDensity | None:
    resolution = read.number("resolution", minimum=RESOLUTION_MIN, maximum=RESOLUTION_MAX,
                             hint="metres per cell (square cells)")
    scale = read.positive("scale", 1.0, maximum=DENSITY_VALUE_MAX)
    fill_value = read.non_negative("fill_value", None, maximum=DENSITY_VALUE_MAX)
    origin = _raster_origin(read, out, frame)
    values = None
    where = read.key("file" if read.has("file") else "values")
    if read.has("file") == read.has("values"):
        read.raw("file")
        read.raw("values")
        out.add(read.section, "give exactly one of 'file' (a .npy, .csv, .pgm or .png path) or "
                "'values' (rows of numbers, north first)")
    elif read.has("file"):
        name = read.text("file")
        if name:
            path = Path(name)
            if not path.is_absolute() and base_dir is not None:
                path = Path(base_dir) / path
            try:
                data = read_bytes(path, source=out.source, key=where)
            except ConfigError as error:
                out.extend(error)
            else:
                try:
                    values = raster_values(data, path.suffix, str(path))
                except ConfigError as error:  # about the raster file: say so at the key
                    for problem in error.problems:
                        out.add(where, f"{problem.message} ({path})")
                except ValueError as exc:
                    out.add(where, f"{exc} ({path})")
    else:
        rows = read.raw("values")
        shape_ok = (isinstance(rows, list) and rows and all(isinstance(r, list) and r for r in rows)
                    and len({len(r) for r in rows}) == 1)
        if not shape_ok:
            out.add(where, type_message("a non-empty list of equal-length rows of numbers",
                                        rows))
        else:
            faults = [(i, j, number_fault(v)) for i, row in enumerate(rows)
                      for j, v in enumerate(row)]
            faults = [f for f in faults if f[2]]
            for i, j, fault in faults[:5]:
                out.add(f"{where}[{i}][{j}]", fault)
            if not faults:
                values = np.asarray(rows, dtype=float)
    if values is not None:
        if not np.all(np.isfinite(values)):
            out.add(where, "raster values must be finite")
        elif values.min() < 0.0:
            out.add(where, "raster values must be non-negative")
        elif math.isfinite(scale) and values.max() * scale > DENSITY_VALUE_MAX:
            out.add(where, f"scaled raster values must be at most "
                    f"{number_text(DENSITY_VALUE_MAX)}, got {number_text(values.max() * scale)}")
    read.check_unknown()
    if out.problems:
        return None
    assert values is not None and origin is not None
    return RasterDensity(values[::-1] * scale, origin, resolution, fill_value)


DENSITY_KINDS = ("uniform", "gaussian_bumps", "raster")


def density_from_config(
    mapping: Any,
    source: str,
    base_dir: Path | str | None = None,
    region: ConvexRegion | None = None,
    key: str = "density",
    frame: LocalFrame | None = None,
) -> Density:
    """Build a density from a mission file's `density` mapping; with `region`, also check it
    against the region (mass inside, raster coverage). Every problem found is raised at once
    as ConfigError naming `source` and the dotted key.

    Keys (all units SI; unknown keys are errors):
      kind: uniform | gaussian_bumps | raster                          (required)
      uniform:         value: > 0, default 1.0
      gaussian_bumps:  background: >= 0, default 0.0 (added everywhere)
                       bumps: list of {weight: > 0 (the bump's mass over the plane),
                                       mean: [x, y] m, covariance: [[sxx, sxy], [sxy, syy]] m^2,
                                       symmetric positive definite}
      raster:          file: .npy | .csv | .pgm | .png path, relative to base_dir   (or)
                       values: rows of numbers, north row first
                       origin: [x, y] m, south-west corner of the grid       (required)
                       origin_lonlat: [longitude, latitude] instead of origin, when the
                              mission's region is geodetic (`frame`, converted through it)
                       resolution: > 0, metres per cell (square cells)       (required)
                       scale: > 0, default 1.0 (multiplies the values; image pixels
                              are first divided by 255 or 65535, so they run 0..1)
                       fill_value: >= 0, phi outside the grid; without it the grid must
                              cover the region
    """
    base = None if base_dir is None else Path(base_dir)
    out = Collector(source)
    read = out.fields(mapping, key)
    out.raise_if_any()
    kind = read.choice("kind", DENSITY_KINDS)
    out.raise_if_any()
    density: Density | None
    if kind == "uniform":
        value = read.positive("value", 1.0, maximum=DENSITY_VALUE_MAX)
        read.check_unknown()
        density = UniformDensity(value)
    elif kind == "gaussian_bumps":
        density = _gaussian_bumps(read, out)
        read.check_unknown()
    else:
        density = _raster(read, out, base, frame)
    out.raise_if_any()
    assert density is not None
    if region is not None:
        problems = density.check_region(region, source, key)
        if problems:
            raise ConfigError(problems)
    return density
