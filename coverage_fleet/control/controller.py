"""One robot's controller: the tracking MPC plus what to do when the solver fails.

This is the one call the offline simulator and the ROS controller node make per sample.
On a failed solve (or a solver exception) the robot keeps flying the plan it last had, one
input per sample, while that plan lasts (its inputs were feasible when computed, common
practice for MPC failure handling); after that it applies model.braking_input(x). Every
input that leaves here is inside the input box and polytope (clipped, then asserted).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from coverage_fleet.control.ingredients import TerminalIngredients
from coverage_fleet.control.mpc import TrackingMpc
from coverage_fleet.vehicles.base import VehicleModel
from coverage_fleet.vehicles.settings import MpcSettings

#: Slack allowed on the limits when asserting (solver tolerances are far below it).
LIMIT_TOLERANCE = 1e-9

FALLBACK_NONE = ""
FALLBACK_PREVIOUS_PLAN = "previous plan"
FALLBACK_BRAKING = "braking"


@dataclass(frozen=True)
class ControlStep:
    input: np.ndarray
    #: Predicted positions (k, 2) the input belongs to (row 0: now); a single row when braking.
    plan_positions: np.ndarray
    status: str
    #: This sample's solve succeeded.
    success: bool
    used_fallback: bool
    iterations: int
    solve_time: float
    #: "", "previous plan" or "braking".
    fallback: str = FALLBACK_NONE


class RobotController:
    def __init__(
        self,
        model: VehicleModel,
        settings: MpcSettings,
        region_halfspaces: tuple[np.ndarray, np.ndarray],
        terminal: TerminalIngredients | None = None,
    ) -> None:
        self.model = model
        self.mpc = TrackingMpc(model, settings, region_halfspaces, terminal)
        self._u_lower, self._u_upper = (np.asarray(v, float) for v in model.input_bounds())
        E, e = model.input_polytope()
        self._E, self._e = np.asarray(E, float).reshape(-1, model.nu), np.asarray(e, float)
        self._u_rest = np.asarray(model.steady_states().u0, dtype=float)
        self._plan_inputs: np.ndarray | None = None
        self._plan_states: np.ndarray | None = None
        self._plan_next = 0

    def step(self, x: np.ndarray, target_xy: np.ndarray) -> ControlStep:
        x = np.asarray(x, dtype=float).reshape(-1)
        try:
            solution = self.mpc.solve(x, target_xy)
        except RuntimeError as error:  # casadi raises on NaN inputs or plugin faults
            self.mpc.reset()
            return self._fallback(x, f"solver error: {error}".splitlines()[0], 0, 0.0)
        if solution.success:
            self._plan_inputs = solution.predicted_inputs
            self._plan_states = solution.predicted_states
            self._plan_next = 1
            positions = solution.predicted_states[:, list(self.model.position_indices)]
            return ControlStep(
                input=self.admissible(solution.first_input),
                plan_positions=positions,
                status=solution.status,
                success=True,
                used_fallback=False,
                iterations=solution.iterations,
                solve_time=solution.solve_time,
            )
        return self._fallback(x, solution.status, solution.iterations, solution.solve_time)

    def _fallback(
        self, x: np.ndarray, status: str, iterations: int, solve_time: float
    ) -> ControlStep:
        plan = self._plan_inputs
        if plan is not None and self._plan_next < len(plan):
            k = self._plan_next
            self._plan_next += 1
            assert self._plan_states is not None
            positions = self._plan_states[k:, list(self.model.position_indices)]
            u, kind = plan[k], FALLBACK_PREVIOUS_PLAN
        else:
            self._plan_inputs = self._plan_states = None
            positions = self.model.position(x).reshape(1, 2)
            u, kind = self.model.braking_input(x), FALLBACK_BRAKING
        return ControlStep(
            input=self.admissible(u),
            plan_positions=positions,
            status=status,
            success=False,
            used_fallback=True,
            iterations=iterations,
            solve_time=solve_time,
            fallback=kind,
        )

    def admissible(self, u: np.ndarray) -> np.ndarray:
        """u clipped to the input box, then pulled towards the rest input until the input
        polytope holds (the rest input is inside: the set is convex, so this ends inside)."""
        u = np.clip(np.nan_to_num(np.asarray(u, float), nan=0.0), self._u_lower, self._u_upper)
        if len(self._e):
            excess = self._E @ u - self._e
            if excess.max() > 0:
                rest_slack = self._e - self._E @ self._u_rest
                direction = self._E @ (u - self._u_rest)
                with np.errstate(divide="ignore", invalid="ignore"):
                    ratios = np.where(direction > 0, rest_slack / direction, np.inf)
                u = self._u_rest + min(1.0, float(ratios.min())) * (u - self._u_rest)
        assert np.all(u >= self._u_lower - LIMIT_TOLERANCE), (u, self._u_lower)
        assert np.all(u <= self._u_upper + LIMIT_TOLERANCE), (u, self._u_upper)
        assert not len(self._e) or np.all(self._E @ u <= self._e + LIMIT_TOLERANCE), u
        return u
