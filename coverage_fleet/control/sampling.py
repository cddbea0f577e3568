"""A robot's controller as it runs in time: solve when a sample is due, hold the input in
between (zero-order hold), and judge progress towards the committed target.

The offline simulation and the ROS controller node both answer every state of their robot
through `SampledController.answer`: the rule for "a solve is due", the held input and the
progress report are the same on both paths.

A solve is due when there is no held input yet, or when the state is at least
`sample_time - sample_tolerance` newer than the state of the last solve (the tolerance
absorbs jitter in the state stamps on the wire; offline it is half a tick). Before the first
target arrives the robot holds its position (its target is where it is).
"""

from __future__ import annotations

from collections.abc import Hashable
from dataclasses import dataclass

import numpy as np

from coverage_fleet.control.controller import ControlStep, RobotController
from coverage_fleet.control.keep_apart import CellRows, CellWindow
from coverage_fleet.control.progress import ProgressTracker, RobotProgress
from coverage_fleet.vehicles.base import VehicleModel


@dataclass(frozen=True)
class Answer:
    """What the controller sends back for one state."""

    state_time: float
    input: np.ndarray
    #: The MPC was solved for this state (otherwise the held input was re-sent).
    ran: bool
    #: The solve's outcome when it ran.
    step: ControlStep | None
    #: Progress towards the committed target (None before the first target).
    progress: RobotProgress | None


class SampledController:
    def __init__(
        self,
        controller: RobotController,
        sample_time: float,
        sample_tolerance: float,
        noise_tolerance: float,
        progress_tolerance: float,
    ) -> None:
        self.controller = controller
        self.model: VehicleModel = controller.model
        self.sample_time = float(sample_time)
        self.sample_tolerance = float(sample_tolerance)
        self.tracker = ProgressTracker(noise_tolerance, progress_tolerance)
        self.held_input: np.ndarray | None = None
        self.last_solve_time = -np.inf
        self.last_step: ControlStep | None = None
        self.solves = 0
        self.failures = 0
        #: The keep-apart snapshots this robot honours (None: keep-apart off); the owner
        #: adds each new FleetSnapshot with `cells.add`.
        self.cells: CellWindow | None = None
        #: The rows of the newest solve (rows used and dropped, why it braked), for
        #: diagnostics; None without keep-apart or before the first solve.
        self.last_cells: CellRows | None = None

    def set_target(
        self, key: Hashable, target: np.ndarray, distance_at_commit: float | None = None
    ) -> None:
        """The committed target (see ProgressTracker.commit for key and distance)."""
        self.tracker.commit(key, target, distance_at_commit)

    @property
    def target(self) -> np.ndarray | None:
        return self.tracker.target

    def due(self, state_time: float) -> bool:
        return self.held_input is None or (
            state_time - self.last_solve_time >= self.sample_time - self.sample_tolerance
        )

    def answer(self, x: np.ndarray, state_time: float) -> Answer:
        """Answer the state x measured at state_time."""
        x = np.asarray(x, float)
        position = self.model.position(x)
        step = None
        held = self.held_input
        if held is None or self.due(state_time):
            target = self.target if self.target is not None else position
            cell = (
                None if self.cells is None else self.cells.rows_at(float(state_time), position)
            )
            step = self.controller.step(x, target, cell)
            self.last_step, self.last_cells = step, cell
            self.last_solve_time = float(state_time)
            held = self.held_input = np.asarray(step.input, float)
            self.solves += 1
            if step.solver_failed:
                self.failures += 1
        return Answer(
            state_time=float(state_time),
            input=held.copy(),
            ran=step is not None,
            step=step,
            progress=self.tracker.observe(position),
        )

    def brake(self, x: np.ndarray) -> np.ndarray:
        """No fresh state: hold the braking input instead of an old command."""
        self.held_input = np.asarray(self.model.braking_input(np.asarray(x, float)), float)
        return self.held_input.copy()
