"""The offline fleet's controllers: one sampled controller per robot, answering every
robot's state at each tick.

Two ways to hold them, with the same interface (`FleetControllers`):
- `LocalControllers`: every controller in this process (one core);
- `fleet/controller_pool.ControllerPool`: the controllers split over worker processes
  (`assign_robots`), each worker holding its robots' controllers from start to end.

Both give the same answers for the same states: a controller's answer depends only on the
states, targets and times it was given and on its own history (warm start, held input,
fallback plan), never on where it runs or on the other robots. The split is therefore
independent of the solver a vehicle file chooses.
"""

from __future__ import annotations

from collections.abc import Hashable, Mapping, Sequence
from typing import Protocol

import numpy as np

from coverage_fleet.control.controller import RobotController
from coverage_fleet.control.sampling import Answer, SampledController
from coverage_fleet.control.terminal import terminal_for_vehicle
from coverage_fleet.fleet.mission import Mission, RobotEntry


def sampled_controller(
    entry: RobotEntry, mission: Mission, sample_tolerance: float
) -> SampledController:
    """The robot's tracking MPC with failure fallback, sampled at its vehicle's sample time."""
    spec = entry.vehicle
    terminal, _ = terminal_for_vehicle(spec)
    controller = RobotController(spec.model, spec.mpc, mission.region.halfspaces(), terminal)
    return SampledController(
        controller,
        spec.mpc.sample_time,
        sample_tolerance,
        mission.gate.noise_tolerance,
        mission.gate.progress_tolerance,
    )


class FleetControllers(Protocol):
    """Every robot's sampled controller, wherever it runs."""

    def set_target(
        self, name: str, key: Hashable, target: np.ndarray, distance_at_commit: float
    ) -> None:
        """Commit a target to one robot (it applies before the robot's next answer)."""

    def answer_all(
        self, states: Mapping[str, np.ndarray], state_time: float
    ) -> dict[str, Answer]:
        """Every robot's answer to its measured state at state_time."""

    def close(self) -> None:
        """Release what the controllers hold (worker processes)."""


class LocalControllers:
    """The controllers of `names` (default: the whole roster) in this process."""

    def __init__(
        self, mission: Mission, step: float, names: Sequence[str] | None = None
    ) -> None:
        entries = {e.name: e for e in mission.roster}
        chosen = list(entries) if names is None else list(names)
        # Ticks are exact multiples of the step: half a tick of tolerance makes "a sample is
        # due" the same as counting ticks.
        self.controllers = {
            name: sampled_controller(entries[name], mission, sample_tolerance=step / 2)
            for name in chosen
        }

    def set_target(
        self, name: str, key: Hashable, target: np.ndarray, distance_at_commit: float
    ) -> None:
        self.controllers[name].set_target(key, target, distance_at_commit)

    def answer_all(
        self, states: Mapping[str, np.ndarray], state_time: float
    ) -> dict[str, Answer]:
        return {
            name: self.controllers[name].answer(x, state_time) for name, x in states.items()
        }

    def close(self) -> None:
        pass


def solve_weight(entry: RobotEntry, step: float) -> float:
    """A robot's expected share of solve work per tick: the size of its MPC (states plus
    inputs, over the horizon) times how often it solves (one tick in sample_time / step)."""
    model, mpc = entry.vehicle.model, entry.vehicle.mpc
    return (model.nx + model.nu) * mpc.horizon * step / mpc.sample_time


def assign_robots(
    roster: Sequence[RobotEntry], step: float, workers: int
) -> list[list[str]]:
    """Robot names per worker, balanced by expected solve work: heaviest first, each to the
    worker with the least work so far (ties: the lower worker, then roster order), so that a
    mixed fleet does not put all its slow vehicles on one worker. Deterministic; within a
    worker the names keep roster order. Workers left without a robot are dropped."""
    order = sorted(
        range(len(roster)), key=lambda k: (-solve_weight(roster[k], step), k)
    )
    loads = [0.0] * workers
    shares: list[list[int]] = [[] for _ in range(workers)]
    for k in order:
        target = min(range(workers), key=lambda w: (loads[w], w))
        loads[target] += solve_weight(roster[k], step)
        shares[target].append(k)
    return [[roster[k].name for k in sorted(share)] for share in shares if share]
