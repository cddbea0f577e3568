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
 4. controllers: every robot answers its state (SampledController, what each controller
    node runs): a solve when its sample is due, the held input otherwise, and its progress;
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

import numpy as np

from coverage_fleet.control.controller import RobotController
from coverage_fleet.control.gate import GateOpening
from coverage_fleet.control.sampling import SampledController
from coverage_fleet.control.terminal import terminal_for_vehicle
from coverage_fleet.fleet.coordination import Candidates, GateKeeper, candidates_at
from coverage_fleet.fleet.density_updates import DensitySource
from coverage_fleet.fleet.mission import Mission, RobotEntry
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
    """The offline fleet: plants, base station and one sampled controller per robot."""

    def __init__(
        self,
        mission: Mission,
        step: float,
        seed: int,
        starts: Mapping[str, Pose | OdometryValues] | None = None,
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
        # Ticks are exact multiples of the step: half a tick of tolerance makes "a sample is
        # due" the same as counting ticks.
        self.controllers = {
            e.name: sampled_controller(e, mission, sample_tolerance=step / 2)
            for e in mission.roster
        }
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
        t = self.plants.time
        records: list[TrialRecord] = []
        measured = self.plants.measure()
        positions = {
            n: self.mission.roster[k].vehicle.model.position(measured[n])
            for k, n in enumerate(self.names)
        }
        self.densities.apply_due(t)
        candidates, _ = candidates_at(positions, t, self.mission.region, self.densities.density,
                                      self.densities.version)
        decision = self.keeper.offer(candidates)
        opening = decision.opening
        if opening is not None:
            records.append(GenerationRecord(opening.generation))
            for name, target in opening.targets.items():
                # Offline the target arrives at once (the robot acknowledges it), and the
                # robot's distance at commit is the gate's.
                self.controllers[name].set_target(
                    opening.generation, target, opening.distances[name]
                )
                self.keeper.acknowledge(name, opening.generation)
                records.append(TargetRecord(name, target))
            records.append(OpeningRecord(opening))
        speeds = {n: self._planar_speed(n, measured[n]) for n in self.names}
        settling = self.monitor.update(
            t, positions, speeds, candidates.centroids, gate_shut=opening is None
        )

        inputs: dict[str, np.ndarray] = {}
        for name in self.names:
            records.append(StateRecord(name, t, self.plants.states[name]))
            answer = self.controllers[name].answer(measured[name], t)
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
                records.append(
                    SolveRecord(
                        name, t, float(step.solve_time), str(step.status), bool(step.success),
                        step.fallback,
                    )
                )
        records.append(CandidatesRecord(t, candidates.cost, candidates.positions))
        self._inputs = inputs
        return Tick(t, candidates, opening, settling, records)

    def _planar_speed(self, name: str, x: np.ndarray) -> float:
        """Speed of the robot's reference point: its odometry twist for the state and the
        input being applied (what the simulator node publishes on odom)."""
        model = self.plants.entries[name].vehicle.model
        odometry = model.odometry_from_state(x, self._inputs[name])
        return float(np.hypot(odometry.body_vx, odometry.body_vy))

    def advance(self) -> None:
        """Step 5: every plant advances by one step under the inputs of the last tick."""
        self.plants.advance(self._inputs)
