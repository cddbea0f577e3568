"""The geofence (control/geofence.py): modes and the shifted return problem.

Outside references: the distance of a point outside the region and its nearest boundary
point come from shapely (general-purpose geometry library: `Polygon.exterior.distance`,
`shapely.ops.nearest_points`); that the shifted problem is the real one follows from the
position invariance of the vehicle dynamics (a shift of the position states does not
change f; ARCHITECTURE, "Position invariance"), checked here by the MPC's first input for a
differential-drive rover at rest outside the region, facing it: it must drive forward
(towards the region), which the unshifted problem cannot do (the region constraint is
infeasible from outside).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from shapely.geometry import Point, Polygon
from shapely.ops import nearest_points

from coverage_fleet.control import geofence as gf
from coverage_fleet.geometry.region import ConvexRegion
from coverage_fleet.vehicles.base import OdometryValues

SQUARE = [(0.0, 0.0), (10.0, 0.0), (10.0, 8.0), (0.0, 8.0)]
REGION = ConvexRegion.from_vertices(SQUARE)
SETTINGS = gf.GeofenceSettings(margin=0.5, rest_speed=0.05, inset=0.5)
VEHICLES = Path(__file__).resolve().parents[1] / "config" / "vehicles"


@pytest.mark.parametrize("point", [(12.0, 4.0), (-3.0, 9.5), (5.0, -0.2), (11.0, 11.0)])
def test_distance_outside_and_the_return_direction_match_shapely(point) -> None:
    fence = gf.Geofence(REGION, SETTINGS)
    polygon = Polygon(SQUARE)
    assert fence.distance_outside(point) == pytest.approx(polygon.exterior.distance(Point(point)))
    problem = fence.return_problem(point)
    nearest = np.array(nearest_points(polygon.exterior, Point(point))[0].coords[0])
    inward = (nearest - np.array(point)) / np.linalg.norm(nearest - np.array(point))
    start = np.array(point) + problem.shift
    # The shifted robot stands `inset` inside, beside the nearest boundary point ...
    assert np.allclose(start, nearest + SETTINGS.inset * inward)
    assert REGION.contains(start)[0] and REGION.contains(problem.target)[0]
    # ... and its target lies inwards from it, along the real robot's way back.
    way = problem.target - start
    assert np.dot(way, inward) > 0
    assert np.allclose(way / np.linalg.norm(way), inward, atol=0.2)


def test_modes_brake_outside_then_return_at_rest_then_track_inside() -> None:
    fence = gf.Geofence(REGION, SETTINGS)
    assert fence.update((5.0, 4.0), 1.0) == gf.INSIDE
    assert fence.update((10.3, 4.0), 1.0) == gf.INSIDE  # within the margin
    assert fence.update((11.0, 4.0), 1.0) == gf.BRAKING
    assert fence.update((11.2, 4.0), 0.3) == gf.BRAKING  # still moving: keep braking
    assert fence.update((11.2, 4.0), 0.01) == gf.RETURNING
    assert fence.update((10.4, 4.0), 0.2) == gf.RETURNING  # within the margin, still outside
    assert fence.update((9.9, 4.0), 0.2) == gf.INSIDE
    assert fence.outside == 0.0


def test_the_shifted_problem_drives_a_rover_outside_back_towards_the_region() -> None:
    from coverage_fleet.control.controller import RobotController
    from coverage_fleet.control.terminal import terminal_for_vehicle
    from coverage_fleet.vehicles.loader import load_vehicle_file

    spec = load_vehicle_file(VEHICLES / "differential_drive.yaml")
    model = spec.model
    terminal, _ = terminal_for_vehicle(spec)
    controller = RobotController(model, spec.mpc, REGION.halfspaces(), terminal)
    fence = gf.Geofence(REGION, SETTINGS)
    # At rest 2 m east of the region, facing west (towards it).
    x = np.asarray(model.state_from_odometry(OdometryValues(12.0, 4.0, np.pi)), float)
    problem = fence.return_problem(model.position(x))
    shifted = x.copy()
    shifted[list(model.position_indices)] += problem.shift
    step = controller.step(shifted, problem.target)
    assert step.success and not step.used_fallback, step.status
    command = model.command_from_input(step.input, x)
    assert command.linear[0] > 0.0, command  # forward, i.e. west, into the region
    # Positive control: the unshifted problem from outside finds no plan of its own.
    stuck = RobotController(model, spec.mpc, REGION.halfspaces(), terminal).step(
        x, problem.target - problem.shift
    )
    assert not stuck.success or stuck.used_fallback
