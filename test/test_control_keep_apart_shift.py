"""The keep-apart rows of a geofence return plan (control/keep_apart.shifted_rows): the
controller solves that plan with the robot's position moved inside by a shift (position
invariance, control/geofence.py), so its cell must move by the same shift. Checked against
shapely: the cell polygon of the shifted rows is the original cell polygon translated by
the shift (shapely.affinity.translate), and padding and braking rows are left alone."""

from __future__ import annotations

import numpy as np
import pytest
import shapely
from shapely.affinity import translate

from coverage_fleet.control.keep_apart import CellRows, CellWindow, KeepApartSettings, shifted_rows
from coverage_fleet.geometry.buffered_cells import FleetSnapshot


def cell_polygon(rows: CellRows, size: float = 100.0) -> shapely.Geometry:
    """{p : normals . p <= offsets} cut to a large square (shapely has no unbounded sets)."""
    cell = shapely.box(-size, -size, size, size)
    for normal, offset in zip(rows.normals[: rows.used], rows.offsets[: rows.used], strict=True):
        along = np.array([-normal[1], normal[0]])
        foot = normal * offset
        cell = cell.intersection(shapely.Polygon([
            foot + 4 * size * along, foot - 4 * size * along,
            foot - 4 * size * (along + normal), foot + 4 * size * (along - normal),
        ]))
    return cell


@pytest.mark.parametrize("shift", [(0.0, 0.0), (1.5, -0.75), (-3.0, 2.0)])
def test_shifted_rows_are_the_cell_translated_by_the_shift(shift) -> None:
    window = CellWindow(
        "r0", KeepApartSettings(margin=0.1, neighbours=4), window=1.0, rows=8, reach=10.0
    )
    window.add(FleetSnapshot(
        time=0.0, names=("r0", "r1", "r2", "r3"),
        positions=np.array([[0.0, 0.0], [2.0, 0.5], [-1.0, 2.0], [0.5, -2.5]]),
        ages=np.array([0.0, 0.2, 0.0, 0.5]), radii=np.array([0.35, 0.35, 0.5, 0.3]),
        speed_limits=np.array([1.0, 1.0, 0.5, 2.0]),
    ))
    rows = window.rows_at(0.1, np.zeros(2))
    assert rows.used == 3 and not rows.brake
    moved = shifted_rows(rows, np.array(shift))
    expected = translate(cell_polygon(rows), *shift)
    got = cell_polygon(moved)
    assert got.symmetric_difference(expected).area <= 1e-9 * expected.area
    # Padding rows (0 . p <= 1) stay inactive; rows used and dropped carry over.
    np.testing.assert_array_equal(moved.normals[rows.used:], 0.0)
    np.testing.assert_array_equal(moved.offsets[rows.used:], 1.0)
    assert (moved.used, moved.dropped) == (rows.used, rows.dropped)


def test_braking_rows_stay_braking_rows() -> None:
    rows = CellRows(None, None, reason="no snapshot of the fleet's positions yet")
    assert shifted_rows(rows, np.array([1.0, 2.0])) is rows
