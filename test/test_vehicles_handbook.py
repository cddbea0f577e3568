"""Model behaviour against handbook results: bicycle turning radius, vessel and multirotor
terminal speeds under linear damping, unicycle circles, the speed polygon against a disc
(shapely), braking in one period, and the car's Twist mapping at standstill."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from shapely.geometry import Point, Polygon

from coverage_fleet.vehicles.base import CommandValues
from coverage_fleet.vehicles.car_like import CarLikeModel
from coverage_fleet.vehicles.loader import VehicleSpec, load_vehicle_file
from coverage_fleet.vehicles.multirotor import MultirotorModel
from coverage_fleet.vehicles.planar import disc_polygon

REPO = Path(__file__).resolve().parents[1]


def sample(name: str) -> VehicleSpec:
    return load_vehicle_file(REPO / "config" / "vehicles" / f"{name}.yaml")


def rollout(spec: VehicleSpec, x0, u, steps: int) -> np.ndarray:
    step = spec.model.discrete_dynamics(spec.mpc.sample_time, spec.mpc.substeps)
    states = [np.asarray(x0, dtype=float)]
    for _ in range(steps):
        states.append(np.asarray(step(states[-1], u)).ravel())
    return np.array(states)


@pytest.mark.parametrize("steering", [0.1, 0.3, -0.45])
def test_bicycle_at_constant_steering_drives_circle_of_radius_l_over_tan_delta(
    steering: float,
) -> None:
    """Rajamani, "Vehicle Dynamics and Control", 2nd ed., 2012, sec. 2.2: with the
    reference point at the rear axle (slip angle zero) the turning radius is L / tan(delta)."""
    spec = sample("car_like")
    model = spec.model
    radius = model.wheelbase / math.tan(abs(steering))
    x0 = np.array([2.0, -1.0, 0.4, 1.5])
    states = rollout(spec, x0, np.array([0.0, steering]), 150)
    side = math.copysign(1.0, steering)  # centre to the left for positive steering
    centre = x0[:2] + side * radius * np.array([-math.sin(x0[2]), math.cos(x0[2])])
    distances = np.linalg.norm(states[:, :2] - centre, axis=1)
    assert np.max(np.abs(distances - radius)) < 1e-6
    # and it went more than once around, so the circle is really traced out
    travelled = 1.5 * spec.mpc.sample_time * 150
    assert travelled > 2 * math.pi * radius
    assert np.allclose(states[:, 3], 1.5)


def test_vessel_surge_under_constant_force_follows_linear_damping() -> None:
    """Fossen, "Handbook of Marine Craft Hydrodynamics and Motion Control", 2011, ch. 6-7,
    linear damping: m11 u' + d11 u = X gives u(t) = X/d11 (1 - exp(-d11 t / m11)), steady
    surge speed X/d11, and with no sway force or yaw moment a straight track at the heading."""
    spec = sample("surface_vessel")
    model = spec.model
    force = 30.0
    heading = 0.7
    steps = 300
    states = rollout(spec, [1.0, 2.0, heading, 0.0, 0.0, 0.0], np.array([force, 0.0, 0.0]), steps)
    m, d = model.mass[0], model.damping[0]
    t = spec.mpc.sample_time * np.arange(steps + 1)
    expected_surge = force / d * (1.0 - np.exp(-d * t / m))
    assert np.max(np.abs(states[:, 3] - expected_surge)) < 1e-7
    assert states[-1, 3] == pytest.approx(force / d, abs=1e-9)  # 1.2 m/s here
    assert np.max(np.abs(states[:, 4:6])) == 0.0 and np.all(states[:, 2] == heading)
    along = (states[:, :2] - [1.0, 2.0]) @ [math.cos(heading), math.sin(heading)]
    across = (states[:, :2] - [1.0, 2.0]) @ [-math.sin(heading), math.cos(heading)]
    expected_along = force / d * (t - m / d * (1.0 - np.exp(-d * t / m)))
    assert np.max(np.abs(across)) < 1e-9
    assert np.max(np.abs(along - expected_along)) < 1e-6


def test_multirotor_terminal_speed_is_acceleration_over_drag() -> None:
    """First-order linear drag v' = a - c v settles at v = a / c (common practice)."""
    spec = sample("multirotor")
    model = spec.model
    a = np.array([0.48, -0.36])  # |a| = 0.6 m/s^2 -> 2 m/s at c = 0.3 1/s
    states = rollout(spec, [0.0, 0.0, 0.0, 0.0], a, 600)
    assert np.allclose(states[-1, 2:], a / model.drag, atol=1e-9)


def test_unicycle_constant_twist_drives_circle_of_radius_v_over_w() -> None:
    """Unicycle kinematics: constant v and w trace a circle of radius v / w (common practice)."""
    spec = sample("differential_drive")
    v, w = 0.8, 0.5
    states = rollout(spec, [0.0, 0.0, 0.0], np.array([v, w]), 200)
    centre = np.array([0.0, v / w])
    assert np.max(np.abs(np.linalg.norm(states[:, :2] - centre, axis=1) - v / w)) < 1e-6


@pytest.mark.parametrize("sides", [6, 8, 12])
def test_speed_polygon_inner_and_outer_fit_against_the_disc(sides: int) -> None:
    """Checked with shapely (a general-purpose geometry library): the inner polygon lies
    inside the speed disc with its vertices on the circle; the outer one contains the disc."""
    radius = 3.0
    disc = Point(0.0, 0.0).buffer(radius, quad_segs=512)
    # shapely's disc is a 2048-gon inscribed in the circle: it falls short of the circle by
    # at most radius (1 - cos(pi / 2048)) = 3.5e-6 m, hence the 1e-5 allowance below.
    for fit in ("inner", "outer"):
        H, h = disc_polygon(radius, sides, fit)
        polygon = polygon_from_halfspaces(H, h)
        assert len(polygon.exterior.coords) - 1 == sides
        if fit == "inner":
            assert disc.buffer(1e-5).contains(polygon)
            corners = np.array(polygon.exterior.coords)[:-1]
            assert np.allclose(np.linalg.norm(corners, axis=1), radius)
        else:
            assert polygon.buffer(1e-9).contains(disc)
            assert polygon.area == pytest.approx(sides * radius**2 * math.tan(math.pi / sides))


def polygon_from_halfspaces(H: np.ndarray, h: np.ndarray) -> Polygon:
    """Vertices of a regular polygon from consecutive face pairs."""
    corners = []
    for k in range(len(h)):
        j = (k + 1) % len(h)
        corners.append(np.linalg.solve(np.vstack([H[k], H[j]]), [h[k], h[j]]))
    return Polygon(corners)


def test_multirotor_state_polytope_limits_velocity_only() -> None:
    model = MultirotorModel(
        {"max_speed": 2.0, "max_acceleration": 1.0, "footprint_radius": 0.4}, "<inline>"
    )
    G, g = model.state_polytope()
    assert np.all(G[:, :2] == 0.0)
    # straight along x at the rated speed violates the inner octagon (its face is at
    # 2 cos(pi/8) m/s), at the face speed it holds
    face_speed = 2.0 * math.cos(math.pi / 8)
    assert np.all(G @ [100.0, -50.0, face_speed, 0.0] <= g + 1e-12)
    assert np.any(g < G @ [0.0, 0.0, 2.0, 0.0])


def test_braking_stops_within_one_period_when_the_limits_allow() -> None:
    for name, moving in [
        ("car_like", [0.0, 0.0, 1.0, 0.3]),
        ("multirotor", [0.0, 0.0, 0.1, -0.1]),
        ("surface_vessel", [0.0, 0.0, 1.0, 0.05, -0.02, 0.01]),
    ]:
        spec = sample(name)
        u = spec.model.braking_input(np.array(moving))
        after = rollout(spec, moving, u, 1)[-1]
        family = spec.model.steady_states()
        pinned = np.all(family.Mx == 0.0, axis=1)
        # RK4's error on the closed-form stop is O(h^5) per step: well under 1e-6 m/s.
        assert np.max(np.abs(after[pinned])) < 1e-6, name


def test_car_twist_mapping_and_standstill() -> None:
    spec = sample("car_like")
    model: CarLikeModel = spec.model
    x = np.array([0.0, 0.0, 0.0, 2.0])
    command = model.command_from_input(np.array([1.0, 0.3]), x)
    speed_after = 2.0 + 1.0 * spec.mpc.sample_time
    assert command.linear[0] == pytest.approx(speed_after)
    assert command.angular[2] == pytest.approx(speed_after * math.tan(0.3) / model.wheelbase)
    # At standstill a yaw-rate request cannot be steered: wheels straight, no NaN.
    at_rest = np.array([0.0, 0.0, 0.0, 0.0])
    u = model.input_from_command(CommandValues("twist", (0.0, 0.0, 0.0), (0, 0, 0.7)), at_rest)
    assert u.tolist() == [0.0, 0.0]
    # A slow crawl with a large yaw-rate request saturates the steering limit.
    u = model.input_from_command(CommandValues("twist", (0.01, 0.0, 0.0), (0, 0, 0.7)), at_rest)
    assert u[1] == pytest.approx(model.max_steering_angle)
    # Odometry reports the yaw rate the steering gives.
    odom = model.odometry_from_state(x, np.array([0.0, 0.3]))
    assert odom.yaw_rate == pytest.approx(2.0 * math.tan(0.3) / model.wheelbase)
