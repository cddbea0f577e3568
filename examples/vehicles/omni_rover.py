"""Worked example of a user-supplied vehicle model: an omnidirectional (mecanum-wheel) rover.

Not a built-in: a vehicle file selects it by import path once this folder is importable,
e.g. `PYTHONPATH=examples/vehicles`, with `model: omni_rover:OmniRoverModel`.

    x' = cos(yaw) vx - sin(yaw) vy,  y' = sin(yaw) vx + cos(yaw) vy,  yaw' = w

State (x, y, yaw) in `map`; input (vx, vy body-frame velocity m/s, w yaw rate rad/s), sent
as geometry_msgs/Twist (linear.x, linear.y, angular.z). It can move sideways, so unlike the
unicycle its linearisation at rest is stabilisable.
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
from coverage_fleet.vehicles.parameters import (
    LENGTH_MAX,
    SPEED_MAX,
    YAW_RATE_MAX,
    ParameterReader,
)
from coverage_fleet.vehicles.planar import wrap_angle


class OmniRoverModel(VehicleModel):
    kind = "omni_rover"
    state_names = ("x", "y", "yaw")
    input_names = ("body_vx", "body_vy", "yaw_rate")
    angle_indices = (2,)  # yaw: kept continuous in the state, wrapped in odometry
    command_kind = "twist"
    stabilisable_at_rest = True

    def __init__(self, params: Mapping[str, Any], source: str) -> None:
        super().__init__(params, source)
        read = ParameterReader(params, source)  # reports bad keys as vehicle.<name>
        self.max_speed = read.positive("max_speed", maximum=SPEED_MAX)
        self.max_yaw_rate = read.positive("max_yaw_rate", maximum=YAW_RATE_MAX)
        self._footprint_radius = read.positive("footprint_radius", maximum=LENGTH_MAX)
        read.finish()

    @property
    def footprint_radius(self) -> float:
        return self._footprint_radius

    @property
    def max_planar_speed(self) -> float:
        return math.sqrt(2.0) * self.max_speed  # the speed box's corner

    def continuous_dynamics(self, x: ca.SX, u: ca.SX) -> ca.SX:
        c, s = ca.cos(x[2]), ca.sin(x[2])
        return ca.vertcat(c * u[0] - s * u[1], s * u[0] + c * u[1], u[2])

    def state_bounds(self) -> tuple[np.ndarray, np.ndarray]:
        return np.full(3, -np.inf), np.full(3, np.inf)

    def input_bounds(self) -> tuple[np.ndarray, np.ndarray]:
        upper = np.array([self.max_speed, self.max_speed, self.max_yaw_rate])
        return -upper, upper

    def steady_states(self) -> SteadyStateFamily:
        return SteadyStateFamily(("x", "y", "yaw"), np.eye(3), np.zeros(3), np.zeros((3, 3)),
                                 np.zeros(3))

    def braking_input(self, x: np.ndarray) -> np.ndarray:
        return np.zeros(3)

    def state_from_odometry(self, odom: OdometryValues) -> np.ndarray:
        return np.array([odom.x, odom.y, odom.yaw])

    def odometry_from_state(self, x: np.ndarray, u: np.ndarray | None = None) -> OdometryValues:
        vx, vy, w = (0.0, 0.0, 0.0) if u is None else (float(u[0]), float(u[1]), float(u[2]))
        return OdometryValues(float(x[0]), float(x[1]), wrap_angle(float(x[2])), vx, vy, w)

    def command_from_input(self, u: np.ndarray, x: np.ndarray) -> CommandValues:
        return CommandValues("twist", (float(u[0]), float(u[1]), 0.0), (0.0, 0.0, float(u[2])))

    def input_from_command(self, command: CommandValues, x: np.ndarray) -> np.ndarray:
        u = np.array([command.linear[0], command.linear[1], command.angular[2]], dtype=float)
        lower, upper = self.input_bounds()
        return np.clip(np.nan_to_num(u, nan=0.0), lower, upper)
