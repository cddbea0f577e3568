"""Multirotor in the horizontal plane: a double integrator with linear drag.

    p' = v,  v' = a - drag * v

State (px, py, vx, vy) in `map`; input (ax, ay) m/s^2, the horizontal acceleration
setpoint, sent as geometry_msgs/Accel (linear.x, linear.y) expressed in `map`. The flight
stack is assumed to hold altitude and heading and to track acceleration setpoints (an
acceleration setpoint is what the MPC optimises, so nothing is hidden between plan and
command). Speed and acceleration are limited to discs, written as regular polygons (see
planar.disc_polygon; inner fit by default so the rated limit is never exceeded).
Stabilisable at rest.
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
    ACCELERATION_MAX,
    LENGTH_MAX,
    SPEED_MAX,
    ParameterReader,
)
from coverage_fleet.vehicles.planar import disc_polygon, rotate, scale_into_polygon

#: 1/s: linear drag per unit mass (a time constant of 10 ms).
DRAG_MAX = 100.0


class MultirotorModel(VehicleModel):
    kind = "multirotor"
    state_names = ("x", "y", "vx", "vy")
    input_names = ("ax", "ay")
    command_kind = "accel"
    stabilisable_at_rest = True

    def __init__(self, params: Mapping[str, Any], source: str) -> None:
        super().__init__(params, source)
        read = ParameterReader(params, source)
        self.max_speed = read.positive("max_speed", maximum=SPEED_MAX)
        self.max_acceleration = read.positive("max_acceleration", maximum=ACCELERATION_MAX)
        self.drag = read.non_negative("drag_coefficient", 0.0, maximum=DRAG_MAX)
        self.polygon_sides = read.integer("polygon_sides", 8, minimum=4, maximum=64)
        self.polygon_fit = read.choice("polygon_fit", ("inner", "outer"), "inner")
        self._footprint_radius = read.positive("footprint_radius", maximum=LENGTH_MAX)
        read.finish()
        self._speed_H, self._speed_h = disc_polygon(
            self.max_speed, self.polygon_sides, self.polygon_fit
        )
        self._accel_H, self._accel_h = disc_polygon(
            self.max_acceleration, self.polygon_sides, self.polygon_fit
        )

    @property
    def footprint_radius(self) -> float:
        return self._footprint_radius

    @property
    def max_planar_speed(self) -> float:
        # The speed polygon's corners reach radius / cos(pi/sides) when it circumscribes.
        if self.polygon_fit == "outer":
            return self.max_speed / math.cos(math.pi / self.polygon_sides)
        return self.max_speed

    def continuous_dynamics(self, x: ca.SX, u: ca.SX) -> ca.SX:
        return ca.vertcat(x[2], x[3], u[0] - self.drag * x[2], u[1] - self.drag * x[3])

    def state_bounds(self) -> tuple[np.ndarray, np.ndarray]:
        v = self.max_speed
        return np.array([-np.inf, -np.inf, -v, -v]), np.array([np.inf, np.inf, v, v])

    def input_bounds(self) -> tuple[np.ndarray, np.ndarray]:
        a = self.max_acceleration
        return np.array([-a, -a]), np.array([a, a])

    def state_polytope(self) -> tuple[np.ndarray, np.ndarray]:
        G = np.zeros((self.polygon_sides, 4))
        G[:, 2:] = self._speed_H
        return G, self._speed_h.copy()

    def input_polytope(self) -> tuple[np.ndarray, np.ndarray]:
        return self._accel_H.copy(), self._accel_h.copy()

    def steady_states(self) -> SteadyStateFamily:
        Mx = np.zeros((4, 2))
        Mx[0, 0] = Mx[1, 1] = 1.0
        return SteadyStateFamily(("x", "y"), Mx, np.zeros(4), np.zeros((2, 2)), np.zeros(2))

    def braking_input(self, x: np.ndarray) -> np.ndarray:
        # Stop exactly within one command period where the limits allow; otherwise the same
        # direction shrunk into the acceleration polygon (still opposing the velocity).
        wanted = np.array(
            [stopping_force(1.0, self.drag, float(v), self.command_period) for v in x[2:4]]
        )
        return scale_into_polygon(wanted, self._accel_H, self._accel_h)

    def state_from_odometry(self, odom: OdometryValues) -> np.ndarray:
        vx, vy = rotate(odom.yaw, odom.body_vx, odom.body_vy)
        return np.array([odom.x, odom.y, vx, vy], dtype=float)

    def odometry_from_state(self, x: np.ndarray, u: np.ndarray | None = None) -> OdometryValues:
        # Heading is not modelled: the simulated body keeps yaw 0, so body axes = map axes.
        return OdometryValues(
            x=float(x[0]), y=float(x[1]), yaw=0.0, body_vx=float(x[2]), body_vy=float(x[3])
        )

    def command_from_input(self, u: np.ndarray, x: np.ndarray) -> CommandValues:
        return CommandValues("accel", (float(u[0]), float(u[1]), 0.0), (0.0, 0.0, 0.0))

    def input_from_command(self, command: CommandValues, x: np.ndarray) -> np.ndarray:
        a = np.nan_to_num(np.array(command.linear[:2], dtype=float), nan=0.0)
        lower, upper = self.input_bounds()
        return scale_into_polygon(np.clip(a, lower, upper), self._accel_H, self._accel_h)
