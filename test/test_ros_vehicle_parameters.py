"""Vehicle and MPC settings are parameters of the controller node: a vehicle file given with
`--params-file` (the ROS 2 parameter-file mechanism, docs.ros.org "Understanding
parameters" and the rcl parameter-file format) sets them, the standard parameter services
(rcl_interfaces GetParameters / DescribeParameters, what `ros2 param` calls) show them,
and a bad value is refused as the vehicle loader refuses it in a vehicle file.

Real controller processes on loopback; the test is an rclpy parameter client.
"""

from __future__ import annotations

import subprocess
import sys
import time
from pathlib import Path

import pytest

rclpy = pytest.importorskip("rclpy", reason="ROS 2 wheels not installed (scripts/setup_env.sh)")

from rclpy.parameter_client import AsyncParameterClient  # noqa: E402

from coverage_fleet.errors import ConfigError  # noqa: E402
from coverage_fleet.inputs.reader import read_yaml_file  # noqa: E402
from coverage_fleet.ros.vehicle_parameters import params_files  # noqa: E402
from coverage_fleet.vehicles.loader import load_vehicle_file  # noqa: E402

REPO = Path(__file__).resolve().parents[1]
MISSION = REPO / "config" / "missions" / "solar_row_quick_check.yaml"  # rover_a: diff. drive
CAR = REPO / "config" / "vehicles" / "car_like.yaml"
PATIENCE = 60.0


def controller(*ros_args: str) -> subprocess.Popen:
    return subprocess.Popen(
        [sys.executable, "-m", "coverage_fleet.ros.controller_node", "--ros-args",
         "-r", "__ns:=/rover_a", "-p", f"mission_file:={MISSION}", *ros_args],
        stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True,
    )


def wait(node, future) -> object:
    deadline = time.monotonic() + PATIENCE
    while not future.done():
        assert time.monotonic() < deadline, "no answer from the parameter services"
        rclpy.spin_once(node, timeout_sec=0.1)
    return future.result()


def test_params_file_alone_sets_the_controllers_vehicle() -> None:
    process = controller("--params-file", str(CAR))
    rclpy.init()
    node = rclpy.create_node("vehicle_parameter_probe")
    try:
        client = AsyncParameterClient(node, "/rover_a/controller")
        deadline = time.monotonic() + PATIENCE
        while not client.services_are_ready():
            assert process.poll() is None, process.communicate()[0][-3000:]
            assert time.monotonic() < deadline, "the controller's parameter services never came"
            rclpy.spin_once(node, timeout_sec=0.1)
        file_values = read_yaml_file(CAR)[0]["/**"]["ros__parameters"]
        names = ["vehicle.model", "vehicle.max_speed", "vehicle.max_steering_angle",
                 "vehicle.wheelbase", "mpc.horizon", "mpc.state_weights"]
        answer = wait(node, client.get_parameters(names))
        got = {
            name: rclpy.parameter.parameter_value_to_python(value)
            for name, value in zip(names, answer.values, strict=True)
        }
        # The file's values, not the roster's differential-drive file.
        assert got["vehicle.model"] == "car_like"
        for key in ("max_speed", "max_steering_angle", "wheelbase"):
            assert got[f"vehicle.{key}"] == pytest.approx(file_values["vehicle"][key])
        assert got["mpc.horizon"] == file_values["mpc"]["horizon"]
        assert list(got["mpc.state_weights"]) == file_values["mpc"]["state_weights"]
        described = wait(node, client.describe_parameters(["vehicle.max_speed"])).descriptors[0]
        assert described.read_only
        # The range the loader checks (vehicles/parameters.py SPEED_MAX = 100 m/s).
        assert described.floating_point_range[0].to_value == pytest.approx(100.0)
        assert "m/s" in described.description and str(CAR) in described.description
    finally:
        node.destroy_node()
        rclpy.shutdown()
        process.terminate()
        output, _ = process.communicate(timeout=PATIENCE)
    assert f"rover_a: car_like from {CAR}" in output, output[-3000:]


def test_a_bad_value_in_the_params_file_is_refused_as_in_a_vehicle_file(tmp_path: Path) -> None:
    bad = tmp_path / "car_like_bad.yaml"
    bad.write_text(CAR.read_text().replace("max_speed: 3.0", "max_speed: -1.0"))
    with pytest.raises(ConfigError) as refused:
        load_vehicle_file(bad)
    expected = str(refused.value.problems[0])
    assert expected.startswith(f"{bad}: vehicle.max_speed: must be greater than 0")
    process = controller("--params-file", str(bad))
    output, _ = process.communicate(timeout=PATIENCE)
    assert process.returncode == 2, output[-3000:]
    assert expected in output and "Traceback" not in output


def test_vehicle_parameters_and_a_vehicle_file_together_are_refused() -> None:
    process = controller("--params-file", str(CAR), "-p", f"vehicle_file:={CAR}")
    output, _ = process.communicate(timeout=PATIENCE)
    assert process.returncode == 2, output[-3000:]
    assert f"{CAR}: vehicle: vehicle settings are given as parameters" in output


def test_params_files_are_found_among_the_ros_arguments() -> None:
    argv = ["prog", "--params-file", "not_ros.yaml", "--ros-args", "-p", "a:=1",
            "--params-file", "one.yaml", "--params-file", "two.yaml", "--", "tail"]
    assert params_files(argv) == ["one.yaml", "two.yaml"]
