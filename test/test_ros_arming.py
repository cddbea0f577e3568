"""Arming: the controller of a robot the roster marks real starts disarmed and sends nothing
(no command, no progress report) until it is armed through its lifecycle services
(`coverage-fleet arm`: configure if needed, then activate; ROS 2 managed-node states,
design article "Managed nodes", from memory); then it commands the robot. Launching a
roster with real robots needs a person's confirmation, or the flag when nobody can answer.

A real controller process over DDS on loopback; the probe plays the robot (odometry of a
rover far from its target) and the gate (a committed target). Judged by message order: the
controller's own diagnostics say it has the robot's state while disarmed, and by then no
command has arrived.
"""

from __future__ import annotations

import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

rclpy = pytest.importorskip("rclpy", reason="ROS 2 wheels not installed (scripts/setup_env.sh)")

from diagnostic_msgs.msg import DiagnosticArray  # noqa: E402
from geometry_msgs.msg import PointStamped, Twist, Vector3Stamped  # noqa: E402
from nav_msgs.msg import Odometry  # noqa: E402
from support_snapshots import SnapshotSender  # noqa: E402

from coverage_fleet.cli.launcher import SAFETY_CAUTION  # noqa: E402
from coverage_fleet.cli.main import main  # noqa: E402
from coverage_fleet.ros import qos, topics  # noqa: E402
from coverage_fleet.ros.conversions import (  # noqa: E402
    odometry_to_msg,
    seconds_to_stamp,
    target_to_msg,
)
from coverage_fleet.vehicles.base import OdometryValues  # noqa: E402

REPO = Path(__file__).resolve().parents[1]
QUICK = REPO / "config" / "missions" / "solar_row_quick_check.yaml"
ROBOT = "rover_a"
PATIENCE = 120.0
DISARMED_REPORTS = 3


def real_rover_mission(folder: Path) -> Path:
    text = QUICK.read_text()
    line = "{name: rover_a, vehicle: differential_drive, initial_pose: [1.0, 1.0, 0.0]}"
    assert line in text
    path = folder / "mission.yaml"
    path.write_text(text.replace(line, line[:-1] + ", simulated: false}"))
    return path


def arm(mission: Path) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "coverage_fleet.cli.main", "arm", str(mission), "--wait", "60"],
        capture_output=True, text=True, timeout=PATIENCE, check=False,
    )


def test_a_disarmed_real_robot_controller_sends_nothing_until_armed(tmp_path: Path) -> None:
    mission = real_rover_mission(tmp_path)
    controller = subprocess.Popen(
        [sys.executable, "-m", "coverage_fleet.ros.controller_node", "--ros-args",
         "-r", f"__ns:=/{ROBOT}", "-p", f"mission_file:={mission}"],
        stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True,
    )
    rclpy.init()
    node = rclpy.create_node("arming_probe")
    commands: list[np.ndarray] = []
    progress: list[Vector3Stamped] = []
    disarmed_with_state: list[str] = []
    node.create_subscription(
        Twist, topics.robot_topic(ROBOT, topics.CMD_VEL),
        lambda m: commands.append(np.array([m.linear.x, m.angular.z])), qos.COMMAND)
    node.create_subscription(
        Vector3Stamped, topics.robot_topic(ROBOT, topics.PROGRESS), progress.append,
        qos.REPORTS)

    def on_diagnostics(msg: DiagnosticArray) -> None:
        for status in msg.status:
            values = {v.key: v.value for v in status.values}
            if (status.name == f"coverage_fleet/{ROBOT}/controller"
                    and status.message.startswith("disarmed")
                    and values.get("state_age") not in (None, "inf")):
                disarmed_with_state.append(status.message)

    node.create_subscription(DiagnosticArray, topics.DIAGNOSTICS, on_diagnostics, qos.DISPLAY)
    odom_pub = node.create_publisher(Odometry, topics.robot_topic(ROBOT, topics.ODOM), qos.STATE)
    target_pub = node.create_publisher(
        PointStamped, topics.robot_topic(ROBOT, topics.TARGET), qos.LATCHED)
    state = OdometryValues(x=1.0, y=1.0, yaw=0.0)
    snapshots = SnapshotSender(node, mission, ROBOT)  # keep-apart: the fleet is this robot

    def drive_until(condition, what: str) -> None:
        deadline = time.monotonic() + PATIENCE
        while not condition():
            assert controller.poll() is None, controller.communicate()[0][-3000:]
            assert time.monotonic() < deadline, f"never saw {what}"
            snapshots.send((state.x, state.y))
            odom_pub.publish(odometry_to_msg(
                state, node.get_clock().now().to_msg(), child_frame_id=f"{ROBOT}/base_link"))
            rclpy.spin_once(node, timeout_sec=0.05)

    try:
        target_pub.publish(target_to_msg([10.0, 6.0], seconds_to_stamp(1.0)))
        drive_until(lambda: len(disarmed_with_state) >= DISARMED_REPORTS,
                    "the controller disarmed with the robot's state")
        assert commands == [] and progress == []

        armed = arm(mission)
        assert armed.returncode == 0, armed.stdout + armed.stderr
        assert f"arm: {ROBOT}: armed" in armed.stdout and SAFETY_CAUTION in armed.stdout
        drive_until(lambda: any(np.abs(c).max() > 1e-3 for c in commands),
                    "a motion command after arming")
        drive_until(lambda: progress, "progress reports from the armed controller")
    finally:
        if controller.poll() is None:
            controller.send_signal(2)
            controller.communicate(timeout=PATIENCE)
        node.destroy_node()
        rclpy.shutdown()


def test_launching_real_robots_needs_a_confirmation(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    mission = real_rover_mission(tmp_path)
    out = tmp_path / "trial"
    # Under pytest stdin is not a terminal: nobody can answer, so the flag is required.
    status = main(["launch", str(mission), "--out", str(out)])
    err = capsys.readouterr().err
    assert status == 2 and "Traceback" not in err
    assert "command line: --confirm-real-robots: is required" in err
    assert f"({ROBOT}, " not in err and f"({ROBOT})" in err
    assert not out.exists() and not Path(f"{out}.run").exists()


def test_arm_refuses_a_robot_not_in_the_roster(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    mission = real_rover_mission(tmp_path)
    monkeypatch.setenv("ROS_DOMAIN_ID", "201")
    status = main(["arm", str(mission), "--robot", "ghost"])
    err = capsys.readouterr().err
    assert status == 2 and "command line: --robot: not in the roster: ghost" in err
