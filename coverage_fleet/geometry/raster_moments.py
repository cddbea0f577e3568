"""The inner loop of the raster density's exact moments, compiled (numba).

Green's theorem turns each moment of a piecewise-constant field over a convex polygon into
a boundary integral of per-row prefix sums (RasterDensity.moments explains the maths).
Each edge is walked once from start to end, visiting the row and column crossings in
order; on each piece between two crossings the field is one cell value and the integral
is closed-form. A fleet of a thousand robots on a 1024 x 1024 raster has ~150 000 such
pieces: as whole-array numpy expressions every piece paid for some forty temporaries and
a sort of the crossings (profiled: 60 % of the partition's time). Compiled, the
crossings come out in order for free and the arithmetic is cheap; what is left is memory:
each piece reads one cell of a table far larger than the caches. So the work is split in
three loops over a batch of polygons: walk the edges and note each piece's cell, gather
those cells' table rows in a loop with nothing else in it (many reads in flight at once),
then integrate from the gathered rows. Batches are small enough that the work arrays stay
in cache and are reused (fresh large arrays cost a page fault per 4 KiB). Callers pass
the polygons of neighbouring cells one after another (`locality_order`), so the second
walk of a shared edge finds its rows still cached.

Precision: the prefix sums run from the grid's west edge, so two edges of a narrow cell
far east would cancel large, nearly equal numbers. A function of y alone integrates to
zero around a closed boundary, so each row's prefix at the polygon's westmost column is
subtracted first, and x and y are measured from the polygon's own south-west corner: the
numbers that cancel are then the size of the polygon, not of the grid (a cell a
nanometre wide keeps its centroid inside it).
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

#: Columns of the per-cell table: sum_{j<c} phi_j, sum_{j<c} phi_j (j + 1/2),
#: sum_{j<c} phi_j ((j+1)^3 - j^3)/3 (x in cells), and phi_c itself.
PREFIX_MASS, PREFIX_X, PREFIX_XX, CELL_VALUE = range(4)


def cell_table(values: np.ndarray) -> np.ndarray:
    """(rows * cols, 4) table read by `boundary_sums` (columns above), one cache line per
    cell so that a piece reads all four numbers in one memory access."""
    cols = values.shape[1]
    j = np.arange(cols, dtype=float)

    def exclusive_prefix(weighted: np.ndarray) -> np.ndarray:
        return np.cumsum(weighted, axis=1) - weighted

    return np.ascontiguousarray(np.stack([
        exclusive_prefix(values).ravel(),
        exclusive_prefix(values * (j + 0.5)).ravel(),
        exclusive_prefix(values * (((j + 1.0) ** 3 - j**3) / 3.0)).ravel(),
        values.ravel(),
    ], axis=1))



def locality_order(points: np.ndarray) -> np.ndarray:
    """An order of `points` (n, 2) along a Z-order (Morton) curve: consecutive points are
    near each other, so their cells share edges and raster rows."""
    if len(points) < 2:
        return np.arange(len(points))
    low = points.min(axis=0)
    span = float(np.ptp(points, axis=0).max()) or 1.0
    grid = ((points - low) * (1023.0 / span)).astype(np.int64)
    code = np.zeros(len(points), dtype=np.int64)
    for bit in range(10):
        code |= ((grid[:, 0] >> bit) & 1) << (2 * bit)
        code |= ((grid[:, 1] >> bit) & 1) << (2 * bit + 1)
    return np.argsort(code, kind="stable")


@njit(cache=True)
def _crossings(low, high, limit):  # pragma: no cover
    """First and one-past-last integer k with low < k < high and 0 <= k <= limit."""
    first = max(math.floor(low) + 1, 0)  # floor(low) + 1 > low and ceil(high) - 1 < high
    stop = min(math.ceil(high), limit + 1)
    return first, max(stop, first)


#: Pieces per batch: work arrays of 9 doubles per piece, about 300 KiB, stay in L2.
BATCH_PIECES = 4096


@njit(cache=True)
def _piece_counts(vertices, starts, rows, cols):  # pragma: no cover
    """Upper bound of the pieces of each polygon: per non-horizontal edge, one plus its
    row and column crossings."""
    count = len(starts) - 1
    pieces = np.zeros(count, dtype=np.int64)
    for polygon in range(count):
        begin, end = starts[polygon], starts[polygon + 1]
        for s in range(begin, end):
            following = s + 1 if s + 1 < end else begin
            ax, ay = vertices[s, 0], vertices[s, 1]
            bx, by = vertices[following, 0], vertices[following, 1]
            if by != ay:
                row_first, row_stop = _crossings(min(ay, by), max(ay, by), rows)
                col_first, col_stop = _crossings(min(ax, bx), max(ax, bx), cols)
                pieces[polygon] += 1 + (row_stop - row_first) + (col_stop - col_first)
    return pieces


@njit(cache=True)
def _walk(vertices, starts, polygon, rows, cols, at, reference, geometry, piece, shift
          ):  # pragma: no cover
    """Cut every non-horizontal edge of one polygon at its row and column crossings, in
    the order the edge meets them, writing from slot `piece` on: the table row `at` (-1:
    nothing to add: outside the grid's rows, where phi = 0, or zero height), the piece's
    signed height (up on the east side, down on the west), its middle (v, u) in cells
    and du/dv, and `reference`: the same row's cell in the polygon's westmost column.
    Positions are stored relative to shift[:, polygon] = (westmost column, southmost
    row), so moments come out about that corner. Returns the next free slot."""
    begin, end = starts[polygon], starts[polygon + 1]
    west, south = vertices[begin, 0], vertices[begin, 1]
    for s in range(begin + 1, end):
        west = min(west, vertices[s, 0])
        south = min(south, vertices[s, 1])
    west_column = min(max(math.floor(west), 0), cols - 1)
    south_row = float(math.floor(south))
    shift[0, polygon], shift[1, polygon] = float(west_column), south_row
    for s in range(begin, end):
        following = s + 1 if s + 1 < end else begin
        ax, ay = vertices[s, 0], vertices[s, 1]
        dx = vertices[following, 0] - ax
        dy = vertices[following, 1] - ay
        if dy == 0.0:
            continue  # horizontal edges add nothing (dy = 0)
        row_first, row_stop = _crossings(min(ay, ay + dy), max(ay, ay + dy), rows)
        col_first, col_stop = _crossings(min(ax, ax + dx), max(ax, ax + dx), cols)
        row_count, col_count = row_stop - row_first, col_stop - col_first
        row_step = 1 if dy > 0.0 else -1
        col_step = 1 if dx > 0.0 else -1
        next_row = row_first if dy > 0.0 else row_stop - 1
        next_col = col_first if dx > 0.0 else col_stop - 1
        done_rows, done_cols = 0, 0
        f0 = 0.0
        for _ in range(row_count + col_count + 1):
            if done_rows < row_count or done_cols < col_count:
                f_row = (next_row - ay) / dy if done_rows < row_count else 2.0
                f_col = (next_col - ax) / dx if done_cols < col_count else 2.0
                if f_row <= f_col:
                    f1 = f_row
                    next_row += row_step
                    done_rows += 1
                else:
                    f1 = f_col
                    next_col += col_step
                    done_cols += 1
            else:
                f1 = 1.0
            thick = (f1 - f0) * dy
            middle_f = 0.5 * (f0 + f1)
            middle = ay + middle_f * dy
            row = math.floor(middle)
            at[piece] = -1
            if thick != 0.0 and 0 <= row < rows:
                u_mid = ax + middle_f * dx
                # West of the grid F = 0, east of it F is the row's total: constant
                # along the piece.
                if u_mid <= 0.0:
                    u_mid, slope = 0.0, 0.0
                elif u_mid >= cols:
                    u_mid, slope = float(cols), 0.0
                else:
                    slope = dx / dy
                at[piece] = row * cols + min(math.floor(u_mid), cols - 1)
                reference[piece] = row * cols + west_column
                geometry[piece, 0] = thick
                geometry[piece, 1] = middle - south_row
                geometry[piece, 2] = u_mid - west_column
                geometry[piece, 3] = slope
            piece += 1
            f0 = f1
    return piece


@njit(cache=True)
def _integrate(at, geometry, gathered, begin, end, cols, west_column):  # pragma: no cover
    """Sums over pieces begin..end-1 of the five boundary integrands, in cell units about
    (west_column, the polygon's southmost row)."""
    mass = sx = sxx = sy = syy = 0.0
    for piece in range(begin, end):
        if at[piece] < 0:
            continue
        thick, middle = geometry[piece, 0], geometry[piece, 1]
        u_mid, k = geometry[piece, 2], geometry[piece, 3]
        prefix_mass, prefix_x = gathered[piece, 0], gathered[piece, 1]
        prefix_xx, phi = gathered[piece, 2], gathered[piece, 3]
        c = float(at[piece] % cols) - west_column
        spread = thick * thick / 12.0  # variance of v along the piece
        mean_vv = middle * middle + spread
        k_spread = k * spread
        kk_spread = k * k_spread
        offset = u_mid - c
        t_prefix = thick * prefix_mass
        t_phi = thick * phi
        # Means over the piece of u^2 - c^2, u^3 - c^3, (u - c) v, (u - c) v^2 with u
        # linear in v and v uniform along the piece.
        mass += t_prefix + t_phi * offset
        sx += thick * prefix_x + (0.5 * t_phi) * (offset * (u_mid + c) + kk_spread)
        sxx += thick * prefix_xx + (t_phi / 3.0) * (
            offset * (u_mid * u_mid + u_mid * c + c * c) + 3.0 * u_mid * kk_spread)
        sy += t_prefix * middle + t_phi * (offset * middle + k_spread)
        syy += t_prefix * mean_vv + t_phi * (offset * mean_vv + 2.0 * middle * k_spread)
    return mass, sx, sxx, sy, syy


@njit(cache=True)
def boundary_sums(vertices, starts, table, rows, cols):  # pragma: no cover
    """Per polygon p (vertices[starts[p]:starts[p + 1]], CCW, in cell units relative to
    the grid's south-west corner): the integrals of phi, x phi, x^2 phi, y phi, y^2 phi
    (cell units) as a (5, polygons) array, with x and y measured from the polygon's own
    corner `shift[:, p]` = (westmost column, southmost row), also returned."""
    count = len(starts) - 1
    out = np.zeros((5, count))
    shift = np.zeros((2, count))
    pieces = _piece_counts(vertices, starts, rows, cols)
    capacity = max(BATCH_PIECES, pieces.max()) if count else 0
    at = np.empty(capacity, dtype=np.int64)
    reference = np.empty(capacity, dtype=np.int64)
    geometry = np.empty((capacity, 4))
    gathered = np.empty((capacity, 4))
    first_piece = np.empty(count + 1, dtype=np.int64)
    low = 0
    while low < count:
        high, used = low, 0
        while high < count and used + pieces[high] <= capacity:
            used += pieces[high]
            high += 1
        piece = 0
        for polygon in range(low, high):
            first_piece[polygon] = piece
            piece = _walk(vertices, starts, polygon, rows, cols, at, reference, geometry,
                          piece, shift)
        first_piece[high] = piece
        # The gather alone: independent reads, many cache misses in flight at once.
        for slot in range(piece):
            cell, west = at[slot], reference[slot]
            if cell >= 0:
                # Prefix sums from the reference column, with x measured from it too:
                # sum phi_j (j - c0 + 1/2) and sum phi_j ((j - c0 + 1)^3 - (j - c0)^3) / 3.
                c0 = float(west % cols)
                mass_part = table[cell, 0] - table[west, 0]
                x_part = (table[cell, 1] - table[west, 1]) - c0 * mass_part
                gathered[slot, 0] = mass_part
                gathered[slot, 1] = x_part
                gathered[slot, 2] = ((table[cell, 2] - table[west, 2]) - 2.0 * c0 * x_part
                                     - c0 * c0 * mass_part)
                gathered[slot, 3] = table[cell, 3]
        for polygon in range(low, high):
            sums = _integrate(at, geometry, gathered, first_piece[polygon],
                              first_piece[polygon + 1], cols, shift[0, polygon])
            for moment in range(5):
                out[moment, polygon] = sums[moment]
        low = high
    return out, shift
