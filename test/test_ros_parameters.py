"""Every node declares its parameters with a description and, for numbers, a range (so
`ros2 param describe` explains them and rclpy refuses out-of-range values), and a node
started with bad input exits with status 2 and says what is wrong, never a traceback."""

from __future__ import annotations

import signal
import subprocess
import sys
from pathlib import Path

import pytest

rclpy = pytest.importorskip("rclpy", reason="ROS 2 wheels not installed (scripts/setup_env.sh)")

from rcl_interfaces.msg import ParameterType  # noqa: E402

from coverage_fleet.ros.controller_node import ControllerNode  # noqa: E402
from coverage_fleet.ros.gate_node import GateNode  # noqa: E402
from coverage_fleet.ros.partition_node import PartitionNode  # noqa: E402
from coverage_fleet.ros.recorder_node import RecorderNode  # noqa: E402
from coverage_fleet.ros.simulator_node import SimulatorNode  # noqa: E402

MISSION = """\
name: parameter_check_plot   # invented test scenario
region: {vertices: [[0, 0], [8, 0], [8, 6], [0, 6]]}
density: {kind: uniform}
roster:
  - {name: rover_a, vehicle: differential_drive, initial_pose: [2.0, 2.0, 0.0]}
  - {name: drone_b, vehicle: multirotor, initial_pose: [6.0, 4.0, 0.0]}
"""
NODES = (SimulatorNode, ControllerNode, PartitionNode, GateNode, RecorderNode)
#: Declared by rclpy itself for every node (not ours to describe).
RCLPY_OWN = {"use_sim_time", "start_type_description_service"}


@pytest.fixture()
def mission(tmp_path: Path) -> Path:
    path = tmp_path / "mission.yaml"
    path.write_text(MISSION)
    return path


@pytest.mark.parametrize("node_class", NODES, ids=lambda c: c.__name__)
def test_every_parameter_has_a_description_and_numbers_have_a_range(
    node_class, mission: Path
) -> None:
    rclpy.init(args=["p", "--ros-args", "-p", f"mission_file:={mission}",
                     "-p", "robot_name:=rover_a",
                     "-p", f"output:={mission.parent / 'recording.mcap'}"])
    try:
        node = node_class()
        names = [n for n in node.list_parameters([], 0).names if n not in RCLPY_OWN]
        assert "mission_file" in names
        for descriptor in node.describe_parameters(names):
            assert len(descriptor.description) > 15, descriptor.name
            if descriptor.type in (ParameterType.PARAMETER_DOUBLE, ParameterType.PARAMETER_INTEGER):
                ranges = descriptor.floating_point_range or descriptor.integer_range
                assert ranges, f"{node_class.__name__}.{descriptor.name} has no range"
                value = node.get_parameter(descriptor.name).value
                assert ranges[0].from_value <= value <= ranges[0].to_value
        node.destroy_node()
    finally:
        rclpy.shutdown()


def run_node(module: str, *params: str) -> subprocess.CompletedProcess:
    args = [sys.executable, "-m", module, "--ros-args"]
    for param in params:
        args += ["-p", param]
    return subprocess.run(args, capture_output=True, text=True, timeout=60)


def test_an_out_of_range_parameter_is_refused_with_its_name(mission: Path) -> None:
    result = run_node(
        "coverage_fleet.ros.partition_node", f"mission_file:={mission}", "rate:=1000.0"
    )
    assert result.returncode == 2
    output = result.stdout + result.stderr
    assert "rate out of range" in output and "Traceback" not in output


def test_a_missing_mission_file_is_reported_as_a_problem(tmp_path: Path) -> None:
    result = run_node("coverage_fleet.ros.gate_node", f"mission_file:={tmp_path / 'none.yaml'}")
    assert result.returncode == 2
    output = result.stdout + result.stderr
    assert f"{tmp_path / 'none.yaml'}: file not found" in output and "Traceback" not in output


def test_gate_parameters_that_can_never_settle_are_refused(mission: Path) -> None:
    # The gate may stay shut with a robot up to progress + noise tolerance (0.05 + 0.02 m by
    # default) from its centroid (fleet/settling.py), so 0.03 m can never be relied on.
    result = run_node(
        "coverage_fleet.ros.gate_node", f"mission_file:={mission}", "settle_distance:=0.03"
    )
    assert result.returncode == 2
    output = result.stdout + result.stderr
    assert "reference_gate parameters: settle_distance: 0.03 m can never be reached" in output
    assert "Traceback" not in output


def test_a_controller_for_a_robot_not_in_the_roster_is_refused(mission: Path) -> None:
    result = run_node(
        "coverage_fleet.ros.controller_node", f"mission_file:={mission}", "robot_name:=ghost"
    )
    assert result.returncode == 2
    assert "no robot named 'ghost'" in result.stdout + result.stderr


@pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGTERM], ids=["SIGINT", "SIGTERM"])
def test_a_node_shuts_down_cleanly_on_a_signal(mission: Path, sig: signal.Signals) -> None:
    process = subprocess.Popen(
        [sys.executable, "-m", "coverage_fleet.ros.partition_node", "--ros-args",
         "-p", f"mission_file:={mission}"],
        stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True,
    )
    # Wait until the node is up (it logs once its parameters are read).
    line = process.stdout.readline()
    assert "partitioning" in line, line
    process.send_signal(sig)
    out, _ = process.communicate(timeout=30)
    assert process.returncode == 0, out
    assert "Traceback" not in out
