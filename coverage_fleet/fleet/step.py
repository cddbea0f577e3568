"""One tick of the whole fleet, in the order the ROS graph follows:

 1. measure: every robot's state (plus measurement noise on its position) at time t;
 2. partition: the cells of the robots' positions, their centroids (the candidate targets)
    and the coverage cost H (fleet/coordination.py, what the partition node publishes),
    with the density in force (a scripted update whose time has come replaces it first:
    fleet/density_updates.py, as the partition node does);
 3. progress reports and gate offer: the gate judges each robot's progress from its
    position and may commit the candidates as the next generation (GateKeeper, what the
    gate node runs); committed targets reach the robots at once; the settle monitor
    (fleet/settling.py, also the gate node's) judges the fleet settled, stuck or moving;
 4. controllers: with keep-apart on, a snapshot of the measured positions every
    snapshot period (what the partition node broadcasts) goes to every controller first
    (control/keep_apart.py); then every robot answers its state (SampledController, what
    each controller node runs): a solve when its sample is due, the held input otherwise,
    and its progress;
 5. plants: every plant advances by one step under its robot's input, plus process noise
    (FleetPlants, what the simulator node runs).

`FleetStep.tick` does one such tick and returns the trial records it produced
(fleet/trial_records.py), so that the offline log is written by the same code as a log of
the ROS graph. Every simulated robot answers every tick, so all robots stay live offline;
the liveness rules (fleet/liveness.py) and the lockstep barrier (fleet/lockstep.py) are the
nodes' share of the same core.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from time import perf_counter
from typing import ClassVar

import numpy as np

from coverage_fleet.control.gate import GateOpening
from coverage_fleet.fleet.controllers import (
    FleetControllers,
    LocalControllers,
    fleet_snapshot,
    mission_cell_layout,
)
from coverage_fleet.fleet.coordination import Candidates, GateKeeper, candidates_at
from coverage_fleet.fleet.density_updates import DensitySource
from coverage_fleet.fleet.mission import Mission
from coverage_fleet.fleet.plants import FleetPlants, NoiseLevels, Pose
from coverage_fleet.fleet.settling import SettleMonitor, SettleStatus
from coverage_fleet.fleet.trial_records import (
    CandidatesRecord,
    CommandRecord,
    GenerationRecord,
    OpeningRecord,
    ProgressRecord,
    SolveRecord,
    StateRecord,
    TargetRecord,
    TrialRecord,
)
from coverage_fleet.vehicles.base import OdometryValues


@dataclass
class StageTimes:
    """Wall time spent per stage of the tick loop (seconds, perf_counter), and counts: plain
    counters the benchmark reads. `plants` covers measuring and advancing the plants;
    `gate` the gate offer, target commits and the settle monitor; `solves` the controllers'
    answers (wherever they run, waiting included); `logging` building the trial records
    and handing them to the trial assembler."""

    partition: float = 0.0
    gate: float = 0.0
    solves: float = 0.0
    plants: float = 0.0
    logging: float = 0.0
    ticks: int = 0
    robot_steps: int = 0
    solves_run: int = 0
    #: Controllers over processes (fleet/controller_pool.py): seconds each process spent
    #: answering (this process's own share first, then each worker's), and the sum over
    #: ticks of the busiest process's (both within `solves`; the rest of `solves` is idle
    #: processes, messages and wake-ups).
    worker_busy: tuple[float, ...] = ()
    worker_critical: float = 0.0
    #: CPU seconds each process used within its busy time (time.process_time): less
    #: than `worker_busy` by the time the worker waited for a core (other processes on a
    #: shared machine), which the measured solve times include.
    worker_cpu: tuple[float, ...] = ()

    STAGES: ClassVar[tuple[str, ...]] = ("partition", "gate", "solves", "plants", "logging")

    @property
    def total(self) -> float:
        return sum(getattr(self, stage) for stage in self.STAGES)


@dataclass(frozen=True)
class Tick:
    """What one tick did."""

    time: float
    candidates: Candidates
    opening: GateOpening | None
    #: The settle monitor's status after this tick's offer.
    settling: SettleStatus
    records: list[TrialRecord]


class FleetStep:
    """The offline fleet: plants, base station and one sampled controller per robot.

    `controllers` default to all in this process (`LocalControllers`); pass a
    `controller_pool.ControllerPool` to run them over processes (same answers).
    The caller closes what it passed in. Time per stage accumulates in `times`."""

    def __init__(
        self,
        mission: Mission,
        step: float,
        seed: int,
        starts: Mapping[str, Pose | OdometryValues] | None = None,
        controllers: FleetControllers | None = None,
    ) -> None:
        self.mission = mission
        self.names = list(mission.robot_names)
        settings = mission.simulation
        self.plants = FleetPlants(
            mission.roster,
            step,
            settings.plant_substeps,
            NoiseLevels(settings.process_noise_std, settings.measurement_noise_std),
            seed,
            starts,
        )
        self.keeper = GateKeeper(mission.gate)
        self.densities = DensitySource(mission.density, mission.density_updates)
        self.monitor = SettleMonitor(mission.settle)
        self.controllers = (
            LocalControllers(mission, step) if controllers is None else controllers
        )
        self.times = StageTimes()
        layout = mission_cell_layout(mission)
        self._snapshot_period = None if layout is None else layout.snapshot_period
        self._snapshots_taken = 0
        self._half_step = step / 2
        # Until the first answers the plants hold the rest input (its speed is the robot's).
        self._inputs: dict[str, np.ndarray] = {
            e.name: np.clip(np.zeros(e.vehicle.model.nu), *e.vehicle.model.input_bounds())
            for e in mission.roster
        }

    @property
    def time(self) -> float:
        return self.plants.time

    @property
    def generation(self) -> int:
        return self.keeper.gate.generation

    def tick(self) -> Tick:
        """Steps 1-4 at the current time; `advance` then does step 5."""
        times = self.times
        started = perf_counter()
        t = self.plants.time
        records: list[TrialRecord] = []
        measured = self.plants.measure()
        positions = {
            n: self.mission.roster[k].vehicle.model.position(measured[n])
            for k, n in enumerate(self.names)
        }
        partitioned = perf_counter()
        times.plants += partitioned - started
        self.densities.apply_due(t)
        candidates, _ = candidates_at(positions, t, self.mission.region, self.densities.density,
                                      self.densities.version)
        gated = perf_counter()
        times.partition += gated - partitioned
        decision = self.keeper.offer(candidates)
        opening = decision.opening
        if opening is not None:
            records.append(GenerationRecord(opening.generation))
            for name, target in opening.targets.items():
                # Offline the target arrives at once (the robot acknowledges it), and the
                # robot's distance at commit is the gate's.
                self.controllers.set_target(
                    name, opening.generation, target, opening.distances[name]
                )
                self.keeper.acknowledge(name, opening.generation)
                records.append(TargetRecord(name, target))
            records.append(OpeningRecord(opening))
        speeds = {n: self._planar_speed(n, measured[n]) for n in self.names}
        settling = self.monitor.update(
            t, positions, speeds, candidates.centroids, gate_shut=opening is None
        )
        solving = perf_counter()
        times.gate += solving - gated

        self._snapshot_when_due(t, positions)
        answers = self.controllers.answer_all(measured, t)
        logging = perf_counter()
        times.solves += logging - solving

        inputs: dict[str, np.ndarray] = {}
        for name in self.names:
            records.append(StateRecord(name, t, self.plants.states[name]))
            answer = answers[name]
            inputs[name] = answer.input
            records.append(CommandRecord(name, answer.input))
            progress = answer.progress
            records.append(
                ProgressRecord(
                    name,
                    t,
                    None if progress is None else progress.distance_at_commit,
                    None if progress is None else progress.distance_now,
                )
            )
            if answer.step is not None:
                step = answer.step
                times.solves_run += 1
                records.append(
                    SolveRecord(
                        name, t, float(step.solve_time), str(step.status), bool(step.success),
                        step.fallback,
                    )
                )
        records.append(CandidatesRecord(t, candidates.cost, candidates.positions))
        self._inputs = inputs
        times.ticks += 1
        times.robot_steps += len(self.names)
        times.logging += perf_counter() - logging
        return Tick(t, candidates, opening, settling, records)

    def _snapshot_when_due(self, t: float, positions: Mapping[str, np.ndarray]) -> None:
        """Snapshots at k * period (counted, so that float sums do not drift)."""
        period = self._snapshot_period
        if period is None or t < self._snapshots_taken * period - self._half_step:
            return
        self.controllers.add_snapshot(fleet_snapshot(self.mission, t, positions))
        while self._snapshots_taken * period - self._half_step <= t:
            self._snapshots_taken += 1

    def _planar_speed(self, name: str, x: np.ndarray) -> float:
        """Speed of the robot's reference point: its odometry twist for the state and the
        input being applied (what the simulator node publishes on odom)."""
        model = self.plants.entries[name].vehicle.model
        odometry = model.odometry_from_state(x, self._inputs[name])
        return float(np.hypot(odometry.body_vx, odometry.body_vy))

    def advance(self) -> None:
        """Step 5: every plant advances by one step under the inputs of the last tick."""
        started = perf_counter()
        self.plants.advance(self._inputs)
        self.times.plants += perf_counter() - started
