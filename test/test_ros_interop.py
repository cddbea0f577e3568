"""Interoperability with robot drivers and other fleets, through real node processes over
DDS on loopback (this process plays the robots):

- odometry from a best-effort publisher (rclpy's qos_profile_sensor_data, what many drivers
  use) is received: a best-effort subscription matches reliable and best-effort publishers
  (ROS 2 docs, "Quality of Service settings", QoS compatibility table);
- odometry whose pose is not in the map frame (REP 105) is refused and the refusal shows on
  /diagnostics;
- a vehicle file with `command: {stamped: true}` gets geometry_msgs/TwistStamped on
  `cmd_vel`, in the robot's base frame;
- two fleets in separate namespaces in one domain do not hear each other (relative topic
  names, ROS 2 design article "Topic and Service name mapping to DDS" / REP 144 naming);
- a second simulator in the domain is refused (/clock is global by convention, so two
  simulated fleets need separate domains).
"""

from __future__ import annotations

import subprocess
import sys
import time
from pathlib import Path

import pytest

rclpy = pytest.importorskip("rclpy", reason="ROS 2 wheels not installed (scripts/setup_env.sh)")

from diagnostic_msgs.msg import DiagnosticArray  # noqa: E402
from geometry_msgs.msg import TwistStamped, Vector3Stamped  # noqa: E402
from nav_msgs.msg import Odometry  # noqa: E402
from rclpy.qos import qos_profile_sensor_data  # noqa: E402
from std_msgs.msg import Float64MultiArray  # noqa: E402

from coverage_fleet.ros import qos, topics  # noqa: E402
from coverage_fleet.ros.conversions import (  # noqa: E402
    ProgressValues,
    odometry_to_msg,
    progress_to_msg,
)
from coverage_fleet.vehicles.base import OdometryValues  # noqa: E402

REPO = Path(__file__).resolve().parents[1]
MISSION = REPO / "config" / "missions" / "solar_row_quick_check.yaml"
ROVER = REPO / "config" / "vehicles" / "differential_drive.yaml"
ROBOTS = ("rover_a", "rover_b", "rover_c")
#: Wall seconds before a test gives up waiting (a hang, not a timing check).
PATIENCE = 60.0


def start(module: str, *ros_args: str) -> subprocess.Popen:
    return subprocess.Popen(
        [sys.executable, "-m", module, "--ros-args", "-p", f"mission_file:={MISSION}",
         *ros_args],
        stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True,
    )


def stop(process: subprocess.Popen) -> str:
    if process.poll() is None:
        process.terminate()
    return process.communicate(timeout=PATIENCE)[0]


def spin_until(node, condition, what: str, processes=()) -> None:
    deadline = time.monotonic() + PATIENCE
    while not condition():
        for process in processes:
            assert process.poll() is None, process.communicate()[0][-3000:]
        assert time.monotonic() < deadline, f"gave up waiting for {what}"
        rclpy.spin_once(node, timeout_sec=0.05)


def test_best_effort_odometry_wrong_frames_and_stamped_commands(tmp_path: Path) -> None:
    vehicle = tmp_path / "rover_stamped.yaml"
    vehicle.write_text(ROVER.read_text() + "    command:\n      stamped: true\n")
    controller = start(
        "coverage_fleet.ros.controller_node", "-r", "__ns:=/rover_a",
        "-p", f"vehicle_file:={vehicle}", "-p", "diagnostics_period:=0.2",
    )
    rclpy.init()
    node = rclpy.create_node("interop_probe")
    commands: list[TwistStamped] = []
    health: list[tuple[int, str, dict[str, str]]] = []

    def on_diagnostics(msg: DiagnosticArray) -> None:
        for status in msg.status:
            if status.name == "coverage_fleet/rover_a/controller":
                values = {kv.key: kv.value for kv in status.values}
                health.append((status.level[0], status.message, values))

    node.create_subscription(TwistStamped, "/rover_a/cmd_vel", commands.append, qos.COMMAND)
    node.create_subscription(DiagnosticArray, topics.DIAGNOSTICS, on_diagnostics, qos.DISPLAY)
    odom_pub = node.create_publisher(Odometry, "/rover_a/odom", qos_profile_sensor_data)
    state = OdometryValues(x=2.0, y=2.0, yaw=0.0)

    frame = ["odom"]

    def publish() -> None:
        odom_pub.publish(odometry_to_msg(
            state, node.get_clock().now().to_msg(), "rover_a/base_link", frame[0]))

    node.create_timer(0.1, publish)
    try:
        # A driver's odometry in its own odom frame: refused, and said so.
        spin_until(
            node,
            lambda: any(int(v.get("rover_a.dropped.wrong_frame", 0)) > 0 for _, _, v in health),
            "the wrong-frame refusal on /diagnostics", [controller],
        )
        level, message, _ = health[-1]
        assert level == 2 and "odometry refused" in message, health[-1]  # 2 = ERROR
        assert commands == [], "a state in the wrong frame was answered"
        # The same publisher in the map frame: received (best effort) and answered.
        frame[0] = "map"
        spin_until(node, lambda: len(commands) >= 3, "stamped commands", [controller])
        assert commands[-1].header.frame_id == "rover_a/base_link"
        assert commands[-1].header.stamp.sec > 0
    finally:
        node.destroy_node()
        rclpy.shutdown()
        output = stop(controller)
    assert "odometry dropped: frame 'odom', expected 'map'" in output


def test_two_fleets_in_one_domain_do_not_hear_each_other() -> None:
    stations = [
        start("coverage_fleet.ros.base_station", "-r", f"__ns:=/{fleet}",
              "-p", "startup_grace:=0.5")
        for fleet in ("fleet_a", "fleet_b")
    ]
    rclpy.init()
    node = rclpy.create_node("two_fleets_probe")
    heard = {"fleet_a": 0, "fleet_b": 0}
    other_stations: list[str] = []

    def on_diagnostics(msg: DiagnosticArray) -> None:
        other_stations.extend(
            kv.value for status in msg.status if status.name == "coverage_fleet/partition"
            for kv in status.values if kv.key == "other_stations"
        )

    node.create_subscription(DiagnosticArray, topics.DIAGNOSTICS, on_diagnostics, qos.DISPLAY)
    for fleet in heard:
        node.create_subscription(
            Float64MultiArray, f"/{fleet}/{topics.CANDIDATES}",
            lambda _msg, f=fleet: heard.__setitem__(f, heard[f] + 1), qos.REPORTS,
        )
    odom = {r: node.create_publisher(Odometry, f"/fleet_a/{r}/odom", qos.STATE) for r in ROBOTS}
    progress = {
        r: node.create_publisher(Vector3Stamped, f"/fleet_a/{r}/coverage/progress", qos.REPORTS)
        for r in ROBOTS
    }

    def robots_of_fleet_a() -> None:
        now = node.get_clock().now()
        for index, robot in enumerate(ROBOTS):
            values = OdometryValues(x=1.0 + 3.0 * index, y=2.0, yaw=0.0)
            odom[robot].publish(odometry_to_msg(values, now.to_msg(), f"{robot}/base_link"))
            progress[robot].publish(
                progress_to_msg(ProgressValues(0, float("nan"), float("nan"),
                                               now.nanoseconds * 1e-9)))

    node.create_timer(0.1, robots_of_fleet_a)
    try:
        spin_until(node, lambda: heard["fleet_a"] >= 5, "fleet_a's partition", stations)
        # Each station's two subscribers (partition and gate) are discovered one by one, and
        # fleet_b's station may still be starting on a loaded machine: hearing fleet_a's
        # partition says nothing about either, so wait until both stations' subscriptions
        # are seen, then give fleet_b as long again to (wrongly) hear fleet_a's robots.
        for fleet in ("fleet_a", "fleet_b"):
            spin_until(node, lambda f=fleet: node.count_subscribers(f"/{f}/rover_a/odom") == 2,
                       f"{fleet}'s station subscribing to its own robots", stations)
        heard_a_when_b_was_up = heard["fleet_a"]
        spin_until(node, lambda: heard["fleet_a"] >= heard_a_when_b_was_up + 5,
                   "fleet_a's partition after fleet_b was up", stations)
        # Each fleet's nodes subscribe to their own robots only (partition + gate).
        assert node.count_subscribers("/fleet_a/rover_a/odom") == 2
        assert node.count_subscribers("/fleet_b/rover_a/odom") == 2
        assert node.count_subscribers("/rover_a/odom") == 0
        assert heard["fleet_b"] == 0, "fleet_b partitioned fleet_a's robots"
        spin_until(node, lambda: len(other_stations) >= 2, "the partitions' diagnostics",
                   stations)
        # Different namespaces: neither station counts the other as a second one.
        assert set(other_stations) == {"0"}, other_stations
    finally:
        node.destroy_node()
        rclpy.shutdown()
        for station in stations:
            stop(station)


def test_a_second_base_station_for_the_same_fleet_is_reported() -> None:
    """Two stations in one namespace and domain would both send the robots targets: each
    partition node says so on /diagnostics (ERROR, the topic and the count) and in its
    log. Stations in different namespaces do not (test above: other_stations 0)."""
    stations = [
        start("coverage_fleet.ros.base_station", "-r", "__ns:=/fleet_x",
              "-p", "startup_grace:=0.5")
        for _ in range(2)
    ]
    rclpy.init()
    node = rclpy.create_node("second_station_probe")
    reports: list[tuple[int, str, dict[str, str]]] = []

    def on_diagnostics(msg: DiagnosticArray) -> None:
        for status in msg.status:
            if status.name == "coverage_fleet/partition":
                values = {kv.key: kv.value for kv in status.values}
                reports.append((status.level[0], status.message, values))

    node.create_subscription(DiagnosticArray, topics.DIAGNOSTICS, on_diagnostics, qos.DISPLAY)
    try:
        spin_until(
            node, lambda: any(v.get("other_stations") == "1" for _, _, v in reports),
            "a partition report naming the other station", stations,
        )
        level, message, _ = next(r for r in reports if r[2].get("other_stations") == "1")
        assert level == 2, message  # 2 = ERROR
        assert message.startswith("1 other node(s) publish /fleet_x/coverage/candidates")
        assert "a second base station for this fleet?" in message
    finally:
        node.destroy_node()
        rclpy.shutdown()
        outputs = [stop(station) for station in stations]
    assert any("a second base station for this fleet?" in o for o in outputs), outputs[0][-2000:]
    assert all("Traceback" not in o for o in outputs)


def test_a_second_simulator_in_the_domain_is_refused() -> None:
    simulators = [
        start("coverage_fleet.ros.simulator_node", "-r", f"__ns:=/{fleet}", "-p",
              "mode:=realtime")
        for fleet in ("fleet_a", "fleet_b")
    ]
    try:
        # Whichever notices the other first refuses to go on; then there is one clock again.
        deadline = time.monotonic() + PATIENCE
        while all(process.poll() is None for process in simulators):
            assert time.monotonic() < deadline, "both simulators kept running"
            time.sleep(0.2)
        refused = next(process for process in simulators if process.poll() is not None)
        output = refused.communicate()[0]
        assert refused.returncode == 2, output[-3000:]
        assert "/clock: 1 other node(s) publish /clock in this domain" in output
        assert "needs a ROS_DOMAIN_ID of its own" in output and "Traceback" not in output
    finally:
        for process in simulators:
            stop(process)
