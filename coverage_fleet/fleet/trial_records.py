"""The input of the trial writer: plain records of what happened during a run, one per
observation, and the assembler that turns them into a TrialLog.

Both ways of running a trial feed the same records: the offline simulation emits them tick
by tick, the ROS recorder converts each message it hears into one (and a recording can be
replayed into them). So every column of the trial directory is computed by this one piece
of code and means the same whichever path wrote it.

Records (times in seconds on the run's clock; the assembler counts them from the first
record, so a run stamped with the wall clock starts at 0 too):

- StateRecord: a robot's state at a time (odometry). It opens the robot's row for that
  time; a second state with a time not newer than the robot's last row is a repetition (the
  lockstep simulator re-publishing while it waits) and is dropped. The row takes the newest
  committed target and generation known at that moment.
- CommandRecord: the input a robot's controller sent; it answers the robot's newest state.
- ProgressRecord: the controller's progress report for the state at `state_time`: the
  distance at commit and now (None: no target yet); the flags follow control/progress.py.
- SolveRecord: the controller solved the MPC on the state at `state_time`: solve time,
  status, success, fallback. `controller_ran` of a row is true exactly when a SolveRecord
  names its state.
- TargetRecord / GenerationRecord: a committed target for a robot, the generation number.
- CandidatesRecord: a partition of the live robots (one row of fleet.csv: time, generation,
  cost, largest distance of a robot in it from its committed target).
- OpeningRecord: a gate opening (control.gate.GateOpening).
- ClearanceRecord: the smallest footprint clearance of any two robots over one plant step,
  at the plant's substeps (fleet/plants.py StepClearance; offline runs only: a recording
  of the ROS graph has the odometry states, whose clearance the report computes itself).
- SettlingRecord: the settle monitor's status ("moving", "settled", "stuck"); the first
  "settled" and the first "stuck" count, at the newest state time recorded so far. A
  density opening (a new density: a new job for the fleet) forgets both, so they then
  count from the newest density on.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from coverage_fleet.control.gate import GateOpening
from coverage_fleet.control.progress import judge
from coverage_fleet.fleet.coordination import largest_distance
from coverage_fleet.fleet.limit_check import limit_violations
from coverage_fleet.fleet.mission import Mission
from coverage_fleet.fleet.trial import ClearanceSample, RobotLog, TrialLog

#: Two state times closer than this name the same state.
SAME_TIME = 1e-6


@dataclass(frozen=True)
class StateRecord:
    robot: str
    time: float
    state: np.ndarray


@dataclass(frozen=True)
class CommandRecord:
    robot: str
    input: np.ndarray


@dataclass(frozen=True)
class ProgressRecord:
    robot: str
    state_time: float
    distance_at_commit: float | None
    distance_now: float | None


@dataclass(frozen=True)
class SolveRecord:
    robot: str
    state_time: float
    solve_time: float
    status: str
    success: bool
    fallback: str = ""


@dataclass(frozen=True)
class TargetRecord:
    robot: str
    target: np.ndarray


@dataclass(frozen=True)
class GenerationRecord:
    generation: int


@dataclass(frozen=True)
class CandidatesRecord:
    time: float
    cost: float
    positions: dict[str, np.ndarray]


@dataclass(frozen=True)
class OpeningRecord:
    opening: GateOpening


@dataclass(frozen=True)
class SettlingRecord:
    status: str


@dataclass(frozen=True)
class ClearanceRecord:
    time: float
    clearance: float
    robots: tuple[str, str]


TrialRecord = (
    StateRecord
    | CommandRecord
    | ProgressRecord
    | SolveRecord
    | TargetRecord
    | GenerationRecord
    | CandidatesRecord
    | OpeningRecord
    | SettlingRecord
    | ClearanceRecord
)


class TrialAssembler:
    """Builds the TrialLog of a mission's run from trial records."""

    def __init__(self, mission: Mission, seed: int) -> None:
        self.mission = mission
        self.log = TrialLog(mission_name=mission.name, seed=int(seed), step=0.0, duration=0.0)
        for entry in mission.roster:
            model = entry.vehicle.model
            self.log.robots[entry.name] = RobotLog(
                name=entry.name,
                vehicle_kind=model.kind,
                state_names=tuple(model.state_names),
                input_names=tuple(model.input_names),
                position_indices=tuple(model.position_indices),
            )
        self.generation = -1
        self.targets: dict[str, np.ndarray] = {}
        self.time_origin: float | None = None
        self._raw_times: dict[str, list[float]] = {name: [] for name in self.log.robots}
        self._models = {entry.name: entry.vehicle.model for entry in mission.roster}
        #: Progress and solve records of states not recorded yet (messages from different
        #: publishers may arrive in either order); applied when the state arrives.
        self._early: dict[str, list[ProgressRecord | SolveRecord]] = {
            name: [] for name in self.log.robots
        }

    def _relative(self, t: float) -> float:
        if self.time_origin is None:
            self.time_origin = float(t)
        return float(t) - self.time_origin

    def _row_of(self, robot: str, state_time: float) -> int | None:
        """The row of `robot` whose state was taken at (raw) `state_time`, newest first."""
        times = self._raw_times[robot]
        for k in range(len(times) - 1, -1, -1):
            if abs(times[k] - state_time) < SAME_TIME:
                return k
            if times[k] < state_time - SAME_TIME:
                return None
        return None

    def add(self, record: TrialRecord) -> None:
        match record:
            case StateRecord():
                self._state(record)
            case CommandRecord():
                rows = self.log.robots[record.robot].input
                if rows:
                    rows[-1] = np.asarray(record.input, float).copy()
            case ProgressRecord():
                self._progress(record)
            case SolveRecord():
                k = self._row_of(record.robot, record.state_time)
                if k is None:
                    self._keep_early(record)
                else:
                    robot = self.log.robots[record.robot]
                    robot.controller_ran[k] = True
                    robot.solve_time[k] = float(record.solve_time)
                    robot.status[k] = record.status
                    robot.solver_ok[k] = bool(record.success)
                    robot.fallback[k] = record.fallback
            case TargetRecord():
                self.targets[record.robot] = np.asarray(record.target, float).copy()
            case GenerationRecord():
                self.generation = int(record.generation)
            case CandidatesRecord():
                self.log.time.append(self._relative(record.time))
                self.log.generation.append(self.generation)
                self.log.cost.append(float(record.cost))
                self.log.largest_distance.append(largest_distance(record.positions, self.targets))
            case OpeningRecord():
                opening = record.opening
                self.log.openings.append(
                    GateOpening(
                        time=self._relative(opening.time),
                        generation=opening.generation,
                        reason=opening.reason,
                        cost=opening.cost,
                        positions=opening.positions,
                        targets=opening.targets,
                        distances=opening.distances,
                    )
                )
                if opening.reason == "density":
                    self.log.settled_time = self.log.stuck_time = None
            case ClearanceRecord():
                self.log.plant_clearance.append(ClearanceSample(
                    self._relative(record.time), float(record.clearance), *record.robots))
            case SettlingRecord():
                times = [r.time[-1] for r in self.log.robots.values() if r.time]
                now = max(times, default=0.0)
                if record.status == "settled" and self.log.settled_time is None:
                    self.log.settled_time = now
                elif record.status == "stuck" and self.log.stuck_time is None:
                    self.log.stuck_time = now
            case _:
                raise TypeError(f"not a trial record: {record!r}")

    def _state(self, record: StateRecord) -> None:
        raw = self._raw_times[record.robot]
        if raw and record.time <= raw[-1] + SAME_TIME:
            return  # a repetition of a state already recorded
        robot = self.log.robots[record.robot]
        model = self._models[record.robot]
        raw.append(float(record.time))
        robot.time.append(self._relative(record.time))
        robot.generation.append(self.generation)
        robot.state.append(np.asarray(record.state, float).copy())
        robot.input.append(np.full(model.nu, np.nan))
        robot.target.append(self.targets.get(record.robot, np.full(2, np.nan)).copy())
        robot.distance.append(np.nan)
        robot.no_farther.append(False)
        robot.closer.append(False)
        robot.controller_ran.append(False)
        robot.solve_time.append(np.nan)
        robot.status.append("")
        robot.solver_ok.append(True)
        robot.fallback.append("")
        early = self._early[record.robot]
        if early:
            self._early[record.robot] = []
            for kept in early:
                if kept.state_time >= record.time - SAME_TIME:
                    self.add(kept)

    def _keep_early(self, record: ProgressRecord | SolveRecord) -> None:
        raw = self._raw_times[record.robot]
        if not raw or record.state_time > raw[-1] + SAME_TIME:
            self._early[record.robot].append(record)

    def _progress(self, record: ProgressRecord) -> None:
        k = self._row_of(record.robot, record.state_time)
        if k is None:
            self._keep_early(record)
            return
        if record.distance_at_commit is None or record.distance_now is None:
            return
        gate = self.mission.gate
        standing = judge(
            record.distance_at_commit,
            record.distance_now,
            gate.noise_tolerance,
            gate.progress_tolerance,
        )
        robot = self.log.robots[record.robot]
        robot.distance[k] = float(record.distance_now)
        robot.no_farther[k] = standing.no_farther
        robot.closer[k] = standing.closer

    def finish(
        self, wall_time: float = 0.0, duration: float | None = None, step: float | None = None
    ) -> TrialLog:
        """The log with its step (default: the median spacing of the rows), duration
        (default: the span of the rows), wall time and the limit check of every row."""
        log = self.log
        log.openings.sort(key=lambda o: o.generation)
        times = [t for r in log.robots.values() for t in r.time]
        span = max(times) - min(times) if times else 0.0
        log.duration = span if duration is None else float(duration)
        steps = [np.diff(r.time) for r in log.robots.values() if len(r.time) > 1]
        if step is not None:
            log.step = float(step)
        else:
            log.step = float(np.median(np.concatenate(steps))) if steps else 0.0
        log.wall_time = float(wall_time)
        region_A, region_b = self.mission.region.halfspaces()
        log.violations = []
        for entry in self.mission.roster:
            robot = log.robots[entry.name]
            for t, x, u in zip(robot.time, robot.state, robot.input, strict=True):
                log.violations.extend(limit_violations(entry, x, u, region_A, region_b, t))
        return log
