"""Recorder: writes every topic of the graph, as the raw CDR bytes that travelled, into an
MCAP recording (coverage_fleet.ros.recording), in a process of its own.

Why its own process: a recorder that shares a process with the launcher (or a node) stops
with it, competes with it for the interpreter lock and, when it keeps its data in memory,
loses the run on a crash. Here the launcher starts it like any node, first, and stops it
last, after the other nodes have sent their final messages; a crash or SIGKILL of the
recorder loses at most the chunk in progress (about a second), and the launcher builds the
trial from what was written (`report` does the same for any recording).

What it subscribes to:
- at start-up, every topic of the graph's contract (coverage_fleet.ros.topics, the
  mission's robots) with the QoS its publishers offer (coverage_fleet.ros.qos), so that
  nothing is missed: in lockstep the simulator does not take its first step before the
  recorder listens to every robot's odometry (`odom_subscribers`);
- every FLUSH_PERIOD, any other topic that appeared in the graph (node logs on /rosout,
  parameter events, topics added later), with the durability and reliability its
  publishers offer.

The recording's metadata and attachments (provenance, the mission as run, every vehicle
file) are written before the first message.
"""

from __future__ import annotations

import hashlib
import os
import shlex
import time
from importlib import metadata as package_metadata

import yaml
from rclpy.node import Node
from rclpy.qos import DurabilityPolicy, HistoryPolicy, QoSProfile, ReliabilityPolicy
from rclpy.utilities import get_rmw_implementation_identifier

from coverage_fleet.errors import ConfigError
from coverage_fleet.fleet.mission import (
    Mission,
    bundle_data_files,
    load_mission,
    mission_as_run,
    with_vehicle_overrides,
)
from coverage_fleet.inputs.fields import Collector
from coverage_fleet.provenance import provenance

from . import qos, topics
from .conversions import command_message_type
from .message_definitions import full_type_name, message_class
from .mission_parameters import parse_overrides
from .parameters import declare
from .recording import (
    FLUSH_PERIOD,
    MISSION_AS_RUN,
    RecordingWriter,
    vehicle_attachment,
)
from .runtime import StopRequested, main_for

#: History kept per subscription while the recorder catches up: the recorder must see every
#: message, and a burst (lockstep runs as fast as the controllers) must not overrun it.
RECORD_DEPTH = 1000
#: While stopping, the recorder keeps taking messages until none came for this long (s).
DRAIN_IDLE = 0.5
#: ... but never longer than this (s).
DRAIN_LIMIT = 5.0


def recording_profile(profile: QoSProfile) -> QoSProfile:
    """The graph's profile for a topic, with room for every message."""
    return QoSProfile(
        history=HistoryPolicy.KEEP_LAST,
        depth=max(RECORD_DEPTH, profile.depth),
        reliability=profile.reliability,
        durability=profile.durability,
    )


def graph_topics(mission: Mission, simulated_run: bool) -> list[tuple[str, str, QoSProfile]]:
    """(topic, type, QoS) of every topic of the graph's contract for `mission`.

    In a simulated run (`simulated_run`) the simulated robots' odometry comes from the
    headless simulator, which publishes it reliably with a history (qos.SIMULATED_STATE):
    the recorder subscribes reliably and so gets every state. Other robots' odometry comes
    from their drivers, which may publish best effort: subscribed best effort.
    """
    found = [
        (topics.CELLS, "visualization_msgs/msg/MarkerArray", qos.LATCHED),
        (topics.COST, "std_msgs/msg/Float64", qos.DISPLAY),
        (topics.CANDIDATES, "std_msgs/msg/Float64MultiArray", qos.REPORTS),
        (topics.GENERATION, "std_msgs/msg/UInt32", qos.LATCHED),
        (topics.OPENINGS, "std_msgs/msg/Float64MultiArray", qos.OPENINGS),
        (topics.SETTLING, "std_msgs/msg/String", qos.LATCHED),
        (topics.DIAGNOSTICS, "diagnostic_msgs/msg/DiagnosticArray", qos.DISPLAY),
        (topics.CLOCK, "rosgraph_msgs/msg/Clock", qos.CLOCK),
    ]
    if mission.keep_apart.enabled:  # what each controller's buffered cells were built from
        found.append((topics.SNAPSHOT, "std_msgs/msg/Float64MultiArray", qos.REPORTS))
    for entry in mission.roster:
        kind = entry.vehicle.command_kind
        command = command_message_type(kind, entry.vehicle.command_stamped)
        command_type = f"{command.__module__.split('.')[0]}/msg/{command.__name__}"
        name = entry.name
        # odom last: the lockstep simulator starts once the recorder listens to it, and by
        # then every other subscription of the recorder exists.
        found += [
            (topics.robot_topic(name, topics.command_topic(kind)), command_type, qos.COMMAND),
            (topics.robot_topic(name, topics.TARGET), "geometry_msgs/msg/PointStamped",
             qos.LATCHED),
            (topics.robot_topic(name, topics.PROGRESS), "geometry_msgs/msg/Vector3Stamped",
             qos.ROBOT_REPORTS),
            (topics.robot_topic(name, topics.PLAN), "nav_msgs/msg/Path", qos.DISPLAY),
            (topics.robot_topic(name, topics.SOLVE), "diagnostic_msgs/msg/DiagnosticStatus",
             qos.ROBOT_REPORTS),
        ]
    found += [
        (
            topics.robot_topic(e.name, topics.ODOM), "nav_msgs/msg/Odometry",
            qos.SIMULATED_STATE if simulated_run and e.simulated else qos.STATE_RECORDED,
        )
        for e in mission.roster
    ]
    return found


def ros_provenance() -> dict[str, str]:
    """The ROS side of the provenance: distribution (ROS installs set ROS_DISTRO; the
    wheels are identified by their rclpy version) and middleware."""
    try:
        rclpy_version = package_metadata.version("ros-rclpy")
    except package_metadata.PackageNotFoundError:
        rclpy_version = "unknown"
    return {
        "ros_distro": os.environ.get("ROS_DISTRO", "unknown (ROS 2 wheels)"),
        "rclpy": rclpy_version,
        "rmw": get_rmw_implementation_identifier(),
        "ros_domain_id": os.environ.get("ROS_DOMAIN_ID", "0"),
        "ros_automatic_discovery_range": os.environ.get("ROS_AUTOMATIC_DISCOVERY_RANGE", ""),
    }


class RecorderNode(Node):
    def __init__(self) -> None:
        super().__init__("coverage_recorder")
        mission_file = declare(self, "mission_file", "", "Mission file (YAML) of the run.")
        overrides = declare(
            self, "vehicle_overrides", "",
            "JSON object robot -> vehicle file: the launcher's --vehicle overrides.",
        )
        output = declare(self, "output", "", "MCAP file to write (must not exist yet).")
        duration = declare(
            self, "duration", 0.0,
            "Simulated seconds of the run (0: the mission's), for the mission as run.",
            (0.0, 1e7),
        )
        simulation = declare(
            self, "simulation", "", "Simulation mode of the run (lockstep, realtime, '')."
        )
        command_line = declare(
            self, "command_line", "", "The command line that started the run (provenance)."
        )
        if not output:
            raise ConfigError.single("recorder parameters", "output", "is required")
        options = Collector("recorder parameters")
        self.mission = with_vehicle_overrides(
            load_mission(mission_file), parse_overrides(overrides, "recorder parameters"),
            options
        )
        self.writer = RecordingWriter(output)
        self._describe_run(duration, simulation, command_line)
        self.subscribed: dict[str, str] = {}
        self.received = 0
        for topic, type_name, profile in graph_topics(self.mission, bool(simulation)):
            self._record(topic, type_name, recording_profile(profile))
        self.create_timer(FLUSH_PERIOD, self._tick)
        self.get_logger().info(
            f"recording {len(self.subscribed)} topics to {output} "
            f"(chunks closed every {FLUSH_PERIOD:g} s)"
        )

    def _describe_run(self, duration: float, simulation: str, command_line: str) -> None:
        mission = self.mission
        writer = self.writer
        found = provenance(shlex.split(command_line) if command_line else None)
        writer.add_metadata("provenance", {**found, **ros_provenance()})
        writer.add_metadata(
            "run",
            {
                "mission": mission.name,
                "mission_file": str(mission.source),
                "namespace": self.get_namespace(),
                "simulation": simulation or "none (real robots)",
                "duration_s": repr(duration or mission.simulation.duration),
                "seed": str(mission.simulation.seed),
                "started_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
            },
        )
        writer.add_attachment(f"mission/{mission.source.name}", mission.source.read_bytes())
        as_run = mission_as_run(
            mission, mission.simulation.seed, duration or mission.simulation.duration
        )
        sources, hashes = {}, {}
        for item, entry in zip(as_run["roster"], mission.roster, strict=True):
            data = entry.vehicle_path.read_bytes()
            writer.add_attachment(vehicle_attachment(entry.name), data)
            item["vehicle"] = vehicle_attachment(entry.name)
            sources[entry.name] = str(entry.vehicle_path)
            hashes[entry.name] = hashlib.sha256(data).hexdigest()
        writer.add_metadata("vehicle_files", sources)
        writer.add_metadata("vehicle_sha256", hashes)
        data_sources = {}
        for name, source in bundle_data_files(as_run).items():
            writer.add_attachment(name, source.read_bytes())
            data_sources[name] = str(source)
        writer.add_metadata("data_files", data_sources)
        writer.add_attachment(
            MISSION_AS_RUN,
            yaml.safe_dump(as_run, sort_keys=False, default_flow_style=None).encode(),
        )
        writer.flush()

    def _record(self, topic: str, type_name: str, profile: QoSProfile) -> None:
        """Record a topic (relative names resolve in this node's namespace, the fleet's);
        the channel carries the absolute name."""
        topic = self.resolve_topic_name(topic)
        type_name = full_type_name(type_name)
        channel = self.writer.channel(topic, type_name)
        write = self.writer.write

        def on_message(data: bytes, channel: int = channel) -> None:
            self.received += 1
            write(channel, data, time.time_ns())

        self.create_subscription(message_class(type_name), topic, on_message, profile, raw=True)
        self.subscribed[topic] = type_name

    def _tick(self) -> None:
        self.writer.flush()
        self._discover()

    def _discover(self) -> None:
        """Subscribe to topics that appeared in the graph, with their publishers' QoS."""
        for topic, types in self.get_topic_names_and_types():
            if topic in self.subscribed or len(types) != 1:
                continue
            publishers = self.get_publishers_info_by_topic(topic)
            if not publishers:
                continue
            try:
                message_class(types[0])
            except (ImportError, AttributeError, ValueError):
                continue  # a type this environment cannot decode: not recordable here
            profiles = [p.qos_profile for p in publishers]
            latched = all(p.durability == DurabilityPolicy.TRANSIENT_LOCAL for p in profiles)
            reliable = all(p.reliability == ReliabilityPolicy.RELIABLE for p in profiles)
            self._record(
                topic, types[0],
                QoSProfile(
                    history=HistoryPolicy.KEEP_LAST,
                    depth=RECORD_DEPTH,
                    reliability=(
                        ReliabilityPolicy.RELIABLE if reliable
                        else ReliabilityPolicy.BEST_EFFORT
                    ),
                    durability=(
                        DurabilityPolicy.TRANSIENT_LOCAL if latched
                        else DurabilityPolicy.VOLATILE
                    ),
                ),
            )

    def before_stop(self) -> None:
        """Take what is still queued (the other nodes' last messages), then finish."""
        executor = self.executor
        started = idle_since = time.monotonic()
        while executor is not None and time.monotonic() - started < DRAIN_LIMIT:
            before = self.received
            try:
                executor.spin_once(timeout_sec=0.05)
            except (StopRequested, KeyboardInterrupt):
                break  # a second stop signal: finish now
            now = time.monotonic()
            if self.received != before:
                idle_since = now
            elif now - idle_since >= DRAIN_IDLE:
                break
        self.writer.close()

    def destroy_node(self) -> None:
        writer: RecordingWriter | None = getattr(self, "writer", None)
        if writer is not None:
            writer.close()
        super().destroy_node()


def main() -> None:
    main_for(RecorderNode, program="coverage_fleet_recorder")

if __name__ == "__main__":
    main()
