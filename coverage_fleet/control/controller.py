"""One robot's controller: the tracking MPC plus what to do when the solver fails.

This is the one call the offline simulator and the ROS controller node make per sample.
On a failed solve (or a solver exception, or a measured state that is not finite) the robot
keeps flying the plan it last had, one input per sample, while that plan lasts (its inputs
were feasible when computed, common practice for MPC failure handling); after that it
applies model.braking_input(x).

Every input that leaves here is clipped into the input box and pulled into the input
polytope, then checked explicitly against both (limits.COMMAND_LIMIT_TOLERANCE). An input
that fails the check (not finite, or a model whose rest input lies outside its own limits,
so the pull cannot reach them) is replaced by the braking input, and that by the rest input
if it fails too; the replacement is logged (logger "coverage_fleet.control.controller") and
named in ControlStep.status.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass

import numpy as np

from coverage_fleet.control.fallbacks import (
    FALLBACK_BRAKING,
    FALLBACK_KEEP_APART_BRAKE,
    FALLBACK_NONE,
    FALLBACK_PREVIOUS_PLAN,
)
from coverage_fleet.control.ingredients import TerminalIngredients
from coverage_fleet.control.keep_apart import CellRows
from coverage_fleet.control.limits import COMMAND_LIMIT_TOLERANCE, input_limits
from coverage_fleet.control.mpc import TrackingMpc
from coverage_fleet.control.shared_problems import SharedProblems
from coverage_fleet.vehicles.base import VehicleModel
from coverage_fleet.vehicles.settings import MpcSettings

logger = logging.getLogger(__name__)



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
    #: "", "previous plan", "braking" or "keep-apart brake" (FALLBACK_*).
    fallback: str = FALLBACK_NONE
    #: The keep-apart slack of this solve (metres; 0 without keep-apart rows).
    cell_violation: float = 0.0

    @property
    def solver_failed(self) -> bool:
        """A solve was attempted and failed (a keep-apart brake attempts none)."""
        return not self.success and self.fallback != FALLBACK_KEEP_APART_BRAKE


class RobotController:
    def __init__(
        self,
        model: VehicleModel,
        settings: MpcSettings,
        region_halfspaces: tuple[np.ndarray, np.ndarray],
        terminal: TerminalIngredients | None = None,
        cell_rows: int = 0,
        prebuild: bool = True,
        shared: SharedProblems | None = None,
        rented_samples: int = 0,
    ) -> None:
        """prebuild, shared, rented_samples: see TrackingMpc (offline runs: False, the
        fleet's builds, mpc.RENTED_SAMPLES)."""
        self.model = model
        self.mpc = TrackingMpc(
            model, settings, region_halfspaces, terminal, cell_rows, prebuild=prebuild,
            shared=shared, rented_samples=rented_samples,
        )
        self._u_lower, self._u_upper = (np.asarray(v, float) for v in model.input_bounds())
        E, e = model.input_polytope()
        self._E, self._e = np.asarray(E, float).reshape(-1, model.nu), np.asarray(e, float)
        self._limits = input_limits(model)
        self._u_rest = np.asarray(model.steady_states().u0, dtype=float)
        self._plan_inputs: np.ndarray | None = None
        self._plan_states: np.ndarray | None = None
        self._plan_next = 0

    def step(
        self, x: np.ndarray, target_xy: np.ndarray, cell: CellRows | None = None
    ) -> ControlStep:
        """One sample. cell: the keep-apart rows (control/keep_apart.py) when the MPC was
        built with them; without usable rows the robot brakes (it does not know where its
        neighbours are), and the status says why."""
        x = np.asarray(x, dtype=float).reshape(-1)
        target = np.asarray(target_xy, dtype=float).reshape(-1)
        if not (np.isfinite(x).all() and np.isfinite(target).all()):
            self.mpc.reset()
            return self._fallback(x, "measured state or target not finite", 0, 0.0)
        rows = None
        if self.mpc.cell_rows:
            if cell is None or cell.brake:
                why = "no cell given" if cell is None else cell.reason
                return self._brake(x, f"keep-apart: {why}; braking")
            rows = (cell.normals, cell.offsets)
        try:
            solution = self.mpc.solve(x, target, rows)
        except RuntimeError as error:  # casadi raises on plugin faults
            self.mpc.reset()
            return self._fallback(x, f"solver error: {error}".splitlines()[0], 0, 0.0)
        if not solution.success:
            return self._fallback(x, solution.status, solution.iterations, solution.solve_time)
        u, replaced = self.command(solution.first_input, x)
        if replaced:
            self._plan_inputs = self._plan_states = None
            return ControlStep(
                input=u,
                plan_positions=self.model.position(x).reshape(1, 2),
                status=f"{solution.status}; {replaced}",
                success=True,
                used_fallback=True,
                iterations=solution.iterations,
                solve_time=solution.solve_time,
                fallback=FALLBACK_BRAKING,
                cell_violation=solution.cell_violation,
            )
        self._plan_inputs = solution.predicted_inputs
        self._plan_states = solution.predicted_states
        self._plan_next = 1
        return ControlStep(
            input=u,
            plan_positions=solution.predicted_states[:, list(self.model.position_indices)],
            status=solution.status,
            success=True,
            used_fallback=False,
            iterations=solution.iterations,
            solve_time=solution.solve_time,
            cell_violation=solution.cell_violation,
        )

    def _brake(self, x: np.ndarray, status: str) -> ControlStep:
        """Brake now (no plan to fly: it was made for a cell that is no longer known)."""
        self._plan_inputs = self._plan_states = None
        u, replaced = self.command(self._braking_input(x), x)
        return ControlStep(
            input=u,
            plan_positions=self.model.position(x).reshape(1, 2),
            status=f"{status}; {replaced}" if replaced else status,
            success=False,
            used_fallback=True,
            iterations=0,
            solve_time=0.0,
            fallback=FALLBACK_KEEP_APART_BRAKE,
        )

    def _fallback(
        self, x: np.ndarray, status: str, iterations: int, solve_time: float
    ) -> ControlStep:
        plan, plan_states = self._plan_inputs, self._plan_states
        if plan is not None and plan_states is not None and self._plan_next < len(plan):
            k = self._plan_next
            self._plan_next += 1
            positions = plan_states[k:, list(self.model.position_indices)]
            u, replaced = self.command(plan[k], x)
            kind = FALLBACK_PREVIOUS_PLAN
        else:
            self._plan_inputs = self._plan_states = None
            positions = self.model.position(x).reshape(1, 2)
            u, replaced = self.command(self._braking_input(x), x)
            kind = FALLBACK_BRAKING
        if replaced:
            self._plan_inputs = self._plan_states = None
            positions = self.model.position(x).reshape(1, 2)
            status, kind = f"{status}; {replaced}", FALLBACK_BRAKING
        return ControlStep(
            input=u,
            plan_positions=positions,
            status=status,
            success=False,
            used_fallback=True,
            iterations=iterations,
            solve_time=solve_time,
            fallback=kind,
        )

    def _braking_input(self, x: np.ndarray) -> np.ndarray:
        try:
            return np.asarray(self.model.braking_input(x), dtype=float).reshape(self.model.nu)
        except Exception as error:  # user model code: a fault here must not stop the robot
            logger.error("%s: braking_input failed: %r", self.model.source, error)
            return np.full(self.model.nu, np.nan)

    def command(self, u: np.ndarray, x: np.ndarray) -> tuple[np.ndarray, str]:
        """(input to send, "" or why `u` was replaced). The first of u, the braking input
        and the rest input that is finite and, after admissible(), inside the input limits
        (explicit check, not `assert`: python -O would strip it)."""
        sent = self.admissible(u)
        fault = self.limit_fault(u, sent)
        if not fault:
            return sent, ""
        for label, candidate in (
            ("braking", lambda: self._braking_input(x)),
            ("rest input", lambda: self._u_rest),
        ):
            wanted = candidate()
            replacement = self.admissible(wanted)
            if not self.limit_fault(wanted, replacement):
                logger.warning(
                    "%s (%s): %s; sending the %s instead",
                    self.model.source, self.model.kind, fault, label,
                )
                return replacement, f"{fault}: {label} instead"
        # Nothing admissible is known (a model whose limits exclude its own rest input):
        # the rest input within the box, which every input respects at least.
        last = np.clip(np.nan_to_num(self._u_rest), self._u_lower, self._u_upper)
        logger.error(
            "%s (%s): %s, and neither braking nor the rest input is inside the limits; "
            "sending %s", self.model.source, self.model.kind, fault, last.tolist(),
        )
        return last, f"{fault}: no input inside the limits, rest input clipped to the box"

    def limit_fault(self, wanted: np.ndarray, sent: np.ndarray) -> str:
        """"" when `wanted` is finite and `sent` (its admissible() image) is inside every
        input limit row; otherwise what is wrong."""
        wanted = np.asarray(wanted, dtype=float)
        if not np.isfinite(wanted).all():
            return f"input {wanted.tolist()} not finite"
        excess = self._limits.G @ sent - self._limits.g
        row = int(np.argmax(excess)) if len(excess) else 0
        if len(excess) and not excess[row] <= COMMAND_LIMIT_TOLERANCE:
            return (
                f"input {sent.tolist()} outside the limit '{self._limits.names[row]}' by "
                f"{excess[row]:.3g} after clipping"
            )
        return ""

    def admissible(self, u: np.ndarray) -> np.ndarray:
        """u clipped to the input box, then pulled towards the rest input until the input
        polytope holds (when the rest input is inside: the set is convex, so this ends
        inside; `command` checks the result, since a model may break that premise)."""
        u = np.asarray(u, float)
        if not np.isfinite(u).all():
            u = np.nan_to_num(u, nan=0.0)
        # np.clip's own checks cost more than the two comparisons on a few inputs.
        u = np.minimum(np.maximum(u, self._u_lower), self._u_upper)
        if len(self._e):
            excess = self._E @ u - self._e
            if excess.max() > 0:
                rest_slack = self._e - self._E @ self._u_rest
                direction = self._E @ (u - self._u_rest)
                with np.errstate(divide="ignore", invalid="ignore"):
                    ratios = np.where(direction > 0, rest_slack / direction, np.inf)
                u = self._u_rest + min(1.0, float(ratios.min())) * (u - self._u_rest)
        return u
