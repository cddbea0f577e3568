"""The offline fleet's controllers: one sampled controller per robot, answering every
robot's state at each tick.

Two ways to hold them, with the same interface (`FleetControllers`):
- `LocalControllers`: every controller in this process (one core);
- `fleet/controller_pool.ControllerPool`: the controllers split over worker processes
  (`assign_robots`), each worker holding its robots' controllers from start to end.

Both give the same answers for the same states: a controller's answer depends only on the
states, targets, snapshots and times it was given and on its own history (warm start, held
input, fallback plan), never on where it runs. The split is therefore independent of the
solver a vehicle file chooses.

Keep-apart (the mission's `keep_apart`, control/keep_apart.py): every controller's MPC
takes the fleet's cell rows, and each controller keeps the snapshots of its window; the
fleet step hands every snapshot to every controller (`add_snapshot`) before the answers
of that tick.
"""

from __future__ import annotations

from collections.abc import Hashable, Mapping, Sequence
from typing import Protocol

import numpy as np

from coverage_fleet.control.controller import RobotController
from coverage_fleet.control.keep_apart import CellLayout, CellWindow, cell_layout, horizon_reach
from coverage_fleet.control.sampling import Answer, SampledController
from coverage_fleet.control.shared_problems import SharedProblems, thread_builds
from coverage_fleet.control.terminal import terminal_for_vehicle
from coverage_fleet.fleet.mission import Mission, RobotEntry
from coverage_fleet.geometry.buffered_cells import FleetSnapshot


def sampled_controller(
    entry: RobotEntry,
    mission: Mission,
    sample_tolerance: float,
    shared: SharedProblems | None = None,
) -> SampledController:
    """The robot's tracking MPC with failure fallback, sampled at its vehicle's sample time;
    with the mission's keep-apart cells when they are enabled. shared: the MPC problems
    built for the other controllers of this process (control/shared_problems.py)."""
    spec = entry.vehicle
    terminal, _ = terminal_for_vehicle(spec)
    layout = mission_cell_layout(mission)
    # Offline, a keep-apart row budget's problem is built when first needed (start-up of
    # large fleets; no solve waits in real time here).
    controller = RobotController(
        spec.model, spec.mpc, mission.region.halfspaces(), terminal,
        cell_rows=0 if layout is None else layout.rows, prebuild=False, shared=shared,
    )
    sampled = SampledController(
        controller,
        spec.mpc.sample_time,
        sample_tolerance,
        mission.gate.noise_tolerance,
        mission.gate.progress_tolerance,
    )
    if layout is not None:
        sampled.cells = CellWindow(
            entry.name, mission.keep_apart, layout.window, layout.rows,
            horizon_reach(spec.model.max_planar_speed, spec.mpc.sample_time, spec.mpc.horizon),
        )
    return sampled


def mission_cell_layout(mission: Mission) -> CellLayout | None:
    """The fleet's keep-apart layout (None when the mission turns keep-apart off)."""
    if not mission.keep_apart.enabled:
        return None
    longest = max(e.vehicle.mpc.sample_time for e in mission.roster)
    return cell_layout(mission.keep_apart, longest)


def fleet_snapshot(
    mission: Mission, time: float, positions: Mapping[str, np.ndarray],
    ages: Mapping[str, float] | None = None,
) -> FleetSnapshot:
    """The snapshot of the roster robots in `positions` (metres) taken at `time`; ages 0
    unless given (seconds)."""
    entries = [e for e in mission.roster if e.name in positions]
    return FleetSnapshot(
        time=float(time),
        names=tuple(e.name for e in entries),
        positions=np.array([positions[e.name] for e in entries], dtype=float).reshape(-1, 2),
        ages=np.array([0.0 if ages is None else ages[e.name] for e in entries]),
        radii=np.array([e.vehicle.model.footprint_radius for e in entries]),
        speed_limits=np.array([e.vehicle.model.max_planar_speed for e in entries]),
    )


class FleetControllers(Protocol):
    """Every robot's sampled controller, wherever it runs."""

    def set_target(
        self, name: str, key: Hashable, target: np.ndarray, distance_at_commit: float
    ) -> None:
        """Commit a target to one robot (it applies before the robot's next answer)."""

    def add_snapshot(self, snapshot: FleetSnapshot) -> None:
        """A keep-apart snapshot for every controller (it applies before the next answers)."""

    def answer_all(
        self, states: Mapping[str, np.ndarray], state_time: float
    ) -> dict[str, Answer]:
        """Every robot's answer to its measured state at state_time."""

    def close(self) -> None:
        """Release what the controllers hold (worker processes)."""


class LocalControllers:
    """The controllers of `names` (default: the whole roster) in this process; robots with
    the same problem (vehicle file, region, row budget) share its build
    (control/shared_problems.py; they answer one at a time) unless share_builds is False:
    with `builds`, or by default with the other runs of this thread (thread_builds)."""

    def __init__(
        self,
        mission: Mission,
        step: float,
        names: Sequence[str] | None = None,
        share_builds: bool = True,
        builds: SharedProblems | None = None,
    ) -> None:
        entries = {e.name: e for e in mission.roster}
        chosen = list(entries) if names is None else list(names)
        #: The MPC problems built for these controllers (None: each builds its own).
        self.shared = None if not share_builds else (
            builds if builds is not None else thread_builds()
        )
        # Ticks are exact multiples of the step: half a tick of tolerance makes "a sample is
        # due" the same as counting ticks.
        self.controllers = {
            name: sampled_controller(
                entries[name], mission, sample_tolerance=step / 2, shared=self.shared
            )
            for name in chosen
        }

    def set_target(
        self, name: str, key: Hashable, target: np.ndarray, distance_at_commit: float
    ) -> None:
        self.controllers[name].set_target(key, target, distance_at_commit)

    def add_snapshot(self, snapshot: FleetSnapshot) -> None:
        for controller in self.controllers.values():
            if controller.cells is not None:
                controller.cells.add(snapshot)

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
