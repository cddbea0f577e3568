"""A robot whose state comes from a localization pose (geometry_msgs/PoseWithCovarianceStamped)
instead of odometry, through real node processes over DDS on loopback (this process plays the
robot and its localization):

- a pose outside the map frame (REP 105) is refused and counted on /diagnostics, and so is a
  pose whose covariance says the position is too uncertain; neither is answered;
- with good poses the base station (partition + reference gate) gets the robot's map-frame
  position from the state the controller republishes, commits a target, and the controller's
  commands, applied to a unicycle integrated here (the differential-drive kinematics,
  Siegwart, Nourbakhsh and Scaramuzza, "Introduction to Autonomous Mobile Robots", 2nd ed.,
  2011, ch. 3; from memory), bring the robot to under half its starting distance from the target.
"""

from __future__ import annotations

import math
import subprocess
import sys
import time
from pathlib import Path

import pytest

rclpy = pytest.importorskip("rclpy", reason="ROS 2 wheels not installed (scripts/setup_env.sh)")

from diagnostic_msgs.msg import DiagnosticArray  # noqa: E402
from geometry_msgs.msg import PointStamped, PoseWithCovarianceStamped, Twist  # noqa: E402
from std_msgs.msg import Float64MultiArray  # noqa: E402

from coverage_fleet.ros import qos, topics  # noqa: E402
from coverage_fleet.ros.conversions import (  # noqa: E402
    candidates_from_msg,
    target_from_msg,
    yaw_to_quaternion,
)

REPO = Path(__file__).resolve().parents[1]
MISSION = REPO / "config" / "missions" / "solar_row_quick_check.yaml"
#: Wall seconds before a test gives up waiting (a hang, not a timing check).
PATIENCE = 120.0


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


def spin_until(node, condition, what: str, processes) -> None:
    deadline = time.monotonic() + PATIENCE
    while not condition():
        for process in processes:
            assert process.poll() is None, process.communicate()[0][-3000:]
        assert time.monotonic() < deadline, f"gave up waiting for {what}"
        rclpy.spin_once(node, timeout_sec=0.02)


def test_controller_driven_by_localization_poses() -> None:
    controller = start(
        "coverage_fleet.ros.controller_node", "-r", "__ns:=/rover_a",
        "-p", "state_from_pose:=true", "-p", "max_position_std:=0.5",
        "-p", "diagnostics_period:=0.2",
    )
    station = start("coverage_fleet.ros.base_station", "-p", "startup_grace:=0.5")
    processes = [controller, station]
    rclpy.init()
    node = rclpy.create_node("pose_probe")
    commands: list[Twist] = []
    drops: dict[str, int] = {}
    targets: list = []
    candidates: list = []

    def on_diagnostics(msg: DiagnosticArray) -> None:
        for status in msg.status:
            if status.name == "coverage_fleet/rover_a/controller":
                for kv in status.values:
                    if kv.key.startswith("rover_a.dropped."):
                        drops[kv.key.rsplit(".", 1)[1]] = int(kv.value)

    node.create_subscription(Twist, "/rover_a/cmd_vel", commands.append, qos.COMMAND)
    node.create_subscription(DiagnosticArray, topics.DIAGNOSTICS, on_diagnostics, qos.DISPLAY)
    node.create_subscription(
        PointStamped, "/rover_a/coverage/target",
        lambda msg: targets.append(target_from_msg(msg)[0]), qos.LATCHED,
    )
    node.create_subscription(
        Float64MultiArray, f"/{topics.CANDIDATES}",
        lambda msg: candidates.append(candidates_from_msg(msg)), qos.REPORTS,
    )
    pose_pub = node.create_publisher(PoseWithCovarianceStamped, "/rover_a/pose", qos.STATE)
    robot = {"x": 2.0, "y": 2.0, "yaw": 0.0}
    fault = {"frame": "odom", "variance": 0.01}
    published: list[tuple[float, float]] = []
    step = 0.05

    def localize() -> None:
        # The robot moves by the newest command (unicycle), then its pose is published.
        if commands:
            v, w = commands[-1].linear.x, commands[-1].angular.z
            robot["x"] += step * v * math.cos(robot["yaw"])
            robot["y"] += step * v * math.sin(robot["yaw"])
            robot["yaw"] += step * w
        msg = PoseWithCovarianceStamped()
        msg.header.stamp = node.get_clock().now().to_msg()
        msg.header.frame_id = fault["frame"]
        msg.pose.pose.position.x, msg.pose.pose.position.y = robot["x"], robot["y"]
        msg.pose.pose.orientation = yaw_to_quaternion(robot["yaw"])
        covariance = [0.0] * 36
        covariance[0] = covariance[7] = fault["variance"]
        msg.pose.covariance = covariance
        published.append((robot["x"], robot["y"]))
        pose_pub.publish(msg)

    node.create_timer(step, localize)
    try:
        spin_until(node, lambda: drops.get("wrong_frame", 0) > 0, "wrong_frame", processes)
        fault["frame"] = "map"
        fault["variance"] = 4.0  # 2 m standard deviation, limit 0.5 m
        spin_until(node, lambda: drops.get("too_uncertain", 0) > 0, "too_uncertain", processes)
        assert commands == [], "a refused pose was answered"
        fault["variance"] = 0.01
        # Candidates are not latched: wait for one with rover_a (roster index 0) as well.
        spin_until(
            node,
            lambda: targets and commands and any(0 in c.positions for c in candidates),
            "a target, commands and rover_a in the candidates", processes,
        )
        # The partition placed rover_a where the localization said it was.
        placed = [tuple(c.positions[0]) for c in candidates if 0 in c.positions]
        assert placed and all(
            min(math.dist(p, q) for q in published) < 1e-9 for p in placed
        ), placed
        target = targets[-1]
        start_distance = math.dist((2.0, 2.0), target)
        assert start_distance > 1.0, target
        spin_until(
            node,
            lambda: math.dist((robot["x"], robot["y"]), targets[-1]) < 0.5 * start_distance,
            "the robot halfway to its target", processes,
        )
    finally:
        node.destroy_node()
        rclpy.shutdown()
        controller_output = stop(controller)
        station_output = stop(station)
        print(controller_output[-3000:], station_output[-3000:])  # shown when it fails
    assert "pose dropped: frame 'odom', expected 'map'" in controller_output
