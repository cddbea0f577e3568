"""Fully actuated surface vessel, 3 degrees of freedom (surge, sway, yaw), low-speed linear
model (Fossen, "Handbook of Marine Craft Hydrodynamics and Motion Control", 2011, ch. 6-7:
kinematics eta' = R(psi) nu; kinetics M nu' + D nu = tau with diagonal rigid-body plus
added mass M and linear damping D; Coriolis and nonlinear damping neglected, as for
dynamic-positioning speeds):

    x' = u cos(psi) - v sin(psi),  y' = u sin(psi) + v cos(psi),  psi' = r
    m11 u' = X - d11 u,  m22 v' = Y - d22 v,  m33 r' = N - d33 r

State (x, y, yaw in `map`; u, v, r in the body frame `base_link`); input (X surge force N,
Y sway force N, N yaw moment N m), sent as geometry_msgs/Wrench (force.x, force.y,
torque.z; body frame). Stabilisable at rest.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import casadi as ca
import numpy as np

from coverage_fleet.vehicles.base import (
    CommandValues,
    OdometryValues,
    SteadyStateFamily,
    VehicleModel,
)
from coverage_fleet.vehicles.braking import stopping_force
from coverage_fleet.vehicles.parameters import (
    DAMPING_MAX,
    FORCE_MAX,
    INERTIA_MAX,
    LENGTH_MAX,
    MASS_MAX,
    SPEED_MAX,
    YAW_RATE_MAX,
    ParameterReader,
)
from coverage_fleet.vehicles.planar import wrap_angle


class SurfaceVesselModel(VehicleModel):
    kind = "surface_vessel"
    state_names = ("x", "y", "yaw", "surge", "sway", "yaw_rate")
    input_names = ("surge_force", "sway_force", "yaw_moment")
    angle_indices = (2,)
    command_kind = "wrench"
    stabilisable_at_rest = True

    def __init__(self, params: Mapping[str, Any], source: str) -> None:
        super().__init__(params, source)
        read = ParameterReader(params, source)
        self.mass = np.array(
            [
                read.positive("mass_surge", maximum=MASS_MAX),
                read.positive("mass_sway", maximum=MASS_MAX),
                read.positive("inertia_yaw", maximum=INERTIA_MAX),
            ]
        )
        self.damping = np.array(
            [
                read.non_negative("damping_surge", maximum=DAMPING_MAX),
                read.non_negative("damping_sway", maximum=DAMPING_MAX),
                read.non_negative("damping_yaw", maximum=DAMPING_MAX),
            ]
        )
        self.max_force = np.array(
            [
                read.positive("max_surge_force", maximum=FORCE_MAX),
                read.positive("max_sway_force", maximum=FORCE_MAX),
                read.positive("max_yaw_moment", maximum=FORCE_MAX),
            ]
        )
        self.max_surge_speed = read.positive("max_surge_speed", maximum=SPEED_MAX)
        self.max_reverse_speed = read.non_negative("max_reverse_speed", 0.0, maximum=SPEED_MAX)
        self.max_sway_speed = read.positive("max_sway_speed", maximum=SPEED_MAX)
        self.max_yaw_rate = read.positive("max_yaw_rate", maximum=YAW_RATE_MAX)
        self._footprint_radius = read.positive("footprint_radius", maximum=LENGTH_MAX)
        read.finish()

    @property
    def footprint_radius(self) -> float:
        return self._footprint_radius

    @property
    def max_planar_speed(self) -> float:
        return math.hypot(max(self.max_surge_speed, self.max_reverse_speed), self.max_sway_speed)

    def continuous_dynamics(self, x: ca.SX, u: ca.SX) -> ca.SX:
        psi, surge, sway, r = x[2], x[3], x[4], x[5]
        m, d = self.mass, self.damping
        return ca.vertcat(
            surge * ca.cos(psi) - sway * ca.sin(psi),
            surge * ca.sin(psi) + sway * ca.cos(psi),
            r,
            (u[0] - d[0] * surge) / m[0],
            (u[1] - d[1] * sway) / m[1],
            (u[2] - d[2] * r) / m[2],
        )

    def state_bounds(self) -> tuple[np.ndarray, np.ndarray]:
        upper = np.array(
            [np.inf, np.inf, np.inf, self.max_surge_speed, self.max_sway_speed, self.max_yaw_rate]
        )
        lower = -upper
        lower[3] = -self.max_reverse_speed
        return lower, upper

    def input_bounds(self) -> tuple[np.ndarray, np.ndarray]:
        return -self.max_force.copy(), self.max_force.copy()

    def steady_states(self) -> SteadyStateFamily:
        Mx = np.zeros((6, 3))
        Mx[0, 0] = Mx[1, 1] = Mx[2, 2] = 1.0
        return SteadyStateFamily(("x", "y", "yaw"), Mx, np.zeros(6), np.zeros((3, 3)), np.zeros(3))

    def braking_input(self, x: np.ndarray) -> np.ndarray:
        # Each degree of freedom is decoupled: stop it within one command period if the
        # force limit allows, otherwise push against it as hard as allowed.
        wanted = np.array(
            [
                stopping_force(m, d, float(s), self.command_period)
                for m, d, s in zip(self.mass, self.damping, x[3:6], strict=True)
            ]
        )
        return np.clip(wanted, -self.max_force, self.max_force)

    def state_from_odometry(self, odom: OdometryValues) -> np.ndarray:
        return np.array(
            [odom.x, odom.y, odom.yaw, odom.body_vx, odom.body_vy, odom.yaw_rate], dtype=float
        )

    def odometry_from_state(self, x: np.ndarray, u: np.ndarray | None = None) -> OdometryValues:
        return OdometryValues(
            x=float(x[0]),
            y=float(x[1]),
            yaw=wrap_angle(float(x[2])),
            body_vx=float(x[3]),
            body_vy=float(x[4]),
            yaw_rate=float(x[5]),
        )

    def command_from_input(self, u: np.ndarray, x: np.ndarray) -> CommandValues:
        return CommandValues("wrench", (float(u[0]), float(u[1]), 0.0), (0.0, 0.0, float(u[2])))

    def input_from_command(self, command: CommandValues, x: np.ndarray) -> np.ndarray:
        tau = np.array([command.linear[0], command.linear[1], command.angular[2]], dtype=float)
        return np.clip(np.nan_to_num(tau, nan=0.0), -self.max_force, self.max_force)
