"""A controller that is stopped (Ctrl-C or SIGTERM, as a launcher or launch service sends
them) leaves its robot with the braking input as the last command, never the last motion
command (common practice: a stopping controller leaves its actuators in a safe state).

A real controller process over DDS on loopback; this test plays the robot (odometry of a
rover driving towards a far target) and the gate (a committed target), and listens to
cmd_vel.
"""

from __future__ import annotations

import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

rclpy = pytest.importorskip("rclpy", reason="ROS 2 wheels not installed (scripts/setup_env.sh)")

from geometry_msgs.msg import PointStamped, Twist  # noqa: E402
from nav_msgs.msg import Odometry  # noqa: E402
from support_snapshots import SnapshotSender  # noqa: E402

from coverage_fleet.fleet.mission import load_mission  # noqa: E402
from coverage_fleet.ros import qos, topics  # noqa: E402
from coverage_fleet.ros.conversions import (  # noqa: E402
    command_from_msg,
    odometry_to_msg,
    seconds_to_stamp,
    target_to_msg,
)
from coverage_fleet.vehicles.base import OdometryValues  # noqa: E402

REPO = Path(__file__).resolve().parents[1]
MISSION = REPO / "config" / "missions" / "solar_row_quick_check.yaml"
ROBOT = "rover_a"
PATIENCE = 120.0


def as_vector(msg: Twist) -> np.ndarray:
    values = command_from_msg(msg, "twist")
    return np.array([*values.linear, *values.angular])


@pytest.mark.parametrize("stop_signal", [signal.SIGINT, signal.SIGTERM], ids=["sigint", "sigterm"])
def test_the_last_command_of_a_stopped_controller_is_braking(stop_signal) -> None:
    mission = load_mission(MISSION)
    model = next(e for e in mission.roster if e.name == ROBOT).vehicle.model
    controller = subprocess.Popen(
        [sys.executable, "-m", "coverage_fleet.ros.controller_node", "--ros-args",
         "-r", f"__ns:=/{ROBOT}", "-p", f"mission_file:={MISSION}"],
        stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True,
    )
    rclpy.init()
    node = rclpy.create_node("controller_stop_probe")
    commands: list[np.ndarray] = []
    node.create_subscription(
        Twist, topics.robot_topic(ROBOT, topics.CMD_VEL),
        lambda msg: commands.append(as_vector(msg)), qos.COMMAND,
    )
    odom_pub = node.create_publisher(Odometry, topics.robot_topic(ROBOT, topics.ODOM), qos.STATE)
    target_pub = node.create_publisher(
        PointStamped, topics.robot_topic(ROBOT, topics.TARGET), qos.LATCHED
    )
    snapshots = SnapshotSender(node, MISSION, ROBOT)  # keep-apart: the fleet is this robot
    state = OdometryValues(x=1.0, y=1.0, yaw=0.0, body_vx=0.5)
    try:
        target_pub.publish(target_to_msg([10.0, 1.0], seconds_to_stamp(1.0)))
        x = model.state_from_odometry(state)
        braking = model.command_from_input(model.braking_input(x), x)
        expected = np.array([*braking.linear, *braking.angular])

        def moving() -> bool:
            return any(np.abs(c - expected).max() > 1e-6 for c in commands)

        deadline = time.monotonic() + PATIENCE
        # Drive until the controller has answered a good number of states, and commanded
        # motion (it brakes until its first keep-apart snapshot has arrived).
        while len(commands) < 20 or not moving():
            assert controller.poll() is None, controller.communicate()[0][-3000:]
            assert time.monotonic() < deadline, "the controller never commanded motion"
            snapshots.send((state.x, state.y))
            odom_pub.publish(odometry_to_msg(
                state, node.get_clock().now().to_msg(), child_frame_id=f"{ROBOT}/base_link"))
            rclpy.spin_once(node, timeout_sec=0.1)
        assert any(np.abs(c - expected).max() > 1e-6 for c in commands), (
            "the controller never commanded motion, so braking cannot be told apart")
        controller.send_signal(stop_signal)
        output, _ = controller.communicate(timeout=PATIENCE)
        assert controller.returncode == 0, output[-3000:]
        # Collect what is still on the way.
        settle_until = time.monotonic() + 2.0
        while time.monotonic() < settle_until:
            rclpy.spin_once(node, timeout_sec=0.1)
        assert np.allclose(commands[-1], expected, atol=1e-9), (commands[-3:], expected)
        assert "braking input sent" in output, output[-3000:]
    finally:
        if controller.poll() is None:
            controller.kill()
        node.destroy_node()
        rclpy.shutdown()
