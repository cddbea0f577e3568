"""Declaring node parameters with a description and, for numbers, a range, so that
`ros2 param describe` explains every one of them and out-of-range values are refused by
rclpy before the node sees them."""

from __future__ import annotations

from rcl_interfaces.msg import FloatingPointRange, IntegerRange, ParameterDescriptor
from rclpy.node import Node

ParameterValue = bool | int | float | str


def declare(
    node: Node,
    name: str,
    default: ParameterValue,
    description: str,
    value_range: tuple[float, float] | None = None,
    read_only: bool = True,
) -> ParameterValue:
    """Declare one parameter and return its value (the default, or what the launcher, a
    parameter file or `-p name:=value` gave). Parameters are read-only by default: nodes read
    them once at start-up, so a changed value would silently not apply."""
    descriptor = ParameterDescriptor(description=description, read_only=read_only)
    if value_range is not None:
        low, high = value_range
        if isinstance(default, bool):
            raise TypeError(f"parameter {name}: a bool has no range")
        if isinstance(default, int):
            descriptor.integer_range = [IntegerRange(from_value=int(low), to_value=int(high))]
        else:
            descriptor.floating_point_range = [
                FloatingPointRange(from_value=float(low), to_value=float(high))
            ]
    return node.declare_parameter(name, default, descriptor).value


def describe(node: Node) -> dict[str, str]:
    """name -> description of every parameter the node declared (for tests and docs)."""
    names = node.list_parameters([], 0).names
    return {d.name: d.description for d in node.describe_parameters(names)}
