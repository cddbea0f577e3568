"""Vehicle and MPC settings as parameters of the controller node.

A vehicle file is a ROS 2 parameter file, so `--params-file config/vehicles/car_like.yaml`
hands its values to the controller as parameter overrides (`vehicle.max_speed`,
`mpc.horizon`, ...). The controller takes its vehicle from, in this order:

1. parameter overrides named `vehicle.*` or `mpc.*` (a parameter file or `-p`), checked by
   the vehicle loader exactly as a vehicle file is; a problem names the parameter file that
   holds the `vehicle` section (found in the process arguments) and the key, e.g.
   `car_like.yaml: vehicle.max_speed: must be greater than 0, got -1.0`;
2. the `vehicle_file` parameter;
3. the file the mission's roster names for the robot (what the launcher and launch files
   rely on: the mission stays the one place that names each robot's file).

Giving both 1 and 2 is refused. Whichever way, every setting in effect (defaults included)
is then declared read-only, with a description and, for numbers, the range the loader
checked it against, so `ros2 param get /rover_a/controller vehicle.max_speed` and the
parameter services show the limits the MPC runs with.
"""

from __future__ import annotations

import array
import json
import math
from collections.abc import Mapping, Sequence
from typing import Any

from rcl_interfaces.msg import FloatingPointRange, IntegerRange, ParameterDescriptor
from rclpy.node import Node

from coverage_fleet.errors import ConfigError
from coverage_fleet.inputs.fields import NumberRead, number_text
from coverage_fleet.inputs.reader import read_yaml_file
from coverage_fleet.vehicles.loader import VehicleSpec, load_vehicle_file, vehicle_from_document

SECTIONS = ("vehicle", "mpc", "command")

#: What the common settings mean (units SI, REP 103); other keys get a generic sentence.
MEANINGS = {
    "vehicle.model": "vehicle model: a built-in name or 'package.module:ClassName'",
    "vehicle.max_speed": "speed limit forward (m/s)",
    "vehicle.max_reverse_speed": "speed limit backward (m/s)",
    "vehicle.max_yaw_rate": "yaw rate limit (rad/s)",
    "vehicle.max_acceleration": "acceleration limit (m/s^2)",
    "vehicle.max_deceleration": "braking deceleration limit (m/s^2)",
    "vehicle.max_steering_angle": "front wheel steering angle limit (rad)",
    "vehicle.wheelbase": "rear axle to front axle (m)",
    "vehicle.footprint_radius": "radius of a disc holding the whole vehicle (m)",
    "mpc.horizon": "prediction horizon (samples)",
    "mpc.sample_time": "MPC sample time (s)",
    "mpc.substeps": "RK4 steps per sample in the prediction model",
    "mpc.terminal": "terminal ingredient: ellipsoid or equality",
    "mpc.state_weights": "stage-cost weight of each state (diagonal of Q)",
    "mpc.input_weights": "stage-cost weight of each input (diagonal of R)",
    "mpc.offset_weight": "weight of the offset cost (steady state to target)",
    "mpc.steady_state_margin": "fraction of the limits the steady state keeps clear",
    "mpc.terminal_shrink": "terminal level as a fraction of the largest verified one",
    "mpc.terminal_decrease_slack": "extra terminal weight for the nonlinearity",
    "command.stamped": "send TwistStamped/AccelStamped/WrenchStamped instead of the plain type",
}

_INT64 = 2**63 - 1


def params_files(argv: Sequence[str]) -> list[str]:
    """The `--params-file` paths among the ROS arguments of a command line, in order (later
    files override earlier ones, as in rcl)."""
    files: list[str] = []
    in_ros_args = False
    tokens = list(argv)
    for index, token in enumerate(tokens):
        if token == "--ros-args":
            in_ros_args = True
        elif token == "--":
            in_ros_args = False
        elif in_ros_args and token == "--params-file" and index + 1 < len(tokens):
            files.append(tokens[index + 1])
    return files


def _plain(value: Any) -> Any:
    """A parameter value as YAML would give it (rclpy hands arrays as array.array)."""
    if isinstance(value, array.array | tuple):
        return list(value)
    return value


def vehicle_overrides(node: Node) -> dict[str, Any]:
    """`vehicle.*` and `mpc.*` values given to the node (parameter files, `-p`), flat.

    rclpy offers no public listing of a node's overrides; `_parameter_overrides` is what
    its own `automatically_declare_parameters_from_overrides` reads. Declaring them that
    way instead would lose the descriptions and ranges."""
    overrides = getattr(node, "_parameter_overrides", {})
    return {
        name: _plain(parameter.value)
        for name, parameter in overrides.items()
        if name.split(".", 1)[0] in SECTIONS
    }


def nest(flat: Mapping[str, Any], source: str) -> dict[str, Any]:
    """{"vehicle.max_speed": 3.0} -> {"vehicle": {"max_speed": 3.0}} (a parameter file's
    own nesting, so that the loader reports the same keys)."""
    root: dict[str, Any] = {}
    for name in sorted(flat):
        *parents, leaf = name.split(".")
        level = root
        for part in parents:
            level = level.setdefault(part, {})
            if not isinstance(level, dict):
                raise ConfigError.single(source, name, "is given both as a value and as a section")
        level[leaf] = flat[name]
    return root


def flatten(nested: Mapping[str, Any], prefix: str = "") -> dict[str, Any]:
    flat: dict[str, Any] = {}
    for key, value in nested.items():
        name = f"{prefix}{key}"
        if isinstance(value, Mapping):
            flat.update(flatten(value, f"{name}."))
        else:
            flat[name] = value
    return flat


def _holds_vehicle(path: str) -> bool:
    document, _ = read_yaml_file(path)
    if not isinstance(document, dict):
        return False
    return any(
        isinstance(entry, dict)
        and isinstance(entry.get("ros__parameters"), dict)
        and any(section in entry["ros__parameters"] for section in SECTIONS)
        for entry in document.values()
    )


def vehicle_source(argv: Sequence[str], node_name: str) -> str:
    """What problems with `vehicle.*` overrides are reported against: the last parameter
    file with a `vehicle` or `mpc` section, else the node's parameters."""
    holding = [path for path in params_files(argv) if _holds_vehicle(path)]
    return holding[-1] if holding else f"{node_name} parameters"


def controller_vehicle(
    node: Node, roster_vehicle: VehicleSpec, vehicle_file: str, argv: Sequence[str]
) -> VehicleSpec:
    """The controller's vehicle (the order in the module docstring)."""
    flat = vehicle_overrides(node)
    if flat:
        source = vehicle_source(argv, node.get_name())
        if vehicle_file:
            raise ConfigError.single(
                source, "vehicle",
                f"vehicle settings are given as parameters and vehicle_file names "
                f"{vehicle_file}; give one of them",
            )
        document = {"/**": {"ros__parameters": nest(flat, source)}}
        data = json.dumps(flat, sort_keys=True, default=str).encode()
        return vehicle_from_document(document, data, source)
    if vehicle_file:
        return load_vehicle_file(vehicle_file)
    return roster_vehicle


def _describe(key: str, spec: VehicleSpec, read: NumberRead | None) -> str:
    if key.startswith("mpc.solver.options."):
        meaning = "solver option passed to casadi as given (casadi checks it)"
    else:
        meaning = MEANINGS.get(key, f"{key.split('.', 1)[1]} of the {spec.model.kind} model")
    text = f"{meaning}; from {spec.source}; read-only (the MPC is built from it at start-up)"
    if read is not None and (read.minimum is not None or read.maximum is not None):
        low = "-inf" if read.minimum is None else number_text(read.minimum)
        high = "inf" if read.maximum is None else number_text(read.maximum)
        opening = "(" if read.exclusive_minimum else "["
        closing = ")" if read.exclusive_maximum else "]"
        text += f"; range {opening}{low}, {high}{closing}"
    return text


def _descriptor(key: str, value: Any, spec: VehicleSpec, read: NumberRead | None
                ) -> ParameterDescriptor:
    descriptor = ParameterDescriptor(description=_describe(key, spec, read), read_only=True)
    if isinstance(value, bool) or not isinstance(value, int | float):
        return descriptor
    if read is None:
        # A number the loader passes on unread (a casadi option under mpc.solver.options):
        # casadi checks it; the declared range is every value.
        read = NumberRead(key, value)
    if isinstance(value, int):
        low = -_INT64 if read.minimum is None else math.ceil(read.minimum)
        high = _INT64 if read.maximum is None else math.floor(read.maximum)
        descriptor.integer_range = [IntegerRange(from_value=int(low), to_value=int(high))]
    else:
        # ROS ranges are closed: an open end is declared at its bound (the loader already
        # refused the bound itself; the description says which ends are open).
        low = -math.inf if read.minimum is None else float(read.minimum)
        high = math.inf if read.maximum is None else float(read.maximum)
        descriptor.floating_point_range = [FloatingPointRange(from_value=low, to_value=high)]
    return descriptor


def _declarable(value: Any) -> bool:
    if isinstance(value, bool | int | float | str):
        return True
    return isinstance(value, list) and bool(value) and all(
        isinstance(v, bool | int | float | str) for v in value
    ) and len({type(v) for v in value}) == 1


def declare_vehicle_parameters(node: Node, spec: VehicleSpec) -> list[str]:
    """Declare every setting in effect as a read-only parameter; returns the names. Values
    are the checked ones (the overrides were checked by the loader), so overrides are not
    applied a second time."""
    reads = {read.key: read for read in spec.number_reads}
    values = flatten({k: v for k, v in spec.parameters.items() if k in SECTIONS})
    values.update({key: read.value for key, read in reads.items()})
    values.setdefault("command.stamped", spec.command_stamped)
    declared = []
    for key in sorted(values):
        value = values[key]
        if not _declarable(value):
            node.get_logger().warning(f"{key}: not declared (no ROS parameter type for it)")
            continue
        node.declare_parameter(
            key, value, _descriptor(key, value, spec, reads.get(key)), ignore_override=True
        )
        declared.append(key)
    return declared
