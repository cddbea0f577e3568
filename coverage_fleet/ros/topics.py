"""Topic names of the graph (the README's topic table). Robot topics are relative names:
a controller resolves them in its own namespace; base-station nodes use robot_topic()."""

from __future__ import annotations

import re

ODOM = "odom"
CMD_VEL = "cmd_vel"
TARGET = "coverage/target"
PROGRESS = "coverage/progress"
PLAN = "coverage/plan"

CELLS = "/coverage/cells"
COST = "/coverage/cost"
CANDIDATES = "/coverage/candidates"
GENERATION = "/coverage/generation"
OPENINGS = "/coverage/openings"
#: "moving", "settled" or "stuck" (fleet/settling.py), latched.
SETTLING = "/coverage/settling"
DIAGNOSTICS = "/diagnostics"
CLOCK = "/clock"

MAP_FRAME = "map"

_ROBOT_NAME = re.compile(r"^[A-Za-z][A-Za-z0-9_]*$")


def is_valid_robot_name(name: str) -> bool:
    """A robot name doubles as its ROS namespace, so it must be a valid ROS name token
    (letters, digits, underscores; starts with a letter; ROS 2 name rules, design article
    "Topic and Service name mapping to DDS")."""
    return bool(_ROBOT_NAME.match(name))


def robot_topic(robot: str, topic: str) -> str:
    """Absolute name of a robot's topic, e.g. robot_topic("rover_a", ODOM) -> /rover_a/odom."""
    return f"/{robot}/{topic}"
