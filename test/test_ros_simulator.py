"""The headless simulator publishes state only for robots the mission marks simulated: a
real robot's odometry comes from the robot (its localization), never from the simulator."""

from __future__ import annotations

from pathlib import Path

import pytest

rclpy = pytest.importorskip("rclpy", reason="ROS 2 wheels not installed (scripts/setup_env.sh)")

from coverage_fleet.ros import topics  # noqa: E402
from coverage_fleet.ros.simulator_node import SimulatorNode  # noqa: E402

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
