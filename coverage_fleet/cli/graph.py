"""The node list of the ROS graph, built in ONE place for both ways of starting it: the
launch files in launch/ (ROS 2 installs) and the package's own launcher (`coverage-fleet
launch`). Pure Python: no launch or rclpy import, so it is testable anywhere.

A NodeSpec names the console script (`ros2 run coverage_fleet <executable>`), the module
that script runs (the launcher starts `python -m <module>` so that it works without an
install), the node's name, namespace, parameter files and parameters.

Namespaces: with a fleet namespace (`fleet_a`) the base station and the simulator run in
`/fleet_a` and each controller in `/fleet_a/<robot>`; every topic name is relative
(ros/topics.py), so two fleets share a domain without hearing each other. Without one, the
names are as before (`/coverage/...`, `/<robot>/...`).
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import TYPE_CHECKING, Literal

from coverage_fleet.errors import ConfigError

if TYPE_CHECKING:
    from coverage_fleet.fleet.mission import Mission

SimulationMode = Literal["lockstep", "realtime"]
SIMULATION_MODES = ("lockstep", "realtime")

ParameterValue = bool | int | float | str


@dataclass(frozen=True)
class NodeSpec:
    """One process of the graph."""

    role: str
    executable: str
    module: str
    #: Node name; None for processes that host several nodes (the base station).
    name: str | None
    namespace: str = ""
    parameters: dict[str, ParameterValue] = field(default_factory=dict)
    #: ROS 2 parameter files given before `parameters` (which win over them).
    parameter_files: tuple[str, ...] = ()
    #: The robot a controller serves ("" for other processes).
    robot: str = ""
    #: The run is over when this process ends (the simulator): the launch shuts down the rest.
    ends_run: bool = False
    #: Stopped after every other process (the recorder: it records their last messages).
    stops_last: bool = False

    @property
    def label(self) -> str:
        if self.robot:
            return f"{self.namespace.strip('/')}/{self.name}"
        return self.role


#: console script name -> module with main(); setup.py CONSOLE_SCRIPTS lists the same.
EXECUTABLES = {
    "coverage_fleet_simulator": "coverage_fleet.ros.simulator_node",
    "coverage_fleet_controller": "coverage_fleet.ros.controller_node",
    "coverage_fleet_partition": "coverage_fleet.ros.partition_node",
    "coverage_fleet_gate": "coverage_fleet.ros.gate_node",
    "coverage_fleet_base_station": "coverage_fleet.ros.base_station",
    "coverage_fleet_recorder": "coverage_fleet.ros.recorder_node",
}


def _spec(role: str, executable: str, name: str | None, namespace: str = "", **params) -> NodeSpec:
    return NodeSpec(role, executable, EXECUTABLES[executable], name, namespace, dict(params))


def fleet_namespace(name: str) -> str:
    """"" or "fleet_a" -> "" or "/fleet_a" (checked with the robot-name rule: one ROS name
    segment)."""
    from coverage_fleet.inputs.names import robot_name_problem

    if not name:
        return ""
    problem = robot_name_problem(name)
    if problem:
        raise ConfigError.single("fleet namespace", name, problem)
    return f"/{name}"


def _tuned(spec: NodeSpec, tuning_file: str | Path | None) -> NodeSpec:
    if not tuning_file:
        return spec
    return replace(spec, parameter_files=(str(Path(tuning_file).resolve()),))


def base_station_nodes(
    mission_file: str | Path, use_sim_time: bool = False, density_updates: bool = False,
    fleet: str = "", tuning_file: str | Path | None = None,
    vehicle_overrides: dict[str, str | Path] | None = None, lockstep: bool = False,
) -> list[NodeSpec]:
    """The base-station part: partition node and reference gate in one process
    (`density_updates`: the partition node takes densities from coverage/density; in the
    fleet namespace; tuning_file: a node-tuning parameter file such as
    config/node_tuning.yaml; vehicle_overrides: the controllers' other vehicle files, whose
    footprints and speeds the keep-apart snapshots and settle cells must use; `lockstep`: the
    partition follows a lockstep simulator's steps, see fleet/lockstep.py)."""
    mission_file = str(Path(mission_file).resolve())
    spec = _spec(
        "base_station", "coverage_fleet_base_station", None, fleet_namespace(fleet),
        mission_file=mission_file, use_sim_time=use_sim_time,
        density_updates=density_updates,
        vehicle_overrides=overrides_parameter(vehicle_overrides), lockstep=lockstep,
    )
    return [_tuned(spec, tuning_file)]


def overrides_parameter(vehicle_overrides: dict[str, str | Path] | None) -> str:
    """The `vehicle_overrides` parameter (ros/mission_parameters.py): JSON robot -> absolute
    vehicle file, "" without overrides."""
    import json

    if not vehicle_overrides:
        return ""
    return json.dumps(
        {robot: str(Path(path).resolve()) for robot, path in vehicle_overrides.items()}
    )


def controller_node_spec(
    mission_file: str | Path,
    robot: str,
    vehicle_file: str | Path | None = None,
    use_sim_time: bool = False,
    fleet: str = "",
) -> NodeSpec:
    """One robot's controller in the robot's namespace (under the fleet namespace, if any;
    vehicle file: the roster's unless given)."""
    spec = _spec(
        f"controller {robot}", "coverage_fleet_controller", "controller",
        f"{fleet_namespace(fleet)}/{robot}",
        mission_file=str(Path(mission_file).resolve()),
        vehicle_file=str(Path(vehicle_file).resolve()) if vehicle_file else "",
        robot_name=robot,
        use_sim_time=use_sim_time,
    )
    return replace(spec, robot=robot)


def odom_readers(recorded: bool) -> int:
    """Subscribers of each simulated robot's odom in a whole graph: its controller, the
    base station's partition node and gate (each reads every robot's state), and the
    recorder when the run is recorded. Counted low (the gate was once left out), the
    lockstep simulator could take its first steps before the recorder listened, and the
    recording would miss the first states."""
    return 3 + int(recorded)


def simulator_node_spec(
    mission_file: str | Path, mode: SimulationMode, stop_when_settled: bool = True,
    duration: float = 0.0, recorded: bool = False, fleet: str = "",
    tuning_file: str | Path | None = None,
) -> NodeSpec:
    """The headless simulator (the clock source: it never uses sim time itself). In
    lockstep it starts once each robot's odom has its controller, the partition node and
    the gate (and the recorder, when `recorded`) as subscribers, so nobody misses the first
    steps (`odom_readers`)."""
    spec = _spec(
        "simulator", "coverage_fleet_simulator", "coverage_simulator", fleet_namespace(fleet),
        mission_file=str(Path(mission_file).resolve()),
        mode=mode,
        stop_when_settled=stop_when_settled,
        duration=float(duration),
        odom_subscribers=odom_readers(recorded),
        use_sim_time=False,
    )
    return replace(_tuned(spec, tuning_file), ends_run=True)


def recorder_node_spec(
    mission_file: str | Path,
    output: str | Path,
    vehicle_overrides: dict[str, str | Path] | None = None,
    duration: float = 0.0,
    simulation: SimulationMode | None = None,
    command_line: str = "",
    fleet: str = "",
) -> NodeSpec:
    """The recorder (coverage_fleet.ros.recorder_node): every topic into an MCAP file, in a
    process of its own, stopped after the others (in the fleet namespace, which it records
    with the run)."""

    spec = _spec(
        "recorder", "coverage_fleet_recorder", "recorder", fleet_namespace(fleet),
        mission_file=str(Path(mission_file).resolve()),
        vehicle_overrides=overrides_parameter(vehicle_overrides),
        output=str(Path(output).resolve()),
        duration=float(duration),
        simulation=simulation or "",
        command_line=command_line,
        use_sim_time=False,
    )
    return replace(spec, stops_last=True)


def fleet_nodes(
    mission_file: str | Path,
    simulation: SimulationMode | None = "lockstep",
    vehicle_overrides: dict[str, str | Path] | None = None,
    duration: float = 0.0,
    stop_when_settled: bool = True,
    recorded: bool = False,
    density_updates: bool = False,
    fleet: str = "",
    tuning_file: str | Path | None = None,
) -> list[NodeSpec]:
    """The whole graph of a mission: base station, one controller per roster robot, and
    (when `simulation` is given) the headless simulator for the simulated robots.

    Lockstep needs every robot simulated (a real robot cannot wait for the simulator); with
    real robots in the roster the clock is the wall clock, so nodes do not use sim time.
    """
    from coverage_fleet.fleet.mission import load_mission

    mission = load_mission(mission_file)
    check_simulation(mission, simulation)
    overrides = vehicle_overrides or {}
    unknown = sorted(set(overrides) - set(mission.robot_names))
    if unknown:
        raise ConfigError.single(
            str(mission.source), "roster",
            f"--vehicle names robots not in the roster: {', '.join(unknown)}",
        )
    any_real = any(not e.simulated for e in mission.roster)
    use_sim_time = simulation is not None and not any_real
    nodes = base_station_nodes(
        mission.source, use_sim_time, density_updates, fleet, tuning_file, overrides,
        lockstep=simulation == "lockstep",
    )
    for entry in mission.roster:
        nodes.append(
            controller_node_spec(
                mission.source, entry.name, overrides.get(entry.name), use_sim_time, fleet
            )
        )
    if simulation is not None and any(e.simulated for e in mission.roster):
        nodes.append(
            simulator_node_spec(
                mission.source, simulation, stop_when_settled, duration, recorded, fleet,
                tuning_file,
            )
        )
    return nodes


def select_nodes(nodes: list[NodeSpec], parts: list[str], source: str) -> list[NodeSpec]:
    """The nodes of a deployment's part: "base_station", "simulator", or a robot's name (its
    controller). An empty list keeps every node."""
    if not parts:
        return nodes
    names = {"base_station": "base_station", "simulator": "simulator"}
    names.update({n.robot: n.role for n in nodes if n.robot})
    unknown = [p for p in parts if p not in names]
    if unknown:
        robots = sorted(set(names) - {"base_station", "simulator"})
        raise ConfigError.single(
            source, "--only",
            f"unknown part(s) {', '.join(unknown)}; expected base_station, simulator or a "
            f"robot of the roster ({', '.join(robots)})",
        )
    wanted = {names[p] for p in parts}
    return [n for n in nodes if n.role in wanted]


def check_simulation(mission: Mission, simulation: SimulationMode | None) -> None:
    if simulation is not None and simulation not in SIMULATION_MODES:
        raise ConfigError.single(
            str(mission.source), "simulation",
            f"mode must be one of {', '.join(SIMULATION_MODES)}, got {simulation!r}",
        )
    real = [e.name for e in mission.roster if not e.simulated]
    if simulation == "lockstep" and real:
        raise ConfigError.single(
            str(mission.source), "roster",
            f"lockstep simulation cannot wait for real robots ({', '.join(real)}); use "
            "realtime mode or mark them simulated",
        )


def _ros_value(value: ParameterValue) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        return repr(value)
    if isinstance(value, str):
        # Quoted so that ROS's YAML parsing keeps the value a string ("" stays empty).
        return "'" + value.replace("'", "''") + "'"
    return str(value)


def ros_arguments(spec: NodeSpec) -> list[str]:
    """The --ros-args part of a command line for spec (names, namespace, parameters)."""
    args = ["--ros-args"]
    for path in spec.parameter_files:
        args += ["--params-file", path]
    if spec.name:
        args += ["-r", f"__node:={spec.name}"]
    if spec.namespace:
        args += ["-r", f"__ns:={spec.namespace}"]
    for key, value in spec.parameters.items():
        args += ["-p", f"{key}:={_ros_value(value)}"]
    return args


def launch_actions(specs: list[NodeSpec]) -> list:
    """launch_ros Node actions for specs (for the launch files; imports launch and
    launch_ros, which only ROS 2 installs have, when called). A process that ends the run
    (the simulator) shuts the launch down when it exits, as the package's launcher does."""
    from launch.actions import EmitEvent, RegisterEventHandler
    from launch.event_handlers import OnProcessExit
    from launch.events import Shutdown
    from launch_ros.actions import Node

    actions: list = []
    for spec in specs:
        node = Node(
            package="coverage_fleet",
            executable=spec.executable,
            name=spec.name,
            namespace=spec.namespace or None,
            parameters=[*spec.parameter_files, spec.parameters],
            output="screen",
            emulate_tty=True,
        )
        actions.append(node)
        if spec.ends_run:
            actions.append(
                RegisterEventHandler(
                    OnProcessExit(
                        target_action=node,
                        on_exit=[EmitEvent(event=Shutdown(reason=f"{spec.role} finished"))],
                    )
                )
            )
    return actions
