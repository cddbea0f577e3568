"""The evidence side of keeping apart: packed starts for batches, the plant's clearance at
its substeps, the buffered cell a robot rests in, "settled" and the held CVT gap.

Outside references, named at each check:
- shapely (a general-purpose geometry library) for discs inside the region, overlaps and
  the buffered cell (region eroded by the footprint, cut by the separating half-planes:
  Zhou, Wang, Bandyopadhyay & Schwager, IEEE RA-L 2(2), 2017, section III);
- scipy.integrate.solve_ivp for the plants' paths between ticks;
- a worked example of a constrained centroidal Voronoi configuration in a rectangle, from
  the parallel-axis theorem (J = M (w^2 + h^2) / 12 for a uniform rectangle about its
  centroid, common practice) and the CVT of a rectangle split in two equal halves (Du,
  Faber & Gunzburger, SIAM Review 41(4), 1999, sec. 2: a CVT's generators are the mass
  centroids of their own cells; Lloyd 1982 for the iteration).
"""

from __future__ import annotations

from itertools import combinations
from pathlib import Path

import numpy as np
import pytest
import shapely
from scipy.integrate import solve_ivp
from scipy.sparse.csgraph import connected_components

from coverage_fleet.fleet.batch import packed_initial_poses, start_poses
from coverage_fleet.fleet.lloyd import held_lloyd, lloyd
from coverage_fleet.fleet.mission import load_mission, with_keep_apart
from coverage_fleet.fleet.plants import FleetPlants, NoiseLevels
from coverage_fleet.fleet.settling import HeldCells, SettleMonitor, SettleSettings
from coverage_fleet.geometry.buffered_cells import (
    FleetSnapshot,
    admissible_points,
    buffered_cell_polygon,
    separating_halfplanes,
    targets_well_inside,
)
from coverage_fleet.geometry.density import UniformDensity
from coverage_fleet.geometry.region import ConvexRegion
from coverage_fleet.report.metrics import cvt_gap, held_cvt_gap

MISSIONS = Path(__file__).resolve().parents[1] / "config" / "missions"
DEMO_MISSIONS = sorted(p.name for p in MISSIONS.glob("*.yaml"))


# --- packed starts -------------------------------------------------------------------------


@pytest.mark.parametrize("mission_file", DEMO_MISSIONS)
@pytest.mark.parametrize("gap", [0.0, 0.1, 0.5])
def test_packed_starts_keep_their_definition(mission_file: str, gap: float) -> None:
    """Footprint discs inside the region (shapely contains), none overlapping (shapely
    distance), each within `gap` of another and all one connected group (scipy)."""
    mission = load_mission(MISSIONS / mission_file)
    region = shapely.Polygon(mission.region.vertices)
    radius = {e.name: e.footprint_radius for e in mission.roster}
    names = list(radius)
    for seed in range(20):
        poses = packed_initial_poses(mission, np.random.default_rng(seed), gap)
        assert list(poses) == names
        discs = {n: shapely.Point(poses[n][:2]).buffer(radius[n], quad_segs=64) for n in names}
        for name in names:
            # The polygonal disc lies inside the true disc: allow its chord error.
            assert region.buffer(1e-3).contains(discs[name])
            assert -np.pi <= poses[name][2] <= np.pi
        near = np.zeros((len(names), len(names)), bool)
        for (i, a), (j, b) in combinations(enumerate(names), 2):
            clearance = shapely.Point(poses[a][:2]).distance(shapely.Point(poses[b][:2])) \
                - radius[a] - radius[b]
            assert clearance >= -1e-9, (seed, a, b)
            near[i, j] = near[j, i] = clearance <= gap + 1e-9
        assert near.any(axis=1).all()
        groups, _ = connected_components(near, directed=False)
        assert groups == 1


def test_packed_starts_are_seeded_and_differ_from_spread_starts() -> None:
    mission = load_mission(MISSIONS / "solar_row_quick_check.yaml")
    assert start_poses(mission, 7, 0.1) == start_poses(mission, 7, 0.1)
    assert start_poses(mission, 7, 0.1) != start_poses(mission, 8, 0.1)
    assert start_poses(mission, 7, 0.1) != start_poses(mission, 7)


def test_batch_refuses_a_negative_packing_gap(capsys: pytest.CaptureFixture[str]) -> None:
    from coverage_fleet.cli.main import main

    status = main(["batch", str(MISSIONS / "solar_row_quick_check.yaml"), "--seeds", "1",
                   "--packed-starts", "-1", "--keep-apart", "off"])
    err = capsys.readouterr().err
    assert status == 2 and "command line: --packed-starts: must be at least 0, got -1" in err


def test_batch_keep_apart_override_reaches_settings_settle_rule_and_mission_as_run() -> None:
    mission = load_mission(MISSIONS / "solar_row_quick_check.yaml")
    assert mission.keep_apart.enabled and mission.settle.cells is not None
    off = with_keep_apart(mission, False)
    assert not off.keep_apart.enabled and off.settle.cells is None
    assert off.raw["keep_apart"]["enabled"] is False
    assert with_keep_apart(off, True).settle.cells == mission.settle.cells


# --- the plant's clearance at its substeps -------------------------------------------------


def test_plant_clearance_is_the_smallest_over_the_substeps() -> None:
    """Two rovers driving at each other: the smallest clearance the plants report for a step
    equals the least one over that step's substeps of scipy's integration of the same
    model (RK45, tight tolerances)."""
    mission = load_mission(MISSIONS / "solar_row_quick_check.yaml")
    entries = mission.roster[:2]
    starts = {entries[0].name: (3.0, 4.0, 0.0), entries[1].name: (5.0, 4.05, np.pi)}
    step, substeps = 0.5, 8
    plants = FleetPlants(entries, step, substeps, NoiseLevels(), 0, starts)
    model = entries[0].vehicle.model
    import casadi as ca

    x_sym, u_sym = ca.SX.sym("x", model.nx), ca.SX.sym("u", model.nu)
    f = ca.Function("f", [x_sym, u_sym], [model.continuous_dynamics(x_sym, u_sym)])
    low, high = model.input_bounds()
    u = np.clip(np.full(model.nu, 0.5), low, high)  # forwards, the same for both
    times = np.linspace(0.0, step, substeps + 1)[1:]
    paths = []
    for entry in entries:
        x0 = plants.states[entry.name].copy()
        solution = solve_ivp(lambda _t, x: np.asarray(f(x, u)).ravel(), (0.0, step), x0,
                             t_eval=times, rtol=1e-10, atol=1e-12)
        i, j = model.position_indices
        paths.append(solution.y[[i, j]].T)
    radii = sum(e.footprint_radius for e in entries)
    expected = np.linalg.norm(paths[0] - paths[1], axis=1) - radii
    plants.advance({e.name: u for e in entries})
    found = plants.last_clearance
    assert found is not None and found.robots == (entries[0].name, entries[1].name)
    assert found.clearance == pytest.approx(expected.min(), abs=1e-6)
    assert found.time == pytest.approx(times[int(np.argmin(expected))])
    # The tick itself (the state after the step) is not where they came closest.
    assert found.clearance < expected[-1] - 1e-3 or np.argmin(expected) == len(expected) - 1


# --- the buffered cell a robot rests in ----------------------------------------------------

REGION = ConvexRegion.from_vertices(np.array([[0.0, 0.0], [4.0, 0.0], [4.0, 3.0], [0.0, 3.0]]))


def test_buffered_cell_polygon_matches_shapely() -> None:
    """Region eroded by radius + pad (mitre), cut by the separating half-planes pulled in by
    the pad: the construction of Zhou et al. 2017, sec. III, with our shifted lines."""
    positions = np.array([[1.0, 1.0], [2.2, 1.6], [3.0, 2.5]])
    radii = np.array([0.3, 0.5, 0.2])
    snap = FleetSnapshot(0.0, ("a", "b", "c"), positions, np.zeros(3), radii, np.zeros(3))
    A, b = REGION.halfspaces()
    for k, name in enumerate(snap.names):
        pad = 0.05
        ours = shapely.Polygon(buffered_cell_polygon(snap, name, 0.1, REGION.vertices, A, b,
                                                     pad))
        reference = shapely.Polygon(REGION.vertices).buffer(-(radii[k] + pad),
                                                            join_style="mitre")
        planes = separating_halfplanes(snap, name, 0.1)
        for normal, offset in zip(planes.normals, planes.offsets, strict=True):
            along = np.array([-normal[1], normal[0]])
            foot = normal * (offset - pad)
            reference = reference.intersection(shapely.Polygon([
                foot + 100 * along, foot - 100 * along,
                foot - 100 * along - 100 * normal, foot + 100 * along - 100 * normal]))
        assert ours.area == pytest.approx(reference.area, rel=1e-9)
        assert ours.symmetric_difference(reference).area < 1e-9


def test_admissible_point_is_shapelys_nearest_point_of_the_cell() -> None:
    positions = np.array([[1.0, 1.5], [2.4, 1.5]])
    targets = np.array([[2.0, 2.0], [0.5, 0.2]])
    radii = np.array([0.4, 0.4])
    A, b = REGION.halfspaces()
    points, has_cell = admissible_points(("a", "b"), positions, targets, radii, 0.1,
                                         REGION.vertices, A, b)
    assert has_cell.all()
    snap = FleetSnapshot(0.0, ("a", "b"), positions, np.zeros(2), radii, np.zeros(2))
    for k, name in enumerate(("a", "b")):
        cell = shapely.Polygon(buffered_cell_polygon(snap, name, 0.1, REGION.vertices, A, b))
        nearest = shapely.shortest_line(cell, shapely.Point(targets[k])).coords[0]
        assert points[k] == pytest.approx(nearest, abs=1e-9)


def test_admissible_points_of_crowded_and_spread_fleets_are_shapelys_nearest_points() -> None:
    """Random fleets of 2-12 robots (radii, pads and margins varied, some targets inside
    their cells, some beyond): every robot's admissible point is shapely's nearest point of
    its buffered cell (clipped as above), and the all-robots-at-once check that skips the
    clipping vouches only for targets shapely finds inside the cell (fails if that check
    drops a row, e.g. the pad on the half-planes)."""
    rng = np.random.default_rng(11)
    A, b = REGION.halfspaces()
    vouched = 0
    for _ in range(60):
        n = int(rng.integers(2, 13))
        positions = rng.uniform([0.3, 0.3], [3.7, 2.7], (n, 2))
        targets = positions + rng.normal(0.0, rng.choice([0.05, 0.3, 1.0]), (n, 2))
        radii = rng.uniform(0.05, 0.3, n)
        pads = rng.uniform(0.0, 0.1, n)
        margin = float(rng.uniform(0.0, 0.1))
        names = tuple(f"r{k}" for k in range(n))
        points, has_cell = admissible_points(names, positions, targets, radii, margin,
                                             REGION.vertices, A, b, pads)
        snap = FleetSnapshot(0.0, names, positions, np.zeros(n), radii, np.zeros(n))
        inside = targets_well_inside(snap, targets, margin, A, b, pads)
        vouched += int(inside.sum())
        for k, name in enumerate(names):
            vertices = buffered_cell_polygon(snap, name, margin, REGION.vertices, A, b,
                                             float(pads[k]))
            assert has_cell[k] == (len(vertices) >= 3)
            if not has_cell[k]:
                assert not inside[k]
                continue
            cell = shapely.Polygon(vertices)
            target = shapely.Point(targets[k])
            if inside[k]:
                assert cell.contains(target)
            nearest = shapely.shortest_line(cell, target).coords[0]
            assert points[k] == pytest.approx(nearest, abs=1e-9)
    assert vouched > 0  # the check took its shortcut in some fleets


# --- held Lloyd, the held CVT gap and "settled" --------------------------------------------

# Worked example: 4 m x 3 m, uniform density 1, two robots of radius 0.9 m, margin 0.3 m.
# Unconstrained, the CVT splits the rectangle into two 2 x 3 halves with generators at their
# centroids (1, 1.5) and (3, 1.5) (Du, Faber & Gunzburger 1999, sec. 2), cost 2 J with J =
# M (w^2 + h^2) / 12 = 6 * 13 / 12 = 6.5: H = 13. The robots' buffered cells end at the
# separating lines x = 2 -/+ (0.9 + 0.15) = 0.95 / 3.05, short of the centroids, so the
# held rest is (0.95, 1.5), (3.05, 1.5), with H = 2 (6.5 + 6 * 0.05^2) = 13.03
# (parallel-axis theorem).
RADIUS, MARGIN = 0.9, 0.3
HELD_REST = np.array([[0.95, 1.5], [3.05, 1.5]])
HELD_COST = 2 * (6.5 + 6 * 0.05**2)


def test_held_lloyd_rests_at_the_cell_boundary_of_the_worked_example() -> None:
    # Symmetric under the half turn about the centre (2, 1.5), which the iteration keeps
    # (uniform density, symmetric rectangle), so it ends at the symmetric rest.
    start = np.array([[0.5, 0.7], [3.5, 2.3]])
    result = held_lloyd(start, REGION, UniformDensity(), np.full(2, RADIUS), MARGIN,
                        max_iterations=500, tolerance=1e-9)
    assert result.converged
    assert result.positions[-1] == pytest.approx(HELD_REST, abs=1e-6)
    assert result.costs[-1] == pytest.approx(HELD_COST, rel=1e-6)
    assert np.all(np.diff(result.costs) <= 1e-9)  # never rises (projection argument)
    plain = lloyd(start, REGION, UniformDensity(), max_iterations=500, tolerance=1e-9)
    assert plain.costs[-1] == pytest.approx(13.0, rel=1e-6)


def test_pressed_pairs_rest_anywhere_their_centroids_push_them_together() -> None:
    """Once two robots press on their shared line, neither cell lets them move: every
    shifted pair (a, a + 2.1) with 0.9 <= a < 1.05 is a rest (left centroid (a + 1.05) / 2
    >= a, right centroid (a + 5.05) / 2 <= a + 2.1, by the worked example's halves), so
    the held iteration finds nothing to gain there (held CVT gap 0) although the cost is
    above the symmetric rest's. A robot held like this counts as settled; the plain CVT
    gap shows the price."""
    for a in (0.91, 0.95, 1.04):
        rest = np.array([[a, 1.5], [a + 2.1, 1.5]])
        result = held_lloyd(rest, REGION, UniformDensity(), np.full(2, RADIUS), MARGIN,
                            max_iterations=10, tolerance=1e-9)
        assert result.converged and result.iterations == 0
        assert result.costs[0] >= HELD_COST - 1e-9


def test_held_lloyd_is_lloyd_where_no_cell_binds() -> None:
    start = np.array([[0.5, 0.7], [3.4, 2.3]])
    held = held_lloyd(start, REGION, UniformDensity(), np.full(2, 0.1), 0.0,
                      max_iterations=60, tolerance=0.0)
    plain = lloyd(start, REGION, UniformDensity(), max_iterations=60, tolerance=0.0)
    assert held.positions[-1] == pytest.approx(plain.positions[-1], abs=1e-9)


def test_held_cvt_gap_is_zero_at_the_held_rest_where_the_plain_gap_is_not() -> None:
    cells = HeldCells(REGION, {"a": RADIUS, "b": RADIUS}, {"a": 0.0, "b": 0.0}, MARGIN)
    held = held_cvt_gap(HELD_REST, ["a", "b"], REGION, UniformDensity(), cells)
    plain = cvt_gap(HELD_REST, REGION, UniformDensity())
    assert held["held_cvt_gap"] == pytest.approx(0.0, abs=1e-9)
    assert plain["cvt_gap"] == pytest.approx((HELD_COST - 13.0) / HELD_COST, rel=1e-4)


def feed_rest(monitor: SettleMonitor, positions: np.ndarray, seconds: float) -> str:
    names = ("a", "b")
    centroids = {"a": np.array([1.0, 1.5]), "b": np.array([3.0, 1.5])}
    status = "moving"
    for t in np.arange(0.0, seconds, 0.1):
        status = monitor.update(
            float(t), {n: positions[k] for k, n in enumerate(names)}, dict.fromkeys(names, 0.0),
            centroids, gate_shut=True)
    return status


def test_a_robot_held_at_its_cell_boundary_is_settled_not_stuck() -> None:
    """0.05 m short of the centroids with the settle distance 0.02 m: without the cells the
    fleet is stuck, with them (the robots can get no closer) it is settled."""
    plain = SettleSettings(distance=0.02, speed=0.02, dwell=2.0, stuck_timeout=5.0)
    cells = HeldCells(REGION, {"a": RADIUS, "b": RADIUS}, {"a": 0.0, "b": 0.0}, MARGIN)
    assert feed_rest(SettleMonitor(plain), HELD_REST, 6.0) == "stuck"
    held = SettleSettings(distance=0.02, speed=0.02, dwell=2.0, stuck_timeout=5.0, cells=cells)
    assert feed_rest(SettleMonitor(held), HELD_REST, 6.0) == "settled"
    # A robot that could still get closer inside its cell is not settled.
    short = HELD_REST + np.array([[-0.3, 0.0], [0.0, 0.0]])
    assert feed_rest(SettleMonitor(held), short, 6.0) == "stuck"
