"""One node list for both ways of starting the graph (coverage_fleet/cli/graph.py): the
launch files name only executables and files that exist, and the launcher's command lines
carry the same nodes, namespaces and parameters. launch_ros is not importable here, so the
launch files are checked by static analysis (ast) and the shared function by calling it."""

from __future__ import annotations

import ast
import importlib
import os
from pathlib import Path

import pytest

from coverage_fleet.cli import graph
from coverage_fleet.cli.launcher import command_line, ros_environment
from coverage_fleet.errors import ConfigError

REPO = Path(__file__).resolve().parents[1]
LAUNCH_FILES = sorted((REPO / "launch").glob("*.launch.py"))

MISSION = """\
name: graph_check_field   # invented test scenario
region: {vertices: [[0, 0], [12, 0], [12, 8], [0, 8]]}
density: {kind: uniform}
roster:
  - {name: rover_a, vehicle: differential_drive, initial_pose: [2.0, 2.0, 0.0]}
  - {name: drone_b, vehicle: multirotor, initial_pose: [9.0, 5.0, 0.0]}
"""


def console_scripts() -> dict[str, str]:
    tree = ast.parse((REPO / "setup.py").read_text())
    for node in tree.body:
        if isinstance(node, ast.Assign) and getattr(node.targets[0], "id", "") == "CONSOLE_SCRIPTS":
            entries = ast.literal_eval(node.value)
            return {e.split("=")[0].strip(): e.split("=")[1].strip() for e in entries}
    raise AssertionError("setup.py defines no CONSOLE_SCRIPTS")


@pytest.fixture()
def mission(tmp_path: Path) -> Path:
    path = tmp_path / "mission.yaml"
    path.write_text(MISSION)
    return path


def test_every_graph_executable_is_a_console_script_with_a_main() -> None:
    scripts = console_scripts()
    for executable, module in graph.EXECUTABLES.items():
        assert scripts.get(executable) == f"{module}:main", executable
        assert callable(importlib.import_module(module).main)


def test_the_three_launch_files_exist() -> None:
    names = {p.name for p in LAUNCH_FILES}
    assert names == {"fleet_sim.launch.py", "base_station.launch.py", "robot_controller.launch.py"}


@pytest.mark.parametrize("path", LAUNCH_FILES, ids=lambda p: p.name)
def test_launch_file_uses_only_the_shared_node_list(path: Path) -> None:
    tree = ast.parse(path.read_text())
    functions = [n.name for n in tree.body if isinstance(n, ast.FunctionDef)]
    assert functions == ["generate_launch_description"]
    # ROS-only imports live inside the function, so the file imports anywhere.
    top_imports = [n for n in tree.body if isinstance(n, ast.Import | ast.ImportFrom)]
    assert not top_imports
    imported = {}
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom) and node.module == "coverage_fleet.cli.graph":
            imported.update({a.name: node for a in node.names})
    assert "launch_actions" in imported
    for name in imported:
        assert callable(getattr(graph, name)), f"{path.name} imports missing graph.{name}"
    # No node is declared by hand: launch_ros is only reached through graph.launch_actions.
    source = path.read_text()
    assert "launch_ros" not in source and "executable=" not in source
    # Every LaunchConfiguration names a declared argument.
    declared, used = set(), set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Call) and isinstance(node.func, ast.Name) and node.args:
            first = node.args[0]
            if isinstance(first, ast.Constant) and node.func.id == "DeclareLaunchArgument":
                declared.add(first.value)
            if isinstance(first, ast.Constant) and node.func.id == "LaunchConfiguration":
                used.add(first.value)
    assert used and used <= declared, f"{path.name}: undeclared arguments {used - declared}"
    # The default mission the file names is installed with the package.
    for node in ast.walk(tree):
        if isinstance(node, ast.Call) and getattr(node.func, "attr", "") == "join":
            parts = [a.value for a in node.args if isinstance(a, ast.Constant)]
            assert (REPO.joinpath(*parts)).is_file(), f"{path.name}: no file {parts}"


def test_fleet_graph_has_base_station_controllers_and_simulator(mission: Path) -> None:
    nodes = graph.fleet_nodes(mission, "lockstep")
    assert [n.role for n in nodes] == [
        "base_station", "controller rover_a", "controller drone_b", "simulator",
    ]
    controllers = [n for n in nodes if n.executable == "coverage_fleet_controller"]
    assert [n.namespace for n in controllers] == ["/rover_a", "/drone_b"]
    assert all(n.parameters["use_sim_time"] for n in controllers)
    simulator = nodes[-1]
    assert simulator.parameters["mode"] == "lockstep"
    assert simulator.parameters["use_sim_time"] is False  # it is the clock
    assert all(Path(n.parameters["mission_file"]).is_file() for n in nodes)
    # In lockstep the partition follows the simulator's steps (fleet/lockstep.py) ...
    assert nodes[0].parameters["lockstep"] is True
    # ... and in realtime it partitions at its rate.
    assert graph.fleet_nodes(mission, "realtime")[0].parameters["lockstep"] is False


def test_without_simulation_there_is_no_simulator_and_wall_time(mission: Path) -> None:
    nodes = graph.fleet_nodes(mission, None)
    assert "simulator" not in [n.role for n in nodes]
    assert not any(n.parameters["use_sim_time"] for n in nodes)


def test_real_robots_rule_out_lockstep(tmp_path: Path) -> None:
    path = tmp_path / "mixed.yaml"
    real = "initial_pose: [9.0, 5.0, 0.0], simulated: false}"
    path.write_text(MISSION.replace("initial_pose: [9.0, 5.0, 0.0]}", real))
    with pytest.raises(ConfigError, match="lockstep simulation cannot wait for real robots"):
        graph.fleet_nodes(path, "lockstep")
    nodes = graph.fleet_nodes(path, "realtime")
    assert not any(n.parameters["use_sim_time"] for n in nodes)
    assert "simulator" in [n.role for n in nodes]


def test_vehicle_override_for_an_unknown_robot_is_a_config_error(mission: Path) -> None:
    with pytest.raises(ConfigError, match="not in the roster: ghost"):
        graph.fleet_nodes(mission, "lockstep", {"ghost": "x.yaml"})


def test_launcher_command_line_carries_name_namespace_and_parameters(mission: Path) -> None:
    spec = graph.controller_node_spec(mission, "rover_a", use_sim_time=True)
    line = command_line(spec, python="python3")
    assert line[:3] == ["python3", "-m", "coverage_fleet.ros.controller_node"]
    assert line[3] == "--ros-args"
    assert "__node:=controller" in line and "__ns:=/rover_a" in line
    assert "use_sim_time:=true" in line
    assert "vehicle_file:=''" in line  # an empty string stays a string for ROS's YAML parse


def test_launcher_keeps_discovery_local_unless_the_user_chose() -> None:
    env, notes = ros_environment({"PATH": os.environ.get("PATH", "")})
    assert env["ROS_AUTOMATIC_DISCOVERY_RANGE"] == "LOCALHOST"
    assert 5 <= int(env["ROS_DOMAIN_ID"]) <= 95
    assert len(notes) == 2
    env, notes = ros_environment({"ROS_AUTOMATIC_DISCOVERY_RANGE": "SUBNET", "ROS_DOMAIN_ID": "7"})
    assert env["ROS_AUTOMATIC_DISCOVERY_RANGE"] == "SUBNET"
    assert (env["ROS_DOMAIN_ID"], notes) == ("7", [])


def test_only_selects_a_part_of_the_deployment(mission: Path) -> None:
    nodes = graph.fleet_nodes(mission, None)
    assert [n.role for n in graph.select_nodes(nodes, ["base_station"], "m")] == ["base_station"]
    robot = graph.select_nodes(nodes, ["drone_b"], "m")
    assert [(n.role, n.namespace) for n in robot] == [("controller drone_b", "/drone_b")]
    assert graph.select_nodes(nodes, [], "m") == nodes
    with pytest.raises(ConfigError, match=r"unknown part.*ghost.*drone_b, rover_a"):
        graph.select_nodes(nodes, ["ghost"], "m")


def test_the_base_station_runs_the_vehicles_the_controllers_run(
    mission: Path, tmp_path: Path
) -> None:
    """`--vehicle rover_a=FILE` reaches the base station too: the partition node's keep-apart
    snapshots carry that file's footprint radius, not the roster's (a larger vehicle swapped
    in must be kept apart as the larger one)."""
    rclpy = pytest.importorskip("rclpy")
    from coverage_fleet.ros.partition_node import PartitionNode

    wide = tmp_path / "wide_rover.yaml"
    text = (REPO / "config/vehicles/differential_drive.yaml").read_text()
    assert "footprint_radius: 0.35" in text
    wide.write_text(text.replace("footprint_radius: 0.35", "footprint_radius: 0.6"))
    nodes = graph.fleet_nodes(mission, "lockstep", {"rover_a": wide})
    station = next(n for n in nodes if n.role == "base_station")
    controller = next(n for n in nodes if n.robot == "rover_a")
    assert controller.parameters["vehicle_file"] == str(wide.resolve())
    rclpy.init(args=["partition", *graph.ros_arguments(station)])
    try:
        node = PartitionNode()
        try:
            entry = next(e for e in node.mission.roster if e.name == "rover_a")
            assert entry.vehicle.model.footprint_radius == pytest.approx(0.6)
        finally:
            node.destroy_node()
    finally:
        rclpy.shutdown()


def test_the_lockstep_simulator_waits_for_every_reader_of_the_odometry(
    mission: Path, tmp_path: Path
) -> None:
    """The lockstep simulator's first step waits until each robot's odom has
    `odom_subscribers` subscribers (fleet/lockstep.py), so that no node misses the first
    states; the recorder, started first, is waited for by nothing else. The count must be
    every reader the graph has, counted here on the nodes themselves: one low (the gate's
    subscription was left out) and the first steps could go before the recorder listened."""
    rclpy = pytest.importorskip("rclpy")
    from coverage_fleet.ros.gate_node import GateNode
    from coverage_fleet.ros.partition_node import PartitionNode
    from coverage_fleet.ros.recorder_node import RecorderNode

    def readers(spec: graph.NodeSpec, *factories) -> int:
        rclpy.init(args=["odom_readers", *graph.ros_arguments(spec)])
        try:
            nodes = [factory() for factory in factories]
            try:
                return sum(s.topic_name == "/rover_a/odom" for n in nodes for s in n.subscriptions)
            finally:
                for node in nodes:
                    node.destroy_node()
        finally:
            rclpy.shutdown()

    for recorded in (False, True):
        nodes = {n.role: n for n in graph.fleet_nodes(mission, "lockstep", recorded=recorded)}
        station = readers(nodes["base_station"], PartitionNode, GateNode)
        recorder = readers(
            graph.recorder_node_spec(mission, tmp_path / f"{recorded}.mcap"), RecorderNode
        ) if recorded else 0
        controller = 1  # its robot's odom (controller_node.py; a simulated robot has no pose)
        assert station == 2 and recorder == int(recorded), (station, recorder)
        expected = station + controller + recorder
        assert nodes["simulator"].parameters["odom_subscribers"] == expected, recorded
