"""Recorder: listens to the graph and turns every message it hears into a trial record
(coverage_fleet.fleet.trial_records), so a run of the ROS graph ends with the same trial
directory and report as an offline simulation, written by the same code.

Per robot, every odometry message opens a row (a re-published state is dropped); the
command that follows fills its input, the controller's progress report for that state its
distance and progress flags, and a solve outcome (`coverage/solve`) for that state its
solver columns (`controller_ran` is true exactly on the states the controller solved on).
Targets, generations, candidates (one fleet.csv row each), gate openings and the first
"settled" and "stuck" come from the base station's topics.
"""

from __future__ import annotations

import math
import threading
from pathlib import Path

import numpy as np
from diagnostic_msgs.msg import DiagnosticStatus
from geometry_msgs.msg import PointStamped, Vector3Stamped
from nav_msgs.msg import Odometry
from rclpy.node import Node
from std_msgs.msg import Float64MultiArray, String, UInt32

from coverage_fleet.control.gate import GateOpening
from coverage_fleet.fleet.message_checks import StateChecks
from coverage_fleet.fleet.mission import Mission, RobotEntry, load_mission
from coverage_fleet.fleet.trial import TrialLog
from coverage_fleet.fleet.trial_records import (
    CandidatesRecord,
    CommandRecord,
    GenerationRecord,
    OpeningRecord,
    ProgressRecord,
    SettlingRecord,
    SolveRecord,
    StateRecord,
    TargetRecord,
    TrialAssembler,
    TrialRecord,
)

from . import qos, topics
from .conversions import (
    candidates_from_msg,
    command_from_msg,
    command_message_type,
    opening_from_msg,
    progress_from_msg,
    solve_from_msg,
    target_from_msg,
)
from .inbox import Inbox
from .parameters import declare
from .runtime import main_for


def _known(value: float) -> float | None:
    return None if math.isnan(value) else float(value)


class RecorderNode(Node):
    def __init__(self, mission_file: str | None = None) -> None:
        super().__init__("coverage_recorder")
        mission_file = declare(
            self, "mission_file", mission_file or "", "Mission file (YAML) of the run."
        )
        self.output_dir = declare(
            self, "output_dir", "",
            "Trial directory to write when the node stops; empty = record only (the "
            "launcher writes the trial itself).",
        )
        self.mission: Mission = load_mission(mission_file)
        # States are checked as the partition node checks them (a bad one is not a row of
        # the trial), except the stamp: this node's clock need not be the graph's.
        self.state_checks = StateChecks(self.mission.region, stamps=None)
        self.inbox = Inbox(self)
        self.lock = threading.Lock()
        self.names = list(self.mission.robot_names)
        self.assembler = TrialAssembler(self.mission, self.mission.simulation.seed)
        #: robot -> newest state heard (a command is turned into an input at it)
        self.states: dict[str, np.ndarray] = {}
        for entry in self.mission.roster:
            self._listen_to(entry)
        self.create_subscription(
            Float64MultiArray, topics.CANDIDATES, self._on_candidates, qos.REPORTS
        )
        self.create_subscription(Float64MultiArray, topics.OPENINGS, self._on_opening, qos.OPENINGS)
        self.create_subscription(
            UInt32, topics.GENERATION,
            lambda msg: self._add(GenerationRecord(int(msg.data))), qos.LATCHED,
        )
        self.create_subscription(
            String, topics.SETTLING,
            lambda msg: self._add(SettlingRecord(str(msg.data))), qos.LATCHED,
        )

    def _listen_to(self, entry: RobotEntry) -> None:
        name = entry.name
        kind = entry.vehicle.command_kind
        self.create_subscription(
            Odometry, topics.robot_topic(name, topics.ODOM),
            lambda msg, e=entry: self._on_odom(e, msg), qos.STATE_RECORDED,
        )
        self.create_subscription(
            command_message_type(kind, entry.vehicle.command_stamped),
            topics.robot_topic(name, topics.command_topic(kind)),
            lambda msg, e=entry, k=kind: self._on_command(e, msg, k), qos.REPORTS,
        )
        self.create_subscription(
            PointStamped, topics.robot_topic(name, topics.TARGET),
            lambda msg, n=name: self._add(TargetRecord(n, target_from_msg(msg)[0])),
            qos.LATCHED,
        )
        self.create_subscription(
            Vector3Stamped, topics.robot_topic(name, topics.PROGRESS),
            lambda msg, n=name: self._on_progress(n, msg), qos.REPORTS,
        )
        self.create_subscription(
            DiagnosticStatus, topics.robot_topic(name, topics.SOLVE),
            lambda msg, n=name: self._on_solve(n, msg), qos.REPORTS,
        )

    def _add(self, record: TrialRecord) -> None:
        with self.lock:
            self.assembler.add(record)

    # --- callbacks: message -> record ---------------------------------------------------

    def _on_odom(self, entry: RobotEntry, msg: Odometry) -> None:
        good = self.inbox.odometry(entry.name, msg, self.state_checks)
        if good is None:
            return
        odom, stamp = good
        x = np.asarray(entry.vehicle.model.state_from_odometry(odom), float)
        with self.lock:
            self.states[entry.name] = x
            self.assembler.add(StateRecord(entry.name, stamp, x))

    def _on_command(self, entry: RobotEntry, msg, kind) -> None:
        values = command_from_msg(msg, kind)
        with self.lock:
            x = self.states.get(entry.name)
            if x is not None:  # a command answers the newest state
                u = np.asarray(entry.vehicle.model.input_from_command(values, x), float)
                self.assembler.add(CommandRecord(entry.name, u))

    def _on_progress(self, name: str, msg: Vector3Stamped) -> None:
        report = progress_from_msg(msg)
        self._add(
            ProgressRecord(
                name, report.state_time, _known(report.distance_at_commit),
                _known(report.distance_now),
            )
        )

    def _on_solve(self, name: str, msg: DiagnosticStatus) -> None:
        solve = solve_from_msg(msg)
        self._add(
            SolveRecord(
                name, solve.state_time, solve.solve_time, solve.status, solve.success,
                solve.fallback,
            )
        )

    def _on_candidates(self, msg: Float64MultiArray) -> None:
        values = self.inbox.accept(
            "candidates", "candidates table", lambda: candidates_from_msg(msg, len(self.names))
        )
        if values is None:
            return
        positions = {self.names[i]: p for i, p in values.positions.items()}
        self._add(CandidatesRecord(values.time, values.cost, positions))

    def _on_opening(self, msg: Float64MultiArray) -> None:
        values = self.inbox.accept(
            "openings", "gate opening", lambda: opening_from_msg(msg, len(self.names))
        )
        if values is None:
            return
        names = self.names
        opening = GateOpening(
            time=values.time,
            generation=values.generation,
            reason=values.reason,
            cost=values.cost,
            positions={names[i]: p for i, p in values.positions.items()},
            targets={names[i]: t for i, t in values.targets.items()},
            distances={names[i]: d for i, d in values.distances.items()},
        )
        self._add(OpeningRecord(opening))

    # --- the trial ----------------------------------------------------------------------

    def trial_log(self, wall_time: float = 0.0) -> TrialLog:
        """What was recorded, finished (step, duration, limit check)."""
        with self.lock:
            return self.assembler.finish(wall_time=wall_time)

    def write(self, directory: str | Path, wall_time: float = 0.0):
        """Write the trial directory (logs, mission as run, report); returns (path, metrics)."""
        from coverage_fleet.report.trial import write_mission_trial

        return write_mission_trial(directory, self.mission, self.trial_log(wall_time))

    def destroy_node(self) -> None:
        if self.output_dir:
            path, _ = self.write(self.output_dir)
            self.get_logger().info(f"trial written to {path}")
        super().destroy_node()


def main() -> None:
    main_for(RecorderNode, program="coverage_fleet_recorder")


if __name__ == "__main__":
    main()
