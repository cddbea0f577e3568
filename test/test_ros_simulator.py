"""The headless simulator publishes state only for robots the mission marks simulated: a
real robot's odometry comes from the robot (its localization), never from the simulator.
At the end of a run it waits for its reliable readers to acknowledge the last states and
names the topics where one did not."""

from __future__ import annotations

import os
import signal
import sys
from pathlib import Path

import pytest
from support_processes import WatchedProcess

rclpy = pytest.importorskip("rclpy", reason="ROS 2 wheels not installed (scripts/setup_env.sh)")

from coverage_fleet.ros import topics  # noqa: E402
from coverage_fleet.ros.simulator_node import DELIVERY_LIMIT, SimulatorNode  # noqa: E402

MISSION = """\
name: mixed_real_quay   # invented test scenario
region: {vertices: [[0, 0], [8, 0], [8, 6], [0, 6]]}
density: {kind: uniform}
roster:
  - {name: rover_a, vehicle: differential_drive, initial_pose: [2.0, 2.0, 0.0]}
  - {name: boat_real, vehicle: surface_vessel, initial_pose: [6.0, 4.0, 0.0], simulated: false}
"""


def test_no_simulated_state_is_published_for_a_real_robot(tmp_path: Path) -> None:
    mission = tmp_path / "mission.yaml"
    mission.write_text(MISSION)
    rclpy.init(args=["s", "--ros-args", "-p", f"mission_file:={mission}", "-p", "mode:=realtime"])
    try:
        node = SimulatorNode()
        assert set(node.robots) == {"rover_a"}
        assert node.count_publishers(topics.robot_topic("rover_a", topics.ODOM)) == 1
        assert node.count_publishers(topics.robot_topic("boat_real", topics.ODOM)) == 0
        assert node.count_subscribers(topics.robot_topic("boat_real", topics.CMD_VEL)) == 0
        node.destroy_node()
    finally:
        rclpy.shutdown()


def test_an_unknown_mode_is_a_config_error(tmp_path: Path) -> None:
    from coverage_fleet.errors import ConfigError

    mission = tmp_path / "mission.yaml"
    mission.write_text(MISSION)
    rclpy.init(args=["s", "--ros-args", "-p", f"mission_file:={mission}", "-p", "mode:=fast"])
    try:
        with pytest.raises(ConfigError, match="mode: must be one of realtime, lockstep"):
            SimulatorNode()
    finally:
        rclpy.shutdown()


STALLED_READER = """
import rclpy
from nav_msgs.msg import Odometry
from rclpy.qos import QoSProfile, ReliabilityPolicy

rclpy.init()
node = rclpy.create_node("stalled_reader")
told = []

def heard(_msg):
    if not told:
        told.append(True)
        print("heard", flush=True)

profile = QoSProfile(depth=1000, reliability=ReliabilityPolicy.RELIABLE)
node.create_subscription(Odometry, "/rover_a/odom", heard, profile)
rclpy.spin(node)
"""
#: Wall seconds before a wait gives up (a hang, not a timing check).
PATIENCE = 120.0


def test_a_reliable_reader_that_stops_acknowledging_is_named_at_the_end(tmp_path: Path) -> None:
    """At the end of a run the simulator waits for its reliable readers (the recorder) to
    acknowledge the last states, and names the topic when one does not: here a reader
    process frozen with SIGSTOP (its middleware threads stop too). Reliable readers
    acknowledge what they received and writers keep what is unacknowledged (OMG, "DDS
    Interoperability Wire Protocol (DDSI-RTPS)" 2.5, 2022, sec. 8.4.7 and 8.4.12)."""
    mission = tmp_path / "mission.yaml"
    mission.write_text(MISSION)
    reader = WatchedProcess([sys.executable, "-c", STALLED_READER], PATIENCE)
    simulator = None
    try:
        simulator = WatchedProcess(
            [sys.executable, "-m", "coverage_fleet.ros.simulator_node", "--ros-args",
             "-p", f"mission_file:={mission}", "-p", "mode:=realtime", "-p", "duration:=3.0"],
            PATIENCE,
        )
        reader.wait_until(lambda: "heard" in reader.output, "the reader hearing odometry")
        os.kill(reader.process.pid, signal.SIGSTOP)
        simulator.wait()
    finally:
        for process in (reader, simulator):
            if process is not None:
                process.cleanup()
    output = simulator.output
    assert (
        f"the last states were not acknowledged within {DELIVERY_LIMIT:g} s on rover_a/odom"
        in output
    ), output
    assert "/clock" not in output.split("not acknowledged")[1].splitlines()[0]
