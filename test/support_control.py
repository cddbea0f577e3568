"""A linear vehicle model for the control tests (the linear-quadratic checks need one).

Planar double integrator: p' = v, v' = a. Linear, so its RK4 discretisation with the input
held is exact: A = [[I, dt I], [0, I]], B = [[dt^2/2 I], [dt I]] (common practice).
"""

from __future__ import annotations

import dataclasses
import math

import casadi as ca
import numpy as np

from coverage_fleet.geometry.region import ConvexRegion
from coverage_fleet.vehicles.base import (
    CommandValues,
    OdometryValues,
    SteadyStateFamily,
    VehicleModel,
)
from coverage_fleet.vehicles.settings import MpcSettings


class DoubleIntegratorModel(VehicleModel):
    kind = "test_double_integrator"
    state_names = ("x", "y", "vx", "vy")
    input_names = ("ax", "ay")
    command_kind = "accel"
    stabilisable_at_rest = True

    def __init__(
        self, max_speed: float = 1.0, max_acceleration: float = 1.0, footprint: float = 0.2
    ) -> None:
        super().__init__({}, "<test double integrator>")
        self.max_speed = max_speed
        self.max_acceleration = max_acceleration
        self._footprint = footprint

    @property
    def footprint_radius(self) -> float:
        return self._footprint

    @property
    def max_planar_speed(self) -> float:
        return math.sqrt(2.0) * self.max_speed  # the speed box's corner

    def continuous_dynamics(self, x: ca.SX, u: ca.SX) -> ca.SX:
        return ca.vertcat(x[2], x[3], u[0], u[1])

    def state_bounds(self) -> tuple[np.ndarray, np.ndarray]:
        v = self.max_speed
        return np.array([-np.inf, -np.inf, -v, -v]), np.array([np.inf, np.inf, v, v])

    def input_bounds(self) -> tuple[np.ndarray, np.ndarray]:
        a = self.max_acceleration
        return np.array([-a, -a]), np.array([a, a])

    def steady_states(self) -> SteadyStateFamily:
        Mx = np.zeros((4, 2))
        Mx[0, 0] = Mx[1, 1] = 1.0
        return SteadyStateFamily(("x", "y"), Mx, np.zeros(4), np.zeros((2, 2)), np.zeros(2))

    def braking_input(self, x: np.ndarray) -> np.ndarray:
        return np.clip(-np.asarray(x[2:4]) / 0.1, -self.max_acceleration, self.max_acceleration)

    def state_from_odometry(self, odom: OdometryValues) -> np.ndarray:
        return np.array([odom.x, odom.y, odom.body_vx, odom.body_vy])

    def odometry_from_state(self, x: np.ndarray, u: np.ndarray | None = None) -> OdometryValues:
        return OdometryValues(float(x[0]), float(x[1]), 0.0, float(x[2]), float(x[3]))

    def command_from_input(self, u: np.ndarray, x: np.ndarray) -> CommandValues:
        return CommandValues("accel", (float(u[0]), float(u[1]), 0.0), (0.0, 0.0, 0.0))

    def input_from_command(self, command: CommandValues, x: np.ndarray) -> np.ndarray:
        lower, upper = self.input_bounds()
        return np.clip(np.array(command.linear[:2]), lower, upper)


def discrete_matrices(dt: float) -> tuple[np.ndarray, np.ndarray]:
    """Exact zero-order-hold matrices of the double integrator (common practice)."""
    I2 = np.eye(2)
    A = np.block([[I2, dt * I2], [np.zeros((2, 2)), I2]])
    B = np.vstack([0.5 * dt**2 * I2, dt * I2])
    return A, B


#: An invented orchard block (metres, map frame, counter-clockwise) for the control tests.
ORCHARD_BLOCK = np.array([(0.0, 0.0), (12.0, 0.0), (14.0, 7.0), (6.0, 11.0), (-1.0, 6.0)])


def polygon_halfspaces(vertices: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(A, b) with A p <= b inside a convex polygon, unit-norm rows (the region's own)."""
    return ConvexRegion.from_vertices(vertices, source="test").halfspaces()


def closed_loop_cost(
    model: VehicleModel, Q: np.ndarray, R: np.ndarray, x: np.ndarray, target: np.ndarray,
    u: np.ndarray,
) -> float:
    """One sample's closed-loop cost: position error to the target and input effort, the
    stage cost's position and input terms (common practice for comparing two
    controllers)."""
    i, j = model.position_indices
    error = model.position(x) - target
    return float(Q[i, i] * error[0] ** 2 + Q[j, j] * error[1] ** 2 + u @ R @ u)


def on_solver_path(settings: MpcSettings, path: str) -> MpcSettings:
    """The same MPC settings with `mpc.solver.path` set to `path` ("full" or "real_time")."""
    return dataclasses.replace(settings, solver={**settings.solver, "path": path})
