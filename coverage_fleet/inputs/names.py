"""Names that end up in ROS graphs and on disk: robot names and mission names.

Robot name: the robot's node name suffix and namespace, so it must be a valid ROS name
segment and every topic under it a valid topic name (rclpy's validate_node_name,
validate_namespace and validate_full_topic_name; test_inputs_names checks against them).
The rule here is the strict side of ROS's: letters, digits and underscores, starting with a
letter -- ROS also allows a leading underscore, but ROS tools hide such names (the "hidden"
topic and node convention, common practice) -- and at most ROBOT_NAME_MAX characters,
which keeps the longest robot topic far inside ROS's topic length limit (247 characters).

Mission name: names the trial folder and files, so it must be a safe file name on every
common file system: letters, digits, '.', '_' and '-', starting with a letter or digit
(no '/', no '..', no hidden file), at most MISSION_NAME_MAX characters.
"""

from __future__ import annotations

import re
from typing import Any

from coverage_fleet.inputs.fields import type_message

ROBOT_NAME_MAX = 64
MISSION_NAME_MAX = 100

_ROBOT_NAME = re.compile(r"^[A-Za-z][A-Za-z0-9_]*$")
_SAFE_FILE_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]*$")


def robot_name_problem(name: Any) -> str | None:
    """Why `name` cannot be a robot name, or None when it can."""
    if not isinstance(name, str):
        return type_message("a string", name)
    reason = None
    if not name:
        reason = "is empty"
    elif len(name) > ROBOT_NAME_MAX:
        reason = f"is longer than {ROBOT_NAME_MAX} characters"
    elif name[0].isdigit():
        reason = "starts with a digit"
    elif name[0] == "_":
        reason = "starts with an underscore (ROS tools hide such names)"
    elif not _ROBOT_NAME.match(name):
        reason = "may hold only letters, digits and underscores"
    return f"{name!r} is not a valid ROS name: it {reason}" if reason else None


def is_valid_robot_name(name: Any) -> bool:
    return robot_name_problem(name) is None


def file_name_problem(name: Any) -> str | None:
    """Why `name` cannot name a file or folder (a mission name), or None when it can."""
    if not isinstance(name, str):
        return type_message("a string", name)
    reason = None
    if not name:
        reason = "is empty"
    elif len(name) > MISSION_NAME_MAX:
        reason = f"is longer than {MISSION_NAME_MAX} characters"
    elif not _SAFE_FILE_NAME.match(name):
        reason = ("may hold only letters, digits, '.', '_' and '-', and must start with a "
                  "letter or digit")
    return f"{name!r} is not a safe file name: it {reason}" if reason else None
