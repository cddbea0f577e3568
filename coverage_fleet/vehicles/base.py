"""The one interface every vehicle model implements (built-in or user-supplied).

A model is plain data plus casadi expressions: the MPC, the terminal-ingredient tools, the
offline simulator and the ROS adapters all read it and nothing else. Mapping to and from ROS
messages goes through the plain-value records below so that it is testable without rclpy.
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any, ClassVar, Literal

import casadi as ca
import numpy as np

CommandKind = Literal["twist", "accel", "wrench"]

#: Same value as MpcSettings.sample_time's default (seconds).
DEFAULT_COMMAND_PERIOD = 0.1


@dataclass(frozen=True)
class OdometryValues:
    """The fields of nav_msgs/Odometry a planar model needs (REP 105: pose in `map`,
    twist in the body frame `base_link`)."""

    x: float
    y: float
    yaw: float
    body_vx: float = 0.0
    body_vy: float = 0.0
    yaw_rate: float = 0.0


@dataclass(frozen=True)
class CommandValues:
    """A command message as plain values. `kind` picks the ROS type: twist ->
    geometry_msgs/Twist (linear, angular), accel -> geometry_msgs/Accel (linear, angular),
    wrench -> geometry_msgs/Wrench (force, torque)."""

    kind: CommandKind
    linear: tuple[float, float, float]
    angular: tuple[float, float, float]


@dataclass(frozen=True)
class SteadyStateFamily:
    """Affine family of admissible steady states: x_s = Mx @ theta + x0, u_s = Mu @ theta + u0.

    theta[0:2] is always the planar position of the steady state; further entries (such as a
    resting heading) are free. f(x_s, u_s) = x_s holds for every theta.
    """

    parameter_names: tuple[str, ...]
    Mx: np.ndarray
    x0: np.ndarray
    Mu: np.ndarray
    u0: np.ndarray


class VehicleModel(ABC):
    """Base class of all vehicle models.

    Subclasses set the class attributes, parse their parameters in __init__ (raising
    coverage_fleet.errors.ConfigError naming `source` and the key on bad values) and implement
    the abstract methods. State and input vectors are numpy arrays (or casadi symbols) in the
    order of `state_names` / `input_names`, SI units (REP 103).
    """

    kind: ClassVar[str]
    state_names: ClassVar[tuple[str, ...]]
    input_names: ClassVar[tuple[str, ...]]
    position_indices: ClassVar[tuple[int, int]] = (0, 1)
    #: States that are angles (radians). The state keeps them continuous (unwrapped);
    #: odometry carries them wrapped to [-pi, pi): see continue_angles.
    angle_indices: ClassVar[tuple[int, ...]] = ()
    command_kind: ClassVar[CommandKind]
    #: False where the linearisation at rest is not stabilisable (unicycle, bicycle):
    #: such a model supports only the `equality` terminal constraint.
    stabilisable_at_rest: ClassVar[bool] = True

    def __init__(self, params: Mapping[str, Any], source: str) -> None:
        self.params = dict(params)
        self.source = source
        #: Seconds one command is held (the MPC sample time). Command mappings that turn an
        #: input into a setpoint reached "after the step" (car-like speed) and the braking
        #: input use it. The loader sets it from the file's `mpc.sample_time`; a model built
        #: directly keeps the MpcSettings default.
        self.command_period: float = DEFAULT_COMMAND_PERIOD

    @property
    def nx(self) -> int:
        return len(self.state_names)

    @property
    def nu(self) -> int:
        return len(self.input_names)

    @property
    @abstractmethod
    def footprint_radius(self) -> float:
        """Radius in metres of a disc that contains the vehicle."""

    @property
    def max_planar_speed(self) -> float:
        """Largest speed (m/s) of the reference point over the ground that the limits
        allow; the keep-apart cells (control/keep_apart.py) need it to bound how far a
        robot moves between samples and while its position ages. A model that does not
        say refuses to run with keep-apart on."""
        raise NotImplementedError(
            f"{self.source}: vehicle model '{self.kind}' does not state max_planar_speed "
            "(needed by keep_apart)"
        )

    @abstractmethod
    def continuous_dynamics(self, x: ca.SX, u: ca.SX) -> ca.SX:
        """dx/dt = f_c(x, u) as a casadi expression (column vector of length nx)."""

    @abstractmethod
    def state_bounds(self) -> tuple[np.ndarray, np.ndarray]:
        """Box limits (lower, upper) on the state; +-inf where unbounded. Position entries are
        unbounded here: the region's half-spaces bound them."""

    @abstractmethod
    def input_bounds(self) -> tuple[np.ndarray, np.ndarray]:
        """Box limits (lower, upper) on the input; always finite."""

    def state_polytope(self) -> tuple[np.ndarray, np.ndarray]:
        """Further linear limits G x <= g beyond the box (for example a polygonal speed
        limit). Default: none."""
        return np.zeros((0, self.nx)), np.zeros(0)

    def input_polytope(self) -> tuple[np.ndarray, np.ndarray]:
        """Further linear limits E u <= e beyond the box. Default: none."""
        return np.zeros((0, self.nu)), np.zeros(0)

    @abstractmethod
    def steady_states(self) -> SteadyStateFamily:
        """The family of steady states the tracking MPC may choose from."""

    def manoeuvre_inputs(self, horizon: int, sample_time: float) -> list[np.ndarray]:
        """Input sequences (each (horizon, nu), inside the limits, starting and ending at
        rest) that move the vehicle where no straight drive can: the MPC's second starts
        when its solve stalls short of the target (control/mpc.py). None by default: a
        vehicle that can move towards any point from rest needs none."""
        return []

    @abstractmethod
    def braking_input(self, x: np.ndarray) -> np.ndarray:
        """An input inside the limits that brings the vehicle towards rest (used when the
        solver has failed and the previous plan is used up). Held for `command_period`, it
        does not overshoot through zero speed where the limits allow stopping in one step."""

    @abstractmethod
    def state_from_odometry(self, odom: OdometryValues) -> np.ndarray:
        """State vector from odometry (pose in `map`, twist in the body frame)."""

    @abstractmethod
    def odometry_from_state(self, x: np.ndarray, u: np.ndarray | None = None) -> OdometryValues:
        """Odometry the headless simulator publishes for a state. Yaw is wrapped to
        [-pi, pi). Models whose state holds no velocity (kinematic rover, where the input is
        the velocity) report the twist of the input `u` being applied, zero without it."""

    @abstractmethod
    def command_from_input(self, u: np.ndarray, x: np.ndarray) -> CommandValues:
        """The command message for input u applied at state x."""

    @abstractmethod
    def input_from_command(self, command: CommandValues, x: np.ndarray) -> np.ndarray:
        """Inverse of command_from_input (the simulator uses it); result clipped to limits."""

    # --- shared machinery -------------------------------------------------------------

    def position(self, x: np.ndarray) -> np.ndarray:
        i, j = self.position_indices
        return np.array([x[i], x[j]], dtype=float)

    def continue_angles(self, x: np.ndarray, reference: np.ndarray) -> np.ndarray:
        """x with each angle state moved by a multiple of 2 pi to lie within pi of the same
        entry of `reference` (e.g. the previous state), so a wrapped odometry yaw does not
        jump by 2 pi between two solves."""
        out = np.array(x, dtype=float)
        for i in self.angle_indices:
            out[i] = reference[i] + (out[i] - reference[i] + np.pi) % (2.0 * np.pi) - np.pi
        return out

    def _runge_kutta_states(
        self, sample_time: float, substeps: int
    ) -> tuple[ca.SX, ca.SX, list[ca.SX]]:
        """(x, u, [state after each substep]): classical Runge-Kutta 4 with the input held."""
        x = ca.SX.sym("x", self.nx)
        u = ca.SX.sym("u", self.nu)
        f = ca.Function("f", [x, u], [self.continuous_dynamics(x, u)])
        h = sample_time / substeps
        xk = x
        states = []
        for _ in range(substeps):
            k1 = f(xk, u)
            k2 = f(xk + h / 2 * k1, u)
            k3 = f(xk + h / 2 * k2, u)
            k4 = f(xk + h * k3, u)
            xk = xk + h / 6 * (k1 + 2 * k2 + 2 * k3 + k4)
            states.append(xk)
        return x, u, states

    def discrete_dynamics(self, sample_time: float, substeps: int) -> ca.Function:
        """x_{k+1} = F(x_k, u_k): `substeps` classical Runge-Kutta 4 steps over sample_time
        with the input held (zero-order hold)."""
        x, u, states = self._runge_kutta_states(sample_time, substeps)
        return ca.Function("F", [x, u], [states[-1]], ["x", "u"], ["x_next"])

    def substep_states(self, sample_time: float, substeps: int) -> ca.Function:
        """X = S(x_k, u_k): the (nx, substeps) states after each of the substeps that
        `discrete_dynamics` takes (its last column is x_{k+1}): the plant's path between
        two ticks, where the trial measures how close robots came."""
        x, u, states = self._runge_kutta_states(sample_time, substeps)
        return ca.Function("S", [x, u], [ca.horzcat(*states)], ["x", "u"], ["states"])
