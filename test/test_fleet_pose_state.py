"""The state formed from localization poses (fleet/pose_state.py), against closed forms."""

from __future__ import annotations

import math

import pytest

from coverage_fleet.fleet.message_checks import STAMP_PAST, TOO_UNCERTAIN, BadMessageError
from coverage_fleet.fleet.pose_state import PoseVelocity, check_position_covariance, position_std


def test_raw_differences_give_the_body_velocity_of_straight_motion() -> None:
    # 1 m/s along a heading of 30 degrees: in the body frame that is (1, 0) (REP 103 body
    # axes; rotation of a planar vector, common practice).
    heading, speed, dt = math.radians(30.0), 1.0, 0.1
    velocity = PoseVelocity(time_constant=0.0)
    first = velocity.update(0.0, 0.0, heading, 0.0)
    assert (first.body_vx, first.body_vy, first.yaw_rate) == (0.0, 0.0, 0.0)
    state = velocity.update(speed * dt * math.cos(heading), speed * dt * math.sin(heading),
                            heading, dt)
    assert state.body_vx == pytest.approx(1.0, abs=1e-12)
    assert state.body_vy == pytest.approx(0.0, abs=1e-12)


def test_filter_follows_the_first_order_step_response() -> None:
    # A discrete first-order low-pass with weight w = dt / (tau + dt) reaches
    # 1 - (1 - w)^n of a step after n samples (backward-Euler discretisation of
    # tau dv/dt = u - v; Franklin, Powell and Workman, "Digital Control of Dynamic Systems",
    # 3rd ed., 1998, ch. 6; section from memory).
    tau, dt, steps = 0.2, 0.05, 12
    velocity = PoseVelocity(time_constant=tau)
    velocity.update(0.0, 0.0, 0.0, 0.0)
    for n in range(1, steps + 1):
        state = velocity.update(0.5 * n * dt, 0.0, 0.0, n * dt)  # 0.5 m/s from the start
    weight = dt / (tau + dt)
    assert state.body_vx == pytest.approx(0.5 * (1.0 - (1.0 - weight) ** steps), rel=1e-12)


def test_turn_rate_across_the_heading_wrap_and_stale_poses_refused() -> None:
    velocity = PoseVelocity(time_constant=0.0)
    velocity.update(0.0, 0.0, math.pi - 0.05, 1.0)
    state = velocity.update(0.0, 0.0, -math.pi + 0.05, 1.1)  # +0.1 rad through +-pi
    assert state.yaw_rate == pytest.approx(1.0, abs=1e-9)
    with pytest.raises(BadMessageError) as refused:
        velocity.update(0.0, 0.0, 0.0, 1.1)
    assert refused.value.reason == STAMP_PAST


def test_position_covariance_worst_direction() -> None:
    # Eigenvalues of [[a, b], [b, a]] are a +- b (closed form), so the worst direction has
    # variance 1.5 m^2 here.
    covariance = [0.0] * 36
    covariance[0] = covariance[7] = 1.0
    covariance[1] = covariance[6] = 0.5
    assert position_std(covariance) == pytest.approx(math.sqrt(1.5), rel=1e-12)
    check_position_covariance(covariance, 1.3)
    with pytest.raises(BadMessageError) as refused:
        check_position_covariance(covariance, 1.2)
    assert refused.value.reason == TOO_UNCERTAIN
