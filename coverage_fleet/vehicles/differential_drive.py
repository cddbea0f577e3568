"""Differential-drive rover as a unicycle (kinematic; common practice for wheeled ground
robots that do not slip).

    x' = v cos(yaw),  y' = v sin(yaw),  yaw' = w

State (x, y, yaw) in `map`; input (v forward speed m/s, w yaw rate rad/s), sent as
geometry_msgs/Twist (linear.x = v, angular.z = w; REP 103 body frame). At rest the
linearisation cannot move sideways, so it is not stabilisable: terminal equality only.
"""

from __future__ import annotations

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
from coverage_fleet.vehicles.parameters import (
    LENGTH_MAX,
    SPEED_MAX,
    YAW_RATE_MAX,
    ParameterReader,
)
from coverage_fleet.vehicles.planar import wrap_angle


class DifferentialDriveModel(VehicleModel):
    kind = "differential_drive"
    state_names = ("x", "y", "yaw")
    input_names = ("forward_speed", "yaw_rate")
    angle_indices = (2,)
    command_kind = "twist"
    stabilisable_at_rest = False

    def __init__(self, params: Mapping[str, Any], source: str) -> None:
        super().__init__(params, source)
        read = ParameterReader(params, source)
        self.max_speed = read.positive("max_speed", maximum=SPEED_MAX)
        self.max_reverse_speed = read.non_negative("max_reverse_speed", 0.0, maximum=SPEED_MAX)
        self.max_yaw_rate = read.positive("max_yaw_rate", maximum=YAW_RATE_MAX)
        self._footprint_radius = read.positive("footprint_radius", maximum=LENGTH_MAX)
        read.finish()

    @property
    def footprint_radius(self) -> float:
        return self._footprint_radius

    @property
    def max_planar_speed(self) -> float:
        return max(self.max_speed, self.max_reverse_speed)

    def continuous_dynamics(self, x: ca.SX, u: ca.SX) -> ca.SX:
        return ca.vertcat(u[0] * ca.cos(x[2]), u[0] * ca.sin(x[2]), u[1])

    def state_bounds(self) -> tuple[np.ndarray, np.ndarray]:
        return np.full(3, -np.inf), np.full(3, np.inf)

    def input_bounds(self) -> tuple[np.ndarray, np.ndarray]:
        return (
            np.array([-self.max_reverse_speed, -self.max_yaw_rate]),
            np.array([self.max_speed, self.max_yaw_rate]),
        )

    def steady_states(self) -> SteadyStateFamily:
        # Any pose at rest: theta = (x, y, yaw), zero input.
        return SteadyStateFamily(
            parameter_names=("x", "y", "yaw"),
            Mx=np.eye(3),
            x0=np.zeros(3),
            Mu=np.zeros((2, 3)),
            u0=np.zeros(2),
        )

    def braking_input(self, x: np.ndarray) -> np.ndarray:
        # Kinematic model: zero commanded speed is rest.
        return np.zeros(2)

    def state_from_odometry(self, odom: OdometryValues) -> np.ndarray:
        return np.array([odom.x, odom.y, odom.yaw], dtype=float)

    def odometry_from_state(self, x: np.ndarray, u: np.ndarray | None = None) -> OdometryValues:
        speed, yaw_rate = (0.0, 0.0) if u is None else (float(u[0]), float(u[1]))
        return OdometryValues(
            x=float(x[0]),
            y=float(x[1]),
            yaw=wrap_angle(float(x[2])),
            body_vx=speed,
            yaw_rate=yaw_rate,
        )

    def command_from_input(self, u: np.ndarray, x: np.ndarray) -> CommandValues:
        return CommandValues("twist", (float(u[0]), 0.0, 0.0), (0.0, 0.0, float(u[1])))

    def input_from_command(self, command: CommandValues, x: np.ndarray) -> np.ndarray:
        lower, upper = self.input_bounds()
        u = np.array([command.linear[0], command.angular[2]], dtype=float)
        return np.clip(np.nan_to_num(u, nan=0.0), lower, upper)


