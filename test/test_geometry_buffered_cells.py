"""Buffered cells (geometry/buffered_cells.py) against shapely (a general-purpose reference
library), and the keep-apart window's pairwise rule (control/keep_apart.py).

Construction: Zhou, Wang, Bandyopadhyay & Schwager, "Fast, on-line collision avoidance for
dynamic vehicles using buffered Voronoi cells", IEEE Robotics and Automation Letters 2(2),
2017, section III (the buffered Voronoi cell: the Voronoi cell with each bisector pulled back
by the safety radius). Equal radii: our cell inside the region (itself pulled in by the
radius) must equal shapely's Voronoi cell eroded by the radius (a negative buffer of a convex
polygon is the intersection of its edges' half-planes moved inwards).
"""

from __future__ import annotations

import numpy as np
import pytest
import shapely

from coverage_fleet.control.keep_apart import CellWindow, KeepApartSettings, cell_layout
from coverage_fleet.geometry.buffered_cells import FleetSnapshot, separating_halfplanes
from coverage_fleet.geometry.region import ConvexRegion

REGION = ConvexRegion.from_vertices(
    np.array([[0.0, 0.0], [30.0, 0.0], [36.0, 12.0], [28.0, 24.0], [2.0, 22.0]])
)


def snapshot(positions, radii, ages=None, speeds=None, time=0.0) -> FleetSnapshot:
    n = len(positions)
    return FleetSnapshot(
        time=time,
        names=tuple(f"r{k}" for k in range(n)),
        positions=np.asarray(positions, float),
        ages=np.zeros(n) if ages is None else np.asarray(ages, float),
        radii=np.asarray(radii, float),
        speed_limits=np.ones(n) if speeds is None else np.asarray(speeds, float),
    )


def halfplane_polygon(normal: np.ndarray, offset: float, size: float = 1e3) -> shapely.Polygon:
    """{p : normal . p <= offset} cut to a large square (shapely has no unbounded sets)."""
    along = np.array([-normal[1], normal[0]])
    foot = normal * offset
    corners = [foot + size * along, foot - size * along,
               foot - size * along - size * normal, foot + size * along - size * normal]
    return shapely.Polygon(corners)


def own_cell(snap: FleetSnapshot, k: int, margin: float) -> shapely.Geometry:
    """Region shrunk by the footprint (mitre erosion), cut by every separating half-plane."""
    radius = snap.radii[k]
    cell = shapely.Polygon(REGION.vertices).buffer(-radius, join_style="mitre")
    planes = separating_halfplanes(snap, snap.names[k], margin)
    for normal, offset in zip(planes.normals, planes.offsets, strict=True):
        cell = cell.intersection(halfplane_polygon(normal, offset))
    return cell


def shapely_voronoi_cells(points: np.ndarray) -> list[shapely.Geometry]:
    polygon = shapely.Polygon(REGION.vertices)
    diagram = shapely.voronoi_polygons(shapely.MultiPoint(points), extend_to=polygon.buffer(50))
    pieces = [piece.intersection(polygon) for piece in diagram.geoms]
    return [next(p for p in pieces if p.covers(shapely.Point(pt))) for pt in points]


def random_positions(rng: np.random.Generator, n: int, spacing: float) -> np.ndarray:
    points: list[np.ndarray] = []
    while len(points) < n:
        p = rng.uniform([3.0, 3.0], [30.0, 20.0])
        if all(np.linalg.norm(p - q) > spacing for q in points):
            points.append(p)
    return np.array(points)


@pytest.mark.parametrize("seed", range(5))
def test_equal_radii_cell_is_the_voronoi_cell_eroded_by_the_radius(seed) -> None:
    """Zhou et al. 2017, section III: BVC = Voronoi cell pulled back by the safety radius;
    reference cells from shapely.voronoi_polygons, eroded with shapely's buffer."""
    rng = np.random.default_rng(seed)
    points = random_positions(rng, 9, spacing=2.5)
    radius = 0.4
    snap = snapshot(points, np.full(len(points), radius))
    reference = shapely_voronoi_cells(points)
    for k in range(len(points)):
        ours = own_cell(snap, k, margin=0.0)
        expected = reference[k].buffer(-radius, join_style="mitre")
        assert expected.area > 0
        assert ours.symmetric_difference(expected).area < 1e-7 * expected.area


@pytest.mark.parametrize("seed", range(5))
def test_heterogeneous_footprints_in_their_cells_keep_the_margin(seed) -> None:
    """Any two robots anywhere in their own cells (centres), footprints as discs: the
    footprints stay at least the margin apart (shapely distance between each cell grown by
    its own radius). Radii from a 0.3 m rover to a 1.5 m vessel."""
    rng = np.random.default_rng(100 + seed)
    points = random_positions(rng, 7, spacing=3.6)
    radii = rng.choice([0.3, 0.45, 1.5], size=len(points))
    margin = 0.1
    snap = snapshot(points, radii)
    grown = [own_cell(snap, k, margin).buffer(radii[k]) for k in range(len(points))]
    for i in range(len(points)):
        assert own_cell(snap, i, margin).contains(shapely.Point(points[i]))
        for j in range(i + 1, len(points)):
            assert grown[i].distance(grown[j]) >= margin - 1e-6, (i, j, radii[i], radii[j])


def test_vessel_beside_rover_splits_the_gap_evenly_after_the_footprints() -> None:
    """A 1.5 m vessel and a 0.3 m rover 4 m apart: free gap 4 - 1.8 - 0.1 = 2.1 m, each
    centre may advance 1.05 m towards the other (the bisector alone would let the vessel's
    footprint reach 2 + 1.5 = 3.5 m, over the rover's centre at 4 m minus 0.3)."""
    snap = snapshot([[10.0, 10.0], [14.0, 10.0]], [1.5, 0.3])
    vessel = separating_halfplanes(snap, "r0", margin=0.1)
    rover = separating_halfplanes(snap, "r1", margin=0.1)
    assert vessel.gaps[0] == pytest.approx(2.1)
    assert vessel.offsets[0] == pytest.approx(11.05)  # x <= 10 + 1.05
    assert rover.offsets[0] == pytest.approx(-12.95)  # -x <= -(14 - 1.05)
    assert -rover.offsets[0] - vessel.offsets[0] == pytest.approx(1.5 + 0.3 + 0.1)


def test_stale_positions_widen_the_gap_by_speed_times_age() -> None:
    """A neighbour's position 0.5 s old at 2 m/s may be 1 m closer: the free gap shrinks
    by that allowance, and the robot's true position (within its own allowance of the
    snapshot) stays inside its own side while the gap is positive."""
    fresh = snapshot([[5.0, 5.0], [11.0, 5.0]], [0.5, 0.5])
    aged = snapshot([[5.0, 5.0], [11.0, 5.0]], [0.5, 0.5], ages=[0.2, 0.5], speeds=[1.0, 2.0])
    g_fresh = separating_halfplanes(fresh, "r0", 0.0).gaps[0]
    g_aged = separating_halfplanes(aged, "r0", 0.0).gaps[0]
    assert g_fresh - g_aged == pytest.approx(0.2 * 1.0 + 0.5 * 2.0)
    rng = np.random.default_rng(3)
    for _ in range(200):
        angle, r = rng.uniform(0, 2 * np.pi), 0.2 * np.sqrt(rng.uniform())
        true_position = np.array([5.0, 5.0]) + r * np.array([np.cos(angle), np.sin(angle)])
        assert separating_halfplanes(aged, "r0", 0.0).slack(true_position)[0] >= -1e-12


def test_coincident_positions_are_separated_the_same_way_from_both_sides() -> None:
    snap = snapshot([[5.0, 5.0], [5.0, 5.0]], [0.3, 0.3])
    a = separating_halfplanes(snap, "r0", 0.0)
    b = separating_halfplanes(snap, "r1", 0.0)
    np.testing.assert_allclose(a.normals[0], -b.normals[0])
    # Both must back off: together they open the 0.6 m the footprints need.
    assert -(a.offsets[0] - a.normals[0] @ [5, 5]) - (b.offsets[0] - b.normals[0] @ [5, 5]) \
        == pytest.approx(0.6)


def test_window_gives_two_robots_a_common_snapshot_whatever_their_sample_times() -> None:
    """The window rule (control/keep_apart.py): at any time, the snapshots robot A honours
    contain the newest one robot B took at its last solve, for sample times 0.1 s and
    0.5 s and snapshots every 0.5 s. Checked exhaustively on a 0.05 s tick grid."""
    settings = KeepApartSettings(margin=0.0, neighbours=1)
    layout = cell_layout(settings, longest_sample_time=0.5)
    times = np.round(np.arange(0.0, 6.0, 0.05), 10)
    snapshot_times = [t for t in times if abs(t / layout.snapshot_period - round(t / 0.5)) < 1e-9]
    sample = {"a": 0.1, "b": 0.5}
    phase = {"a": 0.05, "b": 0.15}
    last_newest: dict[str, float] = {}
    honoured: dict[str, set[float]] = {}
    for t in times:
        for robot in ("a", "b"):
            k = (t - phase[robot]) / sample[robot]
            if t >= phase[robot] - 1e-9 and abs(k - round(k)) < 1e-6:
                window = {s for s in snapshot_times if t - layout.window < s <= t + 1e-9}
                honoured[robot] = window
                last_newest[robot] = max(window)
        if len(honoured) == 2:
            assert honoured["a"] & honoured["b"], t


def test_window_rows_are_padded_sorted_and_brake_when_old() -> None:
    settings = KeepApartSettings(margin=0.1, neighbours=3, max_age=1.0)
    window = CellWindow("r0", settings, window=1.0, rows=6, reach=3.0)
    assert window.rows_at(0.0, np.array([5.0, 5.0])).brake
    window.add(snapshot([[5, 5], [7, 5], [5, 8], [20, 20]], [0.3] * 4, time=0.0))
    rows = window.rows_at(0.2, np.array([5.0, 5.0]))
    assert not rows.brake and rows.used == 2  # the robot at (20, 20) is out of reach
    assert rows.normals.shape == (6, 2)
    np.testing.assert_allclose(rows.normals[rows.used:], 0.0)
    np.testing.assert_allclose(rows.offsets[rows.used:], 1.0)
    slack = rows.offsets[: rows.used] - rows.normals[: rows.used] @ [5.0, 5.0]
    assert np.all(np.diff(slack) >= 0)
    old = window.rows_at(1.5, np.array([5.0, 5.0]))
    assert old.brake and "old" in old.reason
