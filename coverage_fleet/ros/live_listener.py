"""The live view's ears: a node that joins a running graph and feeds a FleetWatch.

Thin on purpose: every callback converts a message with coverage_fleet.ros.conversions and
hands plain values to coverage_fleet.cli.live_state.FleetWatch, where the rules live.

- It runs in its own rclpy Context (so it can share a process with another node, e.g. the
  launcher's recorder, and starts and stops without touching it) and installs no signal
  handler: Ctrl-C reaches the caller as KeyboardInterrupt between short waits.
- Robots are found while it runs: the mission's roster (when given) from the start, and
  every namespace that has an `odom` topic of type nav_msgs/Odometry next to a
  `coverage/target` or `coverage/progress` topic, looked for every DISCOVERY_PERIOD. A
  robot that vanishes keeps its row and turns stale.
- With a fleet namespace (`/yard_b`) the node lives in it, so the relative topic names are
  that fleet's, and only robots directly under it are found (one name segment below).
- A message that cannot be read (a malformed table, a wrong field) is counted as odd by the
  watch and the view goes on: one bad publisher never stops it.
- /rosout warnings and errors of other nodes go to the watch (and to `on_log`, which the
  launcher uses to relay them to its terminal).
- It samples, it does not record: per topic it keeps only the newest message (keep-last 1,
  see NEWEST) and `spin` handles what is waiting once per call, then sleeps. So its work is
  bounded by the number of topics, not by their rates: in the launcher's process it shares
  the interpreter with the recorder, which must see every message of a fast lockstep run.
"""

from __future__ import annotations

import math
import os
import re
import time
from collections.abc import Callable, Iterable
from dataclasses import dataclass

import rclpy
from diagnostic_msgs.msg import DiagnosticArray, DiagnosticStatus
from geometry_msgs.msg import PointStamped, Vector3Stamped
from nav_msgs.msg import Odometry
from rcl_interfaces.msg import Log
from rclpy.context import Context
from rclpy.executors import SingleThreadedExecutor
from rclpy.qos import DurabilityPolicy, HistoryPolicy, QoSProfile, ReliabilityPolicy
from rclpy.signals import SignalHandlerOptions
from rosgraph_msgs.msg import Clock
from std_msgs.msg import Float64MultiArray, String

from coverage_fleet.cli.live_state import FleetWatch
from coverage_fleet.fleet.message_checks import BadMessageError
from coverage_fleet.interrupts import RUN_STOP_SIGNALS, signals_held

from . import qos, topics
from .conversions import (
    candidates_from_msg,
    odometry_from_msg,
    opening_from_msg,
    progress_from_msg,
    solve_from_msg,
    stamp_to_seconds,
    target_from_msg,
)
from .fleet_stop import listen_to_fleet_stop

#: Seconds between looks at the graph for robots that appeared.
DISCOVERY_PERIOD = 1.0
#: /rosout levels relayed (rcl_interfaces/Log: WARN 30, ERROR 40, FATAL 50).
RELAYED_LEVEL = Log.WARN
LOG_LEVEL_NAMES = {Log.WARN: "WARN", Log.ERROR: "ERROR", Log.FATAL: "FATAL"}
#: /rosout as rclpy publishes it: reliable, transient-local (late joiners get recent lines).
ROSOUT = QoSProfile(
    history=HistoryPolicy.KEEP_LAST, depth=100, reliability=ReliabilityPolicy.RELIABLE,
    durability=DurabilityPolicy.TRANSIENT_LOCAL,
)
#: The view's QoS for a topic it samples: the newest message only (reliable, as published;
#: transient-local where the graph latches, so a late joiner gets the latest at once).
NEWEST = QoSProfile(
    history=HistoryPolicy.KEEP_LAST, depth=1, reliability=ReliabilityPolicy.RELIABLE,
    durability=DurabilityPolicy.VOLATILE,
)
NEWEST_LATCHED = QoSProfile(
    history=HistoryPolicy.KEEP_LAST, depth=1, reliability=ReliabilityPolicy.RELIABLE,
    durability=DurabilityPolicy.TRANSIENT_LOCAL,
)
#: /diagnostics has a publisher per node on one topic: keep enough for one round of all.
DIAGNOSTICS = QoSProfile(
    history=HistoryPolicy.KEEP_LAST, depth=50, reliability=ReliabilityPolicy.RELIABLE,
    durability=DurabilityPolicy.VOLATILE,
)


@dataclass(frozen=True)
class LogLine:
    level: str
    node: str
    message: str


def _level(status: DiagnosticStatus) -> int:
    level = status.level
    return level[0] if isinstance(level, bytes) else int(level)


def robots_in_graph(
    names_and_types: Iterable[tuple[str, list[str]]], namespace: str = ""
) -> list[str]:
    """Namespaces directly under the fleet `namespace` ("" or "/yard_b") that look like a
    robot of this package: an Odometry `odom` topic and a `coverage/target` or
    `coverage/progress` topic beside it. Without a fleet namespace a robot may sit deeper
    (as before); with one, a robot is one name segment, as the roster's names are."""
    found = dict(names_and_types)
    prefix = namespace.rstrip("/")
    segment = "[^/]+" if prefix else ".+"
    odom = re.compile("^" + re.escape(prefix) + f"/({segment})/" + re.escape(topics.ODOM) + "$")
    robots = []
    for name, types in found.items():
        match = odom.match(name)
        if match and "nav_msgs/msg/Odometry" in types:
            robot = match.group(1)
            # Graph names are absolute; robot_topic is relative to the fleet namespace.
            beside = (f"{prefix}/" + topics.robot_topic(robot, t)
                      for t in (topics.TARGET, topics.PROGRESS))
            if any(name in found for name in beside):
                robots.append(robot)
    return sorted(robots)


class LiveListener:
    """A node in a context of its own that feeds `watch`; call `spin(seconds)` often and
    `close()` at the end."""

    def __init__(
        self,
        watch: FleetWatch,
        robots: Iterable[str] = (),
        on_log: Callable[[LogLine], None] | None = None,
        clock: Callable[[], float] = time.monotonic,
        namespace: str = "",
    ) -> None:
        self.watch = watch
        self.namespace = namespace
        self.clock = clock
        self.on_log = on_log
        self.context = Context()
        rclpy.init(
            context=self.context, signal_handler_options=SignalHandlerOptions.NO,
        )
        self.node = rclpy.create_node(
            f"coverage_fleet_watch_{os.getpid()}", context=self.context,
            namespace=namespace or None, start_parameter_services=False,
        )
        self.executor = SingleThreadedExecutor(context=self.context)
        self.executor.add_node(self.node)
        self.roster = list(robots)
        self.listened: set[str] = set()
        self._next_discovery = 0.0
        self._handled = 0
        node = self.node
        node.create_subscription(
            Float64MultiArray, topics.CANDIDATES,
            self._guarded(topics.CANDIDATES, self._on_candidates), NEWEST,
        )
        node.create_subscription(
            Float64MultiArray, topics.OPENINGS,
            self._guarded(topics.OPENINGS, self._on_opening), NEWEST_LATCHED,
        )
        node.create_subscription(
            String, topics.SETTLING,
            self._guarded(topics.SETTLING, lambda m: watch.saw_settling(m.data)),
            NEWEST_LATCHED,
        )
        node.create_subscription(
            DiagnosticArray, topics.DIAGNOSTICS,
            self._guarded(topics.DIAGNOSTICS, self._on_diagnostics), DIAGNOSTICS,
        )
        node.create_subscription(
            Clock, topics.CLOCK,
            self._guarded(topics.CLOCK, lambda m: watch.saw_clock(stamp_to_seconds(m.clock))),
            qos.CLOCK,
        )
        node.create_subscription(Log, "/rosout", self._guarded("/rosout", self._on_log), ROSOUT)
        listen_to_fleet_stop(node, lambda stopped: watch.saw_stop("STOPPED" if stopped else "off"))
        for robot in self.roster:
            self._listen_to(robot)

    # --- plumbing -----------------------------------------------------------------------

    def _guarded(self, where: str, callback: Callable) -> Callable:
        """A callback that turns any fault while reading a message into an odd message: the
        view must outlive whatever a publisher sends (the reason is shown, not raised)."""

        def guarded(msg) -> None:
            self._handled += 1
            try:
                callback(msg)
            except Exception as error:  # any fault while reading: see the docstring
                self.watch.odd(where, f"{type(error).__name__}: {error}"[:80])

        return guarded

    def _listen_to(self, robot: str) -> None:
        if robot in self.listened:
            return
        self.listened.add(robot)
        self.watch.robot(robot)
        node = self.node

        def topic(name: str) -> str:
            return topics.robot_topic(robot, name)

        node.create_subscription(
            Odometry, topic(topics.ODOM),
            self._guarded(topic(topics.ODOM), lambda m: self._on_odom(robot, m)), qos.STATE_IN,
        )
        node.create_subscription(
            PointStamped, topic(topics.TARGET),
            self._guarded(topic(topics.TARGET), lambda m: self._on_target(robot, m)),
            NEWEST_LATCHED,
        )
        node.create_subscription(
            Vector3Stamped, topic(topics.PROGRESS),
            self._guarded(topic(topics.PROGRESS), lambda m: self._on_progress(robot, m)),
            NEWEST,
        )
        node.create_subscription(
            DiagnosticStatus, topic(topics.SOLVE),
            self._guarded(topic(topics.SOLVE), lambda m: self._on_solve(robot, m)),
            NEWEST,
        )

    def discover(self) -> None:
        for robot in robots_in_graph(self.node.get_topic_names_and_types(), self.namespace):
            self._listen_to(robot)

    def spin(self, seconds: float) -> None:
        """Handle the messages waiting (at most one per topic, see NEWEST), look for new
        robots when due, then sleep out the rest of `seconds`."""
        deadline = self.clock() + seconds
        if self.clock() >= self._next_discovery:
            self._next_discovery = self.clock() + DISCOVERY_PERIOD
            self.discover()
        # Each pass handles one ready message; stop at the first pass that handled none.
        # A Ctrl-C (or the launcher's SIGTERM / SIGHUP) landing inside rclpy's take surfaced
        # as a RuntimeError from pybind11 ("Unable to convert call argument"), a traceback
        # instead of the launcher's stop: held until the passes are done (milliseconds).
        with signals_held(RUN_STOP_SIGNALS):
            for _ in range(4 * sum(1 for _ in self.node.subscriptions) + 4):
                before = self._handled
                self.executor.spin_once(timeout_sec=0.0)
                if self._handled == before:
                    break
        remaining = deadline - self.clock()
        if remaining > 0:
            time.sleep(remaining)

    def close(self) -> None:
        self.executor.shutdown(timeout_sec=1.0)
        self.node.destroy_node()
        rclpy.try_shutdown(context=self.context)

    # --- messages -> plain values -------------------------------------------------------

    def _on_odom(self, robot: str, msg: Odometry) -> None:
        odom = odometry_from_msg(msg)
        self.watch.saw_state(
            robot, self.clock(), stamp_to_seconds(msg.header.stamp), odom.x, odom.y,
            math.hypot(odom.body_vx, odom.body_vy),
        )

    def _on_target(self, robot: str, msg: PointStamped) -> None:
        xy, stamp_ns = target_from_msg(msg)
        self.watch.saw_target(robot, float(xy[0]), float(xy[1]), stamp_ns)

    def _on_progress(self, robot: str, msg: Vector3Stamped) -> None:
        report = progress_from_msg(msg)
        self.watch.saw_progress(
            robot, report.generation_stamp_ns, report.distance_at_commit, report.distance_now
        )

    def _on_solve(self, robot: str, msg: DiagnosticStatus) -> None:
        solve = solve_from_msg(msg)
        self.watch.saw_solve(robot, solve.solve_time, solve.status, solve.success, solve.fallback)

    def _on_candidates(self, msg: Float64MultiArray) -> None:
        try:  # a malformed table is the gate's to count; the view just skips it
            values = candidates_from_msg(msg)
        except BadMessageError:
            return
        self.watch.saw_candidates(values.time, values.cost)

    def _on_opening(self, msg: Float64MultiArray) -> None:
        try:
            values = opening_from_msg(msg)
        except BadMessageError:
            return
        self.watch.saw_opening(values.generation, values.time, values.reason)

    def _on_diagnostics(self, msg: DiagnosticArray) -> None:
        for status in msg.status:
            self.watch.saw_diagnostic(
                status.name, status.hardware_id, _level(status), status.message,
                {kv.key: kv.value for kv in status.values},
            )

    def _on_log(self, msg: Log) -> None:
        if msg.level < RELAYED_LEVEL or msg.name == self.node.get_logger().name:
            return
        line = LogLine(LOG_LEVEL_NAMES.get(msg.level, str(msg.level)), msg.name, msg.msg)
        self.watch.saw_log(line.level, line.node, line.message)
        if self.on_log is not None:
            self.on_log(line)
