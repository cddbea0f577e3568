"""The mission a base-station node or the recorder runs: its `mission_file` parameter and
the launcher's `--vehicle` overrides (`vehicle_overrides`, a JSON object robot -> vehicle
file), applied as the launcher applies them (fleet/mission.with_vehicle_overrides). The
controllers load their own vehicle (ros/vehicle_parameters.py); the base station needs the
same vehicles, because the keep-apart snapshots carry every robot's footprint radius and
largest speed and the settle monitor builds the same cells: with the roster's files
instead, a larger vessel swapped in would be kept apart as the smaller one."""

from __future__ import annotations

import json

from rclpy.node import Node

from coverage_fleet.errors import ConfigError
from coverage_fleet.fleet.mission import Mission, load_mission, with_vehicle_overrides
from coverage_fleet.inputs.fields import Collector

from .parameters import declare


def parse_overrides(text: str, source: str) -> dict[str, str]:
    """The `vehicle_overrides` parameter: a JSON object robot -> vehicle file ("" = none);
    `source` names the node's parameters in a fault."""
    if not text:
        return {}
    try:
        value = json.loads(text)
    except json.JSONDecodeError as error:
        raise ConfigError.single(
            source, "vehicle_overrides", f"must be a JSON object: {error}"
        ) from None
    if not isinstance(value, dict) or not all(
        isinstance(k, str) and isinstance(v, str) for k, v in value.items()
    ):
        raise ConfigError.single(
            source, "vehicle_overrides",
            "must be a JSON object of robot names to vehicle file paths",
        )
    return value


def declare_mission(node: Node, description: str, source: str) -> Mission:
    """Declare `mission_file` (described by `description`) and `vehicle_overrides`, and
    return the mission with the overrides applied (ConfigError with every problem)."""
    mission_file = declare(node, "mission_file", "", description)
    overrides = declare(
        node, "vehicle_overrides", "",
        "JSON object robot -> vehicle file: the launcher's --vehicle overrides, so that "
        "this node knows the vehicles the controllers run (empty: the roster's files).",
    )
    return with_vehicle_overrides(
        load_mission(mission_file), parse_overrides(overrides, source), Collector(source)
    )
