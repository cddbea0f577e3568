"""ROS 2 message definitions as a recording stores them, and message classes by type name.

A recording keeps each topic's messages as raw CDR bytes next to the message definition
that decodes them, so that any reader (the `mcap` tools, the ROS 2 bag tools, this
package's `report`) can decode them without the message packages installed. The
definition is the `.msg` text of the type followed by the text of every type it uses,
each once, depth first, each after a line of 80 `=` and a line `MSG: pkg/Type`: the layout
ROS 2 bags use for the `ros2msg` schema encoding (common practice of the rosbag2 MCAP
storage plugin; the `mcap-ros2-support` decoder reads exactly this).

The `.msg` files come from the interface packages' share folders
(`share/<package>/msg/<Type>.msg`), which both ROS 2 installs and the ROS 2 wheels ship.
"""

from __future__ import annotations

import importlib
import re
import sys
from functools import cache
from pathlib import Path

from ament_index_python.packages import get_package_share_directory

SEPARATOR = "=" * 80

#: Built-in field types of the ROS 2 interface definition language (no .msg file).
PRIMITIVE_TYPES = frozenset(
    {
        "bool", "byte", "char", "float32", "float64", "int8", "uint8", "int16", "uint16",
        "int32", "uint32", "int64", "uint64", "string", "wstring",
    }
)

_FIELD = re.compile(r"^\s*([A-Za-z_][\w/]*)(?:<=\d+)?(?:\[[^\]]*\])?\s+[A-Za-z_]\w*(?:\s|$)")


def split_type_name(type_name: str) -> tuple[str, str]:
    """("nav_msgs", "Odometry") from "nav_msgs/msg/Odometry" or "nav_msgs/Odometry"."""
    parts = type_name.split("/")
    if len(parts) == 3 and parts[1] == "msg":
        return parts[0], parts[2]
    if len(parts) == 2:
        return parts[0], parts[1]
    raise ValueError(f"not a ROS 2 message type name: {type_name!r}")


def full_type_name(type_name: str) -> str:
    """"pkg/msg/Type" (the name the graph and the recording's schemas use)."""
    package, name = split_type_name(type_name)
    return f"{package}/msg/{name}"


def msg_file(type_name: str) -> Path:
    """The type's .msg file: in the package's share folder of a ROS 2 install (found through
    the ament index), else in the Python environment's share folder (the wheels put it
    there and set no ament index)."""
    package, name = split_type_name(type_name)
    try:
        share = Path(get_package_share_directory(package))
    except (OSError, LookupError):
        share = Path(sys.prefix) / "share" / package
    path = share / "msg" / f"{name}.msg"
    if not path.is_file():
        raise FileNotFoundError(f"no message definition for {package}/{name} ({path})")
    return path


def _dependencies(text: str, package: str) -> list[str]:
    """The "pkg/Type" names of the message types used by the fields of a .msg text, in
    order (constants and primitive fields skipped)."""
    found = []
    for line in text.splitlines():
        code = line.split("#", 1)[0]
        match = _FIELD.match(code)
        if not match:
            continue
        field_type = match.group(1)
        if field_type in PRIMITIVE_TYPES:
            continue  # constants ("int32 ARROW=0") are always of primitive types too
        if "/" not in field_type:
            field_type = f"{package}/{field_type}"
        found.append("/".join(split_type_name(field_type)))
    return found


@cache
def message_definition(type_name: str) -> str:
    """The type's definition in the ROS 2 bag layout (see the module docstring)."""
    package, name = split_type_name(type_name)
    root_text = msg_file(type_name).read_text()
    parts = [root_text.rstrip("\n")]
    seen = {f"{package}/{name}"}
    pending = _dependencies(root_text, package)
    while pending:
        dependency = pending.pop(0)
        if dependency in seen:
            continue
        seen.add(dependency)
        text = msg_file(dependency).read_text()
        parts += [SEPARATOR, f"MSG: {dependency}", text.rstrip("\n")]
        # Depth first: this type's own dependencies come right after it.
        pending[:0] = _dependencies(text, dependency.split("/")[0])
    return "\n".join(parts) + "\n"


def message_class(type_name: str) -> type:
    """The Python class of a message type, e.g. nav_msgs.msg.Odometry."""
    package, name = split_type_name(type_name)
    return getattr(importlib.import_module(f"{package}.msg"), name)
