"""Topic names of the graph (the README's topic table). Robot topics are relative names:
a controller resolves them in its own namespace; base-station nodes use robot_topic().
Robot names (the namespaces) follow the one rule in coverage_fleet.inputs.names, checked
when the mission is loaded."""

from __future__ import annotations

from coverage_fleet.fleet.message_checks import EXPECTED_FRAME

ODOM = "odom"
CMD_VEL = "cmd_vel"
TARGET = "coverage/target"
PROGRESS = "coverage/progress"
PLAN = "coverage/plan"
SOLVE = "coverage/solve"

CELLS = "/coverage/cells"
COST = "/coverage/cost"
CANDIDATES = "/coverage/candidates"
#: Density raster at run time (nav_msgs/OccupancyGrid, latched; the partition node reads it
#: when its `density_updates` parameter is true; rule in fleet/density_updates.py).
DENSITY = "/coverage/density"
GENERATION = "/coverage/generation"
OPENINGS = "/coverage/openings"
#: "moving", "settled" or "stuck" (fleet/settling.py), latched.
SETTLING = "/coverage/settling"
#: Fleet-wide software stop (std_msgs/Bool, latched; true = stopped) and the service that
#: sets it (std_srvs/SetBool, served by the reference gate): see fleet_stop.py.
FLEET_STOP = "/coverage/fleet_stop"
FLEET_STOP_SERVICE = "/coverage/set_fleet_stop"
DIAGNOSTICS = "/diagnostics"
CLOCK = "/clock"

#: The shared map frame (REP 105); the one definition lives with the message checks.
MAP_FRAME = EXPECTED_FRAME

def robot_topic(robot: str, topic: str) -> str:
    """Absolute name of a robot's topic, e.g. robot_topic("rover_a", ODOM) -> /rover_a/odom."""
    return f"/{robot}/{topic}"
