"""A trial built from its recording: the recorded messages are decoded (the message classes
of the ROS 2 wheels, the conversions every node uses) and turned into the trial records of
coverage_fleet.fleet.trial_records, which the one trial writer (report.trial) puts on disk
exactly as it does for an offline simulation.

Per robot, every odometry message opens a row (a re-published state is dropped); the
command that follows fills its input, the controller's progress report for that state its
distance and progress flags, and a solve outcome (`coverage/solve`, one per MPC solve) for
that state its solver columns (`controller_ran` is true exactly on the states the
controller solved on). Targets, generations, candidates (one fleet.csv row each), gate
openings and the first "settled" and "stuck" come from the base station's topics. Messages
are replayed in the order the recorder received them, as it would have seen them live.

The mission comes from the recording's own attachments (the mission as run and every
vehicle file), so a recording rebuilds its trial on any machine.
"""

from __future__ import annotations

import math
import tempfile
from collections.abc import Callable, Iterable
from pathlib import Path
from typing import Any

import numpy as np
from rclpy.serialization import deserialize_message

from coverage_fleet.control.gate import GateOpening
from coverage_fleet.errors import ConfigError
from coverage_fleet.fleet.message_checks import BadMessageError, StateChecks, check_odometry
from coverage_fleet.fleet.mission import DATA_FOLDER, Mission, RobotEntry, load_mission
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
)

from . import topics
from .conversions import (
    candidates_from_msg,
    command_from_msg,
    odometry_from_msg,
    opening_from_msg,
    progress_from_msg,
    solve_from_msg,
    stamp_to_seconds,
    target_from_msg,
)
from .message_definitions import message_class
from .recording import MISSION_AS_RUN, Recording, read_recording


def _known(value: float) -> float | None:
    return None if math.isnan(value) else float(value)


class MessagesToRecords:
    """Turns the graph's messages into trial records for a TrialAssembler."""

    def __init__(
        self, mission: Mission, assembler: TrialAssembler, namespace: str = "/"
    ) -> None:
        """`namespace`: the fleet namespace the recorder ran in (topics are recorded by
        their absolute names)."""
        self.mission = mission
        self.assembler = assembler
        self.namespace = namespace
        # States are checked as the partition node checks them (a bad one is not a row of
        # the trial), except the stamp: the recorder's clock need not be the graph's.
        self.state_checks = StateChecks(mission.region, stamps=None)
        self.dropped = 0
        self.names = list(mission.robot_names)
        #: robot -> newest state heard (a command is turned into an input at it)
        self.states: dict[str, np.ndarray] = {}
        handlers: dict[str, Callable[[Any], None]] = {
            topics.CANDIDATES: self._on_candidates,
            topics.OPENINGS: self._on_opening,
            topics.GENERATION: lambda m: self.assembler.add(GenerationRecord(int(m.data))),
            topics.SETTLING: lambda m: self.assembler.add(SettlingRecord(str(m.data))),
        }
        for entry in mission.roster:
            handlers.update(self._robot_handlers(entry))
        self.handlers = {topics.in_namespace(namespace, t): h for t, h in handlers.items()}

    def _robot_handlers(self, entry: RobotEntry) -> dict[str, Callable[[Any], None]]:
        name = entry.name
        command = topics.command_topic(entry.vehicle.command_kind)

        def on_target(msg) -> None:
            self.assembler.add(TargetRecord(name, target_from_msg(msg)[0]))

        return {
            topics.robot_topic(name, topics.ODOM): lambda m: self._on_odom(entry, m),
            topics.robot_topic(name, command): lambda m: self._on_command(entry, m),
            topics.robot_topic(name, topics.TARGET): on_target,
            topics.robot_topic(name, topics.PROGRESS): lambda m: self._on_progress(name, m),
            topics.robot_topic(name, topics.SOLVE): lambda m: self._on_solve(name, m),
        }

    def wants(self, topic: str) -> bool:
        return topic in self.handlers

    def feed(self, topic: str, msg: Any) -> None:
        handler = self.handlers.get(topic)
        if handler is not None:
            handler(msg)

    def _on_odom(self, entry: RobotEntry, msg) -> None:
        values = odometry_from_msg(msg)
        stamp = stamp_to_seconds(msg.header.stamp)
        try:
            check_odometry(values, msg.header.frame_id, stamp, stamp, self.state_checks)
        except BadMessageError:
            self.dropped += 1
            return
        x = np.asarray(entry.vehicle.model.state_from_odometry(values), float)
        self.states[entry.name] = x
        self.assembler.add(StateRecord(entry.name, stamp_to_seconds(msg.header.stamp), x))

    def _on_command(self, entry: RobotEntry, msg) -> None:
        x = self.states.get(entry.name)
        if x is None:  # a command answers the newest state
            return
        values = command_from_msg(msg, entry.vehicle.command_kind)
        u = np.asarray(entry.vehicle.model.input_from_command(values, x), float)
        self.assembler.add(CommandRecord(entry.name, u))

    def _on_progress(self, name: str, msg) -> None:
        report = progress_from_msg(msg)
        self.assembler.add(
            ProgressRecord(
                name, report.state_time, _known(report.distance_at_commit),
                _known(report.distance_now),
            )
        )

    def _on_solve(self, name: str, msg) -> None:
        solve = solve_from_msg(msg)
        self.assembler.add(
            SolveRecord(
                name, solve.state_time, solve.solve_time, solve.status, solve.success,
                solve.fallback,
            )
        )

    def _on_candidates(self, msg) -> None:
        try:  # a malformed table or an index outside the roster is not part of the trial
            values = candidates_from_msg(msg, len(self.names))
        except BadMessageError:
            self.dropped += 1
            return
        positions = {self.names[i]: p for i, p in values.positions.items()}
        self.assembler.add(CandidatesRecord(values.time, values.cost, positions))

    def _on_opening(self, msg) -> None:
        try:
            values = opening_from_msg(msg, len(self.names))
        except BadMessageError:
            self.dropped += 1
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
        self.assembler.add(OpeningRecord(opening))


def mission_from_recording(recording: Recording, folder: Path) -> Mission:
    """The mission as run, from the recording's attachments (unpacked into `folder`, which
    must outlive the mission's use of its vehicle files)."""
    if MISSION_AS_RUN not in recording.attachments:
        raise ConfigError.single(
            str(recording.path), "attachments",
            f"no {MISSION_AS_RUN} attachment ("
            + (recording.problem if recording.problem and not recording.complete
               else "not a recording made by coverage-fleet launch") + ")",
        )
    for name, data in recording.attachments.items():
        if name == MISSION_AS_RUN or name.startswith(("vehicles/", f"{DATA_FOLDER}/")):
            target = folder / name
            target.parent.mkdir(parents=True, exist_ok=True)
            target.write_bytes(data)
    return load_mission(folder / MISSION_AS_RUN)


def trial_log_from_messages(
    mission: Mission, messages: Iterable[tuple[str, str, bytes]], wall_time: float = 0.0,
    duration: float | None = None, namespace: str = "/",
) -> TrialLog:
    """The trial log of (topic, type name, CDR bytes) messages in the order received."""
    assembler = TrialAssembler(mission, mission.simulation.seed)
    converter = MessagesToRecords(mission, assembler, namespace)
    classes: dict[str, type] = {}
    for topic, type_name, data in messages:
        if not converter.wants(topic):
            continue
        if type_name not in classes:
            classes[type_name] = message_class(type_name)
        converter.feed(topic, deserialize_message(data, classes[type_name]))
    return assembler.finish(wall_time=wall_time, duration=duration)


def recording_duration(recording: Recording) -> float:
    """Wall seconds between the first and the last recorded message."""
    if not recording.messages:
        return 0.0
    return (recording.messages[-1].log_time - recording.messages[0].log_time) / 1e9


def trial_from_recording(
    path: str | Path, directory: str | Path, move_recording: bool = False,
    extra_files: dict[str, Path] | None = None,
) -> tuple[Path, dict[str, Any], Recording]:
    """Write the trial directory of a recording; returns (path, metrics, recording). The
    recording goes into the trial as recording.mcap (moved or copied)."""
    from coverage_fleet.report.trial import write_mission_trial

    recording = read_recording(path)
    with tempfile.TemporaryDirectory(prefix="coverage-fleet-recording-") as folder:
        mission = mission_from_recording(recording, Path(folder))
        log = trial_log_from_messages(
            mission, ((m.topic, m.type_name, m.data) for m in recording.messages),
            wall_time=recording_duration(recording),
            duration=mission.simulation.duration,
            namespace=recording.metadata.get("run", {}).get("namespace", "/"),
        )
        silent = [name for name, robot in log.robots.items() if not robot.time]
        if silent:
            raise ConfigError.single(
                str(path), "messages",
                f"no odometry of {', '.join(silent)} was recorded: no trial to build"
                + (f" ({recording.problem})" if recording.problem else ""),
            )
        written, metrics = write_mission_trial(
            directory, mission, log,
            provenance=recording_provenance(recording),
            files={"recording.mcap": Path(path), **(extra_files or {})},
            move_files=move_recording,
        )
    return written, metrics, recording


def recording_provenance(recording: Recording) -> dict[str, Any]:
    """The provenance a recording carries, and how complete it is."""
    found: dict[str, Any] = dict(recording.metadata.get("provenance", {}))
    found["vehicle_sources"] = dict(recording.metadata.get("vehicle_files", {}))
    found["data_sources"] = dict(recording.metadata.get("data_files", {}))
    found["recording"] = {
        "file": "recording.mcap",
        "complete": recording.complete,
        "problem": recording.problem,
        "messages": len(recording.messages),
        "topics": len(recording.channels),
    }
    return found
