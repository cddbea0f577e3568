"""Offline closed-loop simulation of a mission: the same core the ROS nodes run.

Each tick of `step` seconds:
 1. every robot's state is measured (plus optional measurement noise on its position);
 2. the partition at the measured positions gives candidate centroids and the cost H;
 3. every robot reports its distance to its committed target (progress report);
 4. the reference gate may commit the candidates as the next generation;
 5. robots whose controller is due (every sample_time) run RobotController.step on the
    measured state and their committed target; the input is held until the next solve;
 6. every plant advances by `step` with `plant_substeps` RK4 substeps (finer than the
    controllers' own discretisation), plus optional process noise on its position.

After the gate, the settle monitor (fleet/settling.py) judges the tick: the run stops when
the fleet has settled, when it is stuck, or when the duration ends. Noise comes from
one numpy Generator seeded with the seed, so a run is deterministic for a given seed.
"""

from __future__ import annotations

import time as wallclock
from collections.abc import Callable, Mapping
from dataclasses import dataclass

import numpy as np

from coverage_fleet.control.controller import RobotController
from coverage_fleet.control.gate import ProgressReport, ReferenceGate
from coverage_fleet.control.terminal import terminal_for_vehicle
from coverage_fleet.fleet.limit_check import limit_violations
from coverage_fleet.fleet.mission import Mission, RobotEntry, simulation_step
from coverage_fleet.fleet.settling import SettleMonitor
from coverage_fleet.fleet.trial import RobotLog, TrialLog
from coverage_fleet.geometry.partition import compute_partition
from coverage_fleet.interrupts import raise_if_interrupted
from coverage_fleet.vehicles.base import OdometryValues


@dataclass(frozen=True)
class StepInfo:
    """What a progress display needs after each tick."""

    time: float
    duration: float
    cost: float
    generation: int


@dataclass
class _SimulatedRobot:
    entry: RobotEntry
    controller: RobotController
    plant: object  # casadi Function x_next = F(x, u)
    period_ticks: int
    state: np.ndarray
    held_input: np.ndarray
    log: RobotLog


def initial_state(
    entry: RobotEntry, start: tuple[float, float, float] | OdometryValues
) -> np.ndarray:
    """The robot's state at the start: at rest at a pose (x, y, heading), or as given by
    odometry values (pose in `map`, twist in the body frame)."""
    model = entry.vehicle.model
    if not isinstance(start, OdometryValues):
        start = OdometryValues(x=start[0], y=start[1], yaw=start[2])
    return np.asarray(model.state_from_odometry(start), float)


def _build_robot(
    entry: RobotEntry,
    start: tuple[float, float, float] | OdometryValues,
    mission: Mission,
    step: float,
) -> _SimulatedRobot:
    spec = entry.vehicle
    model = spec.model
    terminal, _ = terminal_for_vehicle(spec)
    controller = RobotController(model, spec.mpc, mission.region.halfspaces(), terminal)
    plant = model.discrete_dynamics(step, mission.simulation.plant_substeps)
    lower, upper = model.input_bounds()
    rest_input = np.clip(np.zeros(model.nu), lower, upper)
    return _SimulatedRobot(
        entry=entry,
        controller=controller,
        plant=plant,
        period_ticks=round(spec.mpc.sample_time / step),
        state=initial_state(entry, start),
        held_input=rest_input,
        log=RobotLog(
            name=entry.name,
            vehicle_kind=model.kind,
            state_names=tuple(model.state_names),
            input_names=tuple(model.input_names),
            position_indices=tuple(model.position_indices),
        ),
    )


def _planar_speed(robot: _SimulatedRobot, x: np.ndarray) -> float:
    """Speed of the robot's reference point: its odometry twist for the state and the input
    being applied (what the simulator node publishes on odom)."""
    odometry = robot.entry.vehicle.model.odometry_from_state(x, robot.held_input)
    return float(np.hypot(odometry.body_vx, odometry.body_vy))


def simulate_mission(
    mission: Mission,
    seed: int | None = None,
    duration: float | None = None,
    initial_poses: Mapping[str, tuple[float, float, float] | OdometryValues] | None = None,
    on_step: Callable[[StepInfo], None] | None = None,
    stop_at_rest: bool = True,
) -> TrialLog:
    """Run the mission offline in closed loop; returns the trial log.

    seed and duration default to the mission's simulation settings; initial_poses (by robot
    name: a pose at rest, or odometry values for a robot already moving) default to the
    roster's poses at rest. With stop_at_rest=False the run goes on for the whole duration
    (as the ROS graph does); settled_time and stuck_time are then the first times the
    settle monitor reported the fleet settled or stuck.
    """
    settings = mission.simulation
    seed = settings.seed if seed is None else int(seed)
    duration = settings.duration if duration is None else float(duration)
    step = simulation_step(mission.roster, settings)
    starts = {e.name: (initial_poses or {}).get(e.name, e.initial_pose) for e in mission.roster}
    rng = np.random.default_rng(seed)
    robots = [_build_robot(e, starts[e.name], mission, step) for e in mission.roster]
    gate = ReferenceGate(mission.gate)
    monitor = SettleMonitor(mission.settle)
    for robot in robots:
        gate.add_robot(robot.entry.name)
    region_A, region_b = mission.region.halfspaces()
    log = TrialLog(mission_name=mission.name, seed=seed, step=step, duration=duration)
    log.robots = {r.entry.name: r.log for r in robots}
    names = [r.entry.name for r in robots]
    started = wallclock.perf_counter()
    ticks = int(np.floor(duration / step + 1e-9))

    for tick in range(ticks + 1):
        t = tick * step
        measured = []
        for robot in robots:
            x = robot.state.copy()
            if settings.measurement_noise_std > 0:
                i, j = robot.entry.vehicle.model.position_indices
                x[[i, j]] += rng.normal(0.0, settings.measurement_noise_std, 2)
            measured.append(x)
        positions = {
            r.entry.name: r.entry.vehicle.model.position(x)
            for r, x in zip(robots, measured, strict=True)
        }
        stacked = np.array([positions[n] for n in names])
        partition = compute_partition(stacked, mission.region, mission.density)

        for name in names:
            if name in gate.targets:
                distance = float(np.linalg.norm(positions[name] - gate.targets[name]))
                gate.report(ProgressReport(name, gate.generation, distance))
        candidates = {n: partition.centroids[k] for k, n in enumerate(names)}
        opening = gate.offer(candidates, positions, partition.cost, t)
        if opening is not None:
            # A robot reports on its new target as soon as it receives it.
            for name in names:
                gate.report(ProgressReport(name, gate.generation, opening.distances[name]))
        standing = gate.progress()
        speeds = {
            r.entry.name: _planar_speed(r, x) for r, x in zip(robots, measured, strict=True)
        }
        settling = monitor.update(t, positions, speeds, candidates, gate_shut=opening is None)

        largest = 0.0
        for robot, x in zip(robots, measured, strict=True):
            name = robot.entry.name
            target = gate.targets[name]
            ran = tick % robot.period_ticks == 0
            solve_time, status, ok, fallback = np.nan, "", True, ""
            if ran:
                control = robot.controller.step(x, target)
                robot.held_input = np.asarray(control.input, float)
                solve_time = float(control.solve_time)
                status = str(control.status)
                ok = bool(control.success)
                fallback = control.fallback
            robot.log.time.append(t)
            robot.log.generation.append(gate.generation)
            robot.log.state.append(robot.state.copy())
            robot.log.input.append(robot.held_input.copy())
            robot.log.target.append(target.copy())
            robot.log.distance.append(standing[name].distance_now)
            robot.log.no_farther.append(standing[name].no_farther)
            robot.log.closer.append(standing[name].closer)
            robot.log.controller_ran.append(ran)
            robot.log.solve_time.append(solve_time)
            robot.log.status.append(status)
            robot.log.solver_ok.append(ok)
            robot.log.fallback.append(fallback)
            largest = max(largest, float(standing[name].distance_now))
            log.violations.extend(
                limit_violations(robot, robot.state, robot.held_input, region_A, region_b, t)
            )
        log.time.append(t)
        log.generation.append(gate.generation)
        log.cost.append(float(partition.cost))
        log.largest_distance.append(largest)
        raise_if_interrupted()
        if on_step is not None:
            on_step(StepInfo(t, duration, float(partition.cost), gate.generation))
        if settling == "settled" and log.settled_time is None:
            log.settled_time = t
        if settling == "stuck" and log.stuck_time is None:
            log.stuck_time = t
        if settling != "moving" and stop_at_rest:
            break

        for robot in robots:
            x_next = np.asarray(robot.plant(robot.state, robot.held_input), float).ravel()
            if settings.process_noise_std > 0:
                i, j = robot.entry.vehicle.model.position_indices
                x_next[[i, j]] += rng.normal(0.0, settings.process_noise_std, 2)
            robot.state = x_next

    log.openings = list(gate.openings)
    log.wall_time = wallclock.perf_counter() - started
    return log
