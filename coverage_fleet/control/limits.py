"""A vehicle's state and input limits as one list of named linear rows G v <= g.

Box limits (finite entries only) and the model's extra polytopes become rows with a name an
operator can read (`forward_speed <= 1.2`), so the terminal report can say which limit
decides the terminal set, and the MPC and the terminal tools read the limits one way.

Steady states must lie inside the limits scaled towards the rest point x_r (the steady
state at theta = 0) by 1 - steady_state_margin (the lambda-scaled constraint set of Limon,
Alvarado, Alamo & Camacho, Automatica 44(9), 2008, sec. 3, taken about x_r). A row the steady
state cannot move along (G_i Mx = 0) keeps its full distance from rest.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from coverage_fleet.vehicles.base import VehicleModel

#: Rows whose steady-state dependence is below this are treated as independent of theta.
INDEPENDENT_TOLERANCE = 1e-12

# Two different slacks on the same limits (absolute, in each limit's SI unit):

#: The last check before an input leaves the controller (RobotController.command). The
#: input has just been clipped into the box and pulled into the polytope, so only
#: floating-point rounding may remain; anything larger means the clipping could not do its
#: job (common practice: a few hundred ulps at the magnitudes of vehicle limits).
COMMAND_LIMIT_TOLERANCE = 1e-9
#: The check of a whole trial, simulated or recorded (fleet.limit_check): the plant is
#: integrated more finely (plant_substeps) than the controller's model, so a state the
#: controller predicted on a limit can end slightly beyond it; differences up to this are
#: integration error, not a violation.
TRIAL_LIMIT_TOLERANCE = 1e-4


@dataclass(frozen=True)
class LinearLimits:
    G: np.ndarray
    g: np.ndarray
    names: tuple[str, ...]

    @property
    def count(self) -> int:
        return len(self.names)


def _rows(
    lower: np.ndarray,
    upper: np.ndarray,
    polytope: tuple[np.ndarray, np.ndarray],
    names: tuple[str, ...],
    label: str,
) -> LinearLimits:
    n = len(names)
    rows: list[np.ndarray] = []
    bounds: list[float] = []
    row_names: list[str] = []
    for i in range(n):
        if np.isfinite(upper[i]):
            rows.append(np.eye(n)[i])
            bounds.append(float(upper[i]))
            row_names.append(f"{names[i]} <= {upper[i]:g}")
        if np.isfinite(lower[i]):
            rows.append(-np.eye(n)[i])
            bounds.append(-float(lower[i]))
            row_names.append(f"{names[i]} >= {lower[i]:g}")
    G_poly, g_poly = polytope
    for k in range(len(g_poly)):
        rows.append(np.asarray(G_poly[k], dtype=float))
        bounds.append(float(g_poly[k]))
        row_names.append(f"{label} polytope row {k}")
    G = np.array(rows, dtype=float).reshape(len(rows), n)
    return LinearLimits(G, np.array(bounds, dtype=float), tuple(row_names))


def state_limits(model: VehicleModel) -> LinearLimits:
    lower, upper = model.state_bounds()
    return _rows(lower, upper, model.state_polytope(), model.state_names, "state")


def input_limits(model: VehicleModel) -> LinearLimits:
    lower, upper = model.input_bounds()
    return _rows(lower, upper, model.input_polytope(), model.input_names, "input")


@dataclass(frozen=True)
class SteadyLimits:
    """Rows the steady state (x_s or u_s, affine in theta) must satisfy, and the distance
    each limit row keeps from any admissible steady state (the slack the terminal set may
    use)."""

    #: Rows that depend on theta: G_dep (M theta + v0) <= g_dep.
    G_dep: np.ndarray
    g_dep: np.ndarray
    #: Per row of the full LinearLimits: guaranteed slack g_i - G_i v_s >= slack_i.
    slack: np.ndarray


def steady_limits(
    limits: LinearLimits, M: np.ndarray, v0: np.ndarray, margin: float
) -> SteadyLimits:
    rest_slack = limits.g - limits.G @ v0
    dependent = np.abs(limits.G @ M).max(axis=1, initial=0.0) > INDEPENDENT_TOLERANCE
    slack = np.where(dependent, margin * rest_slack, rest_slack)
    tightened = limits.g - margin * rest_slack
    return SteadyLimits(limits.G[dependent], tightened[dependent], slack)
