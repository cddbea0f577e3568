"""Offline closed-loop simulation of a mission: the same core the ROS nodes run.

Each tick of `step` seconds is one FleetStep.tick (fleet/step.py): measure, partition,
progress reports and gate offer, controllers due, then the plants advance (with the
mission's process and measurement noise, fleet/plants.py). The records each tick produces
go to the trial assembler (fleet/trial_records.py), the same one the ROS recorder feeds.

After each plant step the smallest footprint clearance at the plant's substeps goes to the
log too (fleet/plants.py), so the report judges contact on the plants' own paths.

After the gate, the settle monitor (fleet/settling.py) judges the tick: the run stops when
the fleet has settled, when it is stuck, or when the duration ends. Noise comes from one
numpy Generator seeded with the seed, so a run is deterministic for a given seed.
"""

from __future__ import annotations

import time as wallclock
from collections.abc import Callable, Mapping
from dataclasses import dataclass

import numpy as np

from coverage_fleet.fleet.controller_pool import ControllerPool
from coverage_fleet.fleet.controllers import FleetControllers, LocalControllers
from coverage_fleet.fleet.mission import Mission, simulation_step
from coverage_fleet.fleet.plants import Pose
from coverage_fleet.fleet.step import FleetStep, StageTimes
from coverage_fleet.fleet.trial import TrialLog
from coverage_fleet.fleet.trial_records import ClearanceRecord, SettlingRecord, TrialAssembler
from coverage_fleet.interrupts import raise_if_interrupted
from coverage_fleet.vehicles.base import OdometryValues


@dataclass(frozen=True)
class StepInfo:
    """What a progress display needs after each tick."""

    time: float
    duration: float
    cost: float
    generation: int


def simulate_mission(
    mission: Mission,
    seed: int | None = None,
    duration: float | None = None,
    initial_poses: Mapping[str, Pose | OdometryValues] | None = None,
    on_step: Callable[[StepInfo], None] | None = None,
    stop_at_rest: bool = True,
    workers: int = 1,
    stage_times: StageTimes | None = None,
    share_builds: bool = True,
) -> TrialLog:
    """Run the mission offline in closed loop; returns the trial log.

    seed and duration default to the mission's simulation settings; initial_poses (by robot
    name: a pose at rest, or odometry values for a robot already moving) default to the
    roster's poses at rest. With stop_at_rest=False the run goes on for the whole duration
    (as the ROS graph does); settled_time and stuck_time are then the first times the
    settle monitor reported the fleet settled or stuck.

    workers > 1 runs the controllers over that many processes, this one and workers - 1
    worker processes (fleet/controller_pool.py; the log is the same but for the measured
    solve times); 1 keeps everything in this process. `stage_times`, if given, receives
    the wall time per stage (fleet/step.StageTimes). share_builds=False makes every
    controller in this process build its own MPC problems (control/shared_problems.py; the
    same log).
    """
    settings = mission.simulation
    seed = settings.seed if seed is None else int(seed)
    duration = settings.duration if duration is None else float(duration)
    step = simulation_step(mission.roster, settings)
    pool = ControllerPool(mission, step, workers) if workers > 1 else None
    try:
        controllers = (
            pool if pool is not None
            else LocalControllers(mission, step, share_builds=share_builds)
        )
        return _run(mission, seed, duration, step, initial_poses, on_step, stop_at_rest,
                    controllers, stage_times)
    finally:
        if pool is not None:
            pool.close()


def _run(
    mission: Mission,
    seed: int,
    duration: float,
    step: float,
    initial_poses: Mapping[str, Pose | OdometryValues] | None,
    on_step: Callable[[StepInfo], None] | None,
    stop_at_rest: bool,
    controllers: FleetControllers,
    stage_times: StageTimes | None,
) -> TrialLog:
    fleet = FleetStep(mission, step, seed, initial_poses, controllers=controllers)
    if stage_times is not None:
        fleet.times = stage_times
    assembler = TrialAssembler(mission, seed)
    started = wallclock.perf_counter()
    ticks = int(np.floor(duration / step + 1e-9))

    for tick in range(ticks + 1):
        outcome = fleet.tick()
        logging = wallclock.perf_counter()
        for record in outcome.records:
            assembler.add(record)
        if outcome.settling != "moving":
            assembler.add(SettlingRecord(outcome.settling))
        fleet.times.logging += wallclock.perf_counter() - logging
        raise_if_interrupted()
        if on_step is not None:
            on_step(StepInfo(outcome.time, duration, outcome.candidates.cost, fleet.generation))
        # A fleet at rest before a scripted density update waits for it (rehearsal).
        if outcome.settling != "moving" and stop_at_rest and not fleet.densities.pending:
            break
        if tick < ticks:
            fleet.advance()
            # How close the robots came between the ticks, at the plant's substeps.
            clearance = fleet.plants.last_clearance
            if clearance is not None:
                assembler.add(ClearanceRecord(clearance.time, clearance.clearance,
                                              clearance.robots))

    if isinstance(controllers, ControllerPool):
        fleet.times.worker_busy = tuple(controllers.busy_seconds)
        fleet.times.worker_critical = controllers.critical_seconds
        fleet.times.worker_cpu = tuple(controllers.cpu_seconds)
    finishing = wallclock.perf_counter()
    log = assembler.finish(
        wall_time=finishing - started, duration=duration, step=step
    )
    fleet.times.logging += wallclock.perf_counter() - finishing
    return log
