"""The offline fleet's controllers: one sampled controller per robot, answering every
robot's state at each tick.

Two ways to hold them, with the same interface (`FleetControllers`):
- `LocalControllers`: every controller in this process (one core);
- `fleet/controller_pool.ControllerPool`: the controllers split over this process and
  worker processes (`assign_robots`), each process holding its robots' controllers from
  start to end.

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

import math
from collections.abc import Hashable, Mapping, Sequence
from typing import Protocol

import numpy as np

from coverage_fleet.control.controller import RobotController
from coverage_fleet.control.keep_apart import CellLayout, CellWindow, cell_layout, horizon_reach
from coverage_fleet.control.mpc import RENTED_SAMPLES
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
    # Offline, a keep-apart row budget's problem is built when the robot has needed it
    # RENTED_SAMPLES times (start-up of large fleets, short runs; no solve waits in real
    # time here).
    controller = RobotController(
        spec.model, spec.mpc, mission.region.halfspaces(), terminal,
        cell_rows=0 if layout is None else layout.rows, prebuild=False, shared=shared,
        rented_samples=RENTED_SAMPLES,
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
        # Built here, not at the first tick: every robot's cold start needs it (with
        # shared builds, once per vehicle file; a controller pool builds them before it
        # forks its workers).
        for controller in self.controllers.values():
            controller.controller.mpc.build_full_solve()

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
    return solve_size(entry) * step / entry.vehicle.mpc.sample_time


def solve_size(entry: RobotEntry) -> float:
    """The expected work of one of the robot's solves: the size of its MPC (states plus
    inputs, over the horizon)."""
    model, mpc = entry.vehicle.model, entry.vehicle.mpc
    return float((model.nx + model.nu) * mpc.horizon)


def solve_period(entry: RobotEntry, step: float) -> int:
    """Ticks from one of the robot's samples to the next (at least 1)."""
    return max(1, round(entry.vehicle.mpc.sample_time / step))


#: Longest cycle of ticks the split balances tick by tick (the least common multiple of the
#: fleet's sample periods; a longer one is balanced on its mean alone).
PHASE_CYCLE_MAX = 64


def phase_loads(roster: Sequence[RobotEntry], step: float) -> np.ndarray:
    """Each robot's expected solve work at each tick of the fleet's sampling cycle
    (robots x ticks): every robot samples at tick 0 and then every `solve_period` ticks, so
    robots of a slower vehicle all solve on the same ticks (a fleet of 0.1 s and 0.2 s
    vehicles at 0.1 s steps: a heavy tick, then a light one). A cycle longer than
    PHASE_CYCLE_MAX ticks is replaced by its mean (one column)."""
    periods = [solve_period(entry, step) for entry in roster]
    cycle = math.lcm(*periods) if periods else 1
    if cycle > PHASE_CYCLE_MAX:
        return np.array([[solve_weight(entry, step)] for entry in roster]).reshape(-1, 1)
    ticks = np.arange(cycle)
    return np.array([
        np.where(ticks % period == 0, solve_size(entry), 0.0)
        for entry, period in zip(roster, periods, strict=True)
    ]).reshape(len(roster), cycle)


def assign_robots(
    roster: Sequence[RobotEntry], step: float, workers: int
) -> list[list[str]]:
    """Robot names per process (exactly `workers` lists, some possibly empty), for the
    least expected critical work per tick (`split_work`: the busiest process's solve work
    at each tick of the sampling cycle, `phase_loads`): robot by robot, heaviest first
    (mean work per tick), each to the process whose busiest tick stays lightest (ties: the
    lighter process over the cycle, then the lower one). With one tick per cycle this is
    the longest-processing-time-first rule; over a cycle it spreads the robots that solve
    on the same ticks (0.2 s vessels among 0.1 s vehicles) over the processes. Vehicle
    files are mixed freely: every process holds every vehicle file's builds at the cost of
    one (fleet/controller_pool.py builds them before it forks its workers).
    Deterministic; within a process the names keep roster order."""
    if workers < 1:
        raise ValueError(f"workers must be at least 1, got {workers}")
    loads = phase_loads(roster, step)
    work = np.zeros((workers, loads.shape[1]))
    split = [0] * len(roster)
    for k in sorted(range(len(roster)), key=lambda k: (-loads[k].mean(), k)):
        after = [work[w] + loads[k] for w in range(workers)]
        target = min(range(workers), key=lambda w: (after[w].max(), after[w].sum(), w))
        work[target] = after[target]
        split[k] = target
    return [[roster[k].name for k in range(len(roster)) if split[k] == w]
            for w in range(workers)]


def split_work(loads: np.ndarray, split: Sequence[int], workers: int) -> float:
    """The expected critical work per tick of a split (the process of each robot): mean over
    the cycle's ticks of the busiest process's work."""
    work = np.zeros((workers, loads.shape[1]))
    for k, w in enumerate(split):
        work[w] += loads[k]
    return float(work.max(axis=0).mean())
