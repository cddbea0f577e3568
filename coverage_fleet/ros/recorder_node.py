"""Recorder: listens to the graph and keeps a trial log with the columns of the offline
trial log (coverage_fleet.fleet.trial.TrialLog), so a run of the ROS graph ends with the same
trial directory and report as an offline simulation.

Per robot, every odometry message is one row: state (from the odometry through the vehicle
model), the input the latest command stands for, the committed target, the distance to it
and the progress flags of the gate's rule. Per fleet, every candidates message is one row
(time, generation, cost, largest distance). Gate openings come from coverage/openings.
Solver figures are not on the wire per step: they are sampled from the controllers'
/diagnostics (every diagnostics_period): the first row after a diagnostics message carries
its solve time, status and whether the solve succeeded (controller_ran true); other rows
have controller_ran false.
"""

from __future__ import annotations

import threading
from pathlib import Path

import numpy as np
from diagnostic_msgs.msg import DiagnosticArray
from geometry_msgs.msg import PointStamped
from nav_msgs.msg import Odometry
from rclpy.node import Node
from std_msgs.msg import Float64MultiArray, String, UInt32

from coverage_fleet.control.gate import GateOpening
from coverage_fleet.fleet.limit_check import limit_violations
from coverage_fleet.fleet.mission import Mission, load_mission, mission_as_run
from coverage_fleet.fleet.trial import RobotLog, TrialLog, write_trial

from . import qos, topics
from .conversions import (
    candidates_from_msg,
    command_from_msg,
    command_message_type,
    odometry_from_msg,
    opening_from_msg,
    stamp_to_seconds,
    target_from_msg,
)
from .parameters import declare
from .runtime import main_for


class RecorderNode(Node):
    def __init__(self, mission_file: str | None = None) -> None:
        super().__init__("recorder")
        mission_file = declare(
            self, "mission_file", mission_file or "", "Mission file (YAML) of the run."
        )
        self.output_dir = declare(
            self, "output_dir", "",
            "Trial directory to write when the node stops; empty = record only (the "
            "launcher writes the trial itself).",
        )
        self.mission: Mission = load_mission(mission_file)
        self.lock = threading.Lock()
        self.names = list(self.mission.robot_names)
        self.log = TrialLog(
            mission_name=self.mission.name,
            seed=self.mission.simulation.seed,
            step=0.0,
            duration=0.0,
        )
        self.region_A, self.region_b = self.mission.region.halfspaces()
        self.generation = -1
        self.targets: dict[str, np.ndarray] = {}
        self.commit_distance: dict[str, float] = {}
        self.inputs: dict[str, np.ndarray] = {}
        self.commands: dict[str, object] = {}
        for entry in self.mission.roster:
            model = entry.vehicle.model
            name = entry.name
            self.log.robots[name] = RobotLog(
                name=name,
                vehicle_kind=model.kind,
                state_names=tuple(model.state_names),
                input_names=tuple(model.input_names),
                position_indices=tuple(model.position_indices),
            )
            kind = entry.vehicle.command_kind
            self.create_subscription(
                Odometry, topics.robot_topic(name, topics.ODOM),
                lambda msg, e=entry: self._on_odom(e, msg), qos.REPORTS,
            )
            self.create_subscription(
                command_message_type(kind), topics.robot_topic(name, topics.CMD_VEL),
                lambda msg, e=entry, k=kind: self._on_command(e, msg, k),
                qos.REPORTS,
            )
            self.create_subscription(
                PointStamped, topics.robot_topic(name, topics.TARGET),
                lambda msg, n=name: self._on_target(n, msg), qos.LATCHED,
            )
        self.create_subscription(
            Float64MultiArray, topics.CANDIDATES, self._on_candidates, qos.REPORTS
        )
        self.create_subscription(Float64MultiArray, topics.OPENINGS, self._on_opening, qos.OPENINGS)
        self.create_subscription(UInt32, topics.GENERATION, self._on_generation, qos.LATCHED)
        self.create_subscription(String, topics.SETTLING, self._on_settling, qos.LATCHED)
        self.create_subscription(
            DiagnosticArray, topics.DIAGNOSTICS, self._on_diagnostics, qos.REPORTS
        )
        self.solver_samples: dict[str, tuple[float, str, bool]] = {}
        self.settled_time: float | None = None
        self.stuck_time: float | None = None
        self.time_origin: float | None = None

    # --- callbacks ----------------------------------------------------------------------

    def _relative(self, t: float) -> float:
        """Seconds since the first message of the run: a simulated run starts at 0 anyway,
        a real-time run is stamped with the wall clock (seconds since 1970)."""
        if self.time_origin is None:
            self.time_origin = t
        return t - self.time_origin

    def _on_target(self, name: str, msg: PointStamped) -> None:
        with self.lock:
            self.targets[name] = target_from_msg(msg)[0]
            self.commit_distance.pop(name, None)

    def _on_generation(self, msg: UInt32) -> None:
        with self.lock:
            self.generation = int(msg.data)

    def _on_command(self, entry, msg, kind) -> None:
        # A command answers the newest state, so it belongs to the newest row.
        values = command_from_msg(msg, kind)
        model = entry.vehicle.model
        with self.lock:
            robot = self.log.robots[entry.name]
            self.commands[entry.name] = values
            if robot.state:
                robot.input[-1] = np.asarray(model.input_from_command(values, robot.state[-1]))

    def _on_diagnostics(self, msg: DiagnosticArray) -> None:
        for status in msg.status:
            values = {kv.key: kv.value for kv in status.values}
            if status.hardware_id in self.log.robots and values.get("solves", "0") != "0":
                sample = (
                    float(values.get("solve_time", "nan")),
                    values.get("status", ""),
                    values.get("fallback", "") == "",
                )
                with self.lock:
                    self.solver_samples[status.hardware_id] = sample

    def _on_settling(self, msg: String) -> None:
        # The first time the gate node reports the fleet settled (or stuck), as the offline
        # log keeps it (the simulator stops there; a later change does not undo it).
        with self.lock:
            times = [r.time[-1] for r in self.log.robots.values() if r.time]
            now = max(times) if times else 0.0
            if msg.data == "settled" and self.settled_time is None:
                self.settled_time = now
            elif msg.data == "stuck" and self.stuck_time is None:
                self.stuck_time = now

    def _on_odom(self, entry, msg: Odometry) -> None:
        model = entry.vehicle.model
        name = entry.name
        t = self._relative(stamp_to_seconds(msg.header.stamp))
        x = np.asarray(model.state_from_odometry(odometry_from_msg(msg)), float)
        with self.lock:
            command = self.commands.get(name)
            if command is not None:
                u = np.asarray(model.input_from_command(command, x), float)
            else:
                u = np.zeros(model.nu)
            robot = self.log.robots[name]
            if robot.time and t <= robot.time[-1]:
                return  # a re-published state (lockstep waiting): already recorded
            target = self.targets.get(name)
            if target is None:
                target = model.position(x)
            distance = float(np.linalg.norm(model.position(x) - target))
            at_commit = self.commit_distance.setdefault(name, distance)
            gate = self.mission.gate
            robot.time.append(t)
            robot.generation.append(self.generation)
            robot.state.append(x)
            robot.input.append(u)
            robot.target.append(np.asarray(target, float).copy())
            robot.distance.append(distance)
            robot.no_farther.append(distance <= at_commit + gate.noise_tolerance)
            robot.closer.append(distance <= at_commit - gate.progress_tolerance)
            sample = self.solver_samples.pop(name, None)
            robot.controller_ran.append(sample is not None)
            robot.solve_time.append(sample[0] if sample else float("nan"))
            robot.status.append(sample[1] if sample else "")
            robot.solver_ok.append(sample[2] if sample else True)

    def _on_candidates(self, msg: Float64MultiArray) -> None:
        candidates = candidates_from_msg(msg)
        with self.lock:
            largest = 0.0
            for index, position in candidates.positions.items():
                target = self.targets.get(self.names[index])
                if target is not None:
                    largest = max(largest, float(np.linalg.norm(position - target)))
            self.log.time.append(self._relative(candidates.time))
            self.log.generation.append(self.generation)
            self.log.cost.append(candidates.cost)
            self.log.largest_distance.append(largest)

    def _on_opening(self, msg: Float64MultiArray) -> None:
        values = opening_from_msg(msg)
        with self.lock:
            self.log.openings.append(
                GateOpening(
                    time=self._relative(values.time),
                    generation=values.generation,
                    reason=values.reason,
                    cost=values.cost,
                    positions={self.names[i]: p for i, p in values.positions.items()},
                    targets={self.names[i]: t for i, t in values.targets.items()},
                    distances={self.names[i]: d for i, d in values.distances.items()},
                )
            )

    # --- the trial ----------------------------------------------------------------------

    def trial_log(self, wall_time: float = 0.0) -> TrialLog:
        """A copy-free snapshot of what was recorded, with the run's step and duration."""
        with self.lock:
            log = self.log
            log.openings.sort(key=lambda o: o.generation)
            times = [t for r in log.robots.values() for t in r.time]
            log.duration = max(times) - min(times) if times else 0.0
            steps = [np.diff(r.time) for r in log.robots.values() if len(r.time) > 1]
            log.step = float(np.median(np.concatenate(steps))) if steps else 0.0
            log.settled_time = self.settled_time
            log.stuck_time = self.stuck_time
            log.wall_time = wall_time
            # Checked once the rows are final: a row's input is the command that answered
            # its state, which arrives after the state.
            log.violations = []
            for entry in self.mission.roster:
                robot = log.robots[entry.name]
                for t, x, u in zip(robot.time, robot.state, robot.input, strict=True):
                    log.violations.extend(
                        limit_violations(entry, x, u, self.region_A, self.region_b, t)
                    )
            return log

    def write(self, directory: str | Path, wall_time: float = 0.0):
        """Write the trial directory (logs, mission as run, report); returns (path, metrics)."""
        from coverage_fleet.report import write_report

        log = self.trial_log(wall_time)
        metrics: dict = {}

        def report(folder: Path) -> None:
            metrics.update(
                write_report(
                    folder, log, self.mission.region, self.mission.density,
                    self.mission.settle.distance,
                )
            )

        as_run = mission_as_run(self.mission, seed=log.seed, duration=log.duration)
        path = write_trial(directory, as_run, log, report=report)
        return path, metrics

    def destroy_node(self) -> None:
        if self.output_dir:
            path, _ = self.write(self.output_dir)
            self.get_logger().info(f"trial written to {path}")
        super().destroy_node()


def main() -> None:
    main_for(RecorderNode, program="coverage_fleet_recorder")


if __name__ == "__main__":
    main()
