"""Frame names as node parameters (REP 105): the shared `map` frame every position is in,
and each robot's base frame (the frame of its odometry twist and of its commands).

A state whose pose is not in the map frame (a driver's odometry in its own `odom` frame, say)
is not comparable with the other robots' states or the region: taking it as map coordinates
would steer the robot and apply the region constraint in the wrong place. Nodes refuse it
rather than guess a transform: the message checks (fleet/message_checks.py, ros/inbox.py)
take the `map_frame` parameter as their expected frame, drop and count the state
(`<robot>.dropped.wrong_frame` on /diagnostics); the controller also refuses a twist that is
not in the robot's `base_frame`.
"""

from __future__ import annotations

from dataclasses import dataclass

from rclpy.node import Node

from .parameters import declare
from .topics import MAP_FRAME


@dataclass(frozen=True)
class Frames:
    """The frames a node expects; `base` is empty where no robot's body frame applies."""

    map: str = MAP_FRAME
    base: str = ""


def default_base_frame(robot: str) -> str:
    """A robot's base frame unless its controller is told otherwise: `<robot>/base_link`
    (REP 105's base_link, prefixed so that the frames of a fleet are distinct; what the
    headless simulator publishes)."""
    return f"{robot}/base_link"


def declare_map_frame(node: Node) -> str:
    return declare(
        node, "map_frame", MAP_FRAME,
        "The shared map frame (REP 105): odometry and poses must be in it (others are "
        "refused and counted on /diagnostics); targets, plans and markers are published in it.",
    )


def declare_frames(node: Node, robot: str) -> Frames:
    """map_frame and base_frame of one robot's node."""
    map_frame = declare_map_frame(node)
    base = declare(
        node, "base_frame", "",
        "The robot's base frame (REP 105 base_link): its odometry's child_frame_id must be "
        "this, and stamped commands carry it; empty = <robot>/base_link.",
    )
    return Frames(map_frame, base or default_base_frame(robot))
