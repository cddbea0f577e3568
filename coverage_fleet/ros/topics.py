"""Topic names of the graph (the README's topic table).

Every name is relative, so a whole fleet can live under a namespace of its own (`/fleet_a`)
and two fleets share a domain without hearing each other: base-station nodes, simulator and
recorder run in the fleet namespace (`coverage/cells` -> `/fleet_a/coverage/cells`), a
controller in `<fleet namespace>/<robot>` (`odom` -> `/fleet_a/rover_a/odom`), and
base-station nodes reach robot topics with robot_topic(). Without a fleet namespace the
names are the familiar `/coverage/cells`, `/rover_a/odom`. `/clock` and `/diagnostics` stay
global (ROS convention: rclpy's time source and diagnostic aggregators listen there), so
two *simulated* fleets need separate ROS_DOMAIN_IDs (the simulator refuses a second /clock).
Robot names (the namespaces) follow the one rule in coverage_fleet.inputs.names, checked
when the mission is loaded.
"""

from __future__ import annotations

from coverage_fleet.fleet.message_checks import EXPECTED_FRAME

ODOM = "odom"
#: Optional pose from a localization system (geometry_msgs/PoseWithCovarianceStamped).
POSE = "pose"
#: The state a controller formed from its robot's localization pose (nav_msgs/Odometry, pose
#: in map, twist in the base frame), for the base station (controller_node.py).
STATE = "coverage/state"
TARGET = "coverage/target"
PROGRESS = "coverage/progress"
PLAN = "coverage/plan"
SOLVE = "coverage/solve"

CELLS = "coverage/cells"
COST = "coverage/cost"
CANDIDATES = "coverage/candidates"
#: Every known robot's stamped position, age, footprint and speed limit (std_msgs/
#: Float64MultiArray, layout in conversions.py), every keep-apart snapshot period: what the
#: controllers build their buffered cells from (partition_node.py says why this topic).
SNAPSHOT = "coverage/snapshot"
#: Density raster at run time (nav_msgs/OccupancyGrid, latched; the partition node reads it
#: when its `density_updates` parameter is true; rule in fleet/density_updates.py).
DENSITY = "coverage/density"
GENERATION = "coverage/generation"
OPENINGS = "coverage/openings"
#: "moving", "settled" or "stuck" (fleet/settling.py), latched.
SETTLING = "coverage/settling"
#: The base station's answer to a state (std_msgs/Header, stamp = the state time of the
#: candidates the gate has just offered, targets of any commit already published): what the
#: lockstep simulator waits for besides the controllers (fleet/lockstep.py).
STATION_ANSWER = "coverage/station_answer"
#: Fleet-wide software stop (std_msgs/Bool, latched; true = stopped) and the service that
#: sets it (std_srvs/SetBool, served by the reference gate): see fleet_stop.py. Relative
#: like the rest, so each fleet namespace has its own stop.
FLEET_STOP = "coverage/fleet_stop"
FLEET_STOP_SERVICE = "coverage/set_fleet_stop"
DIAGNOSTICS = "/diagnostics"
CLOCK = "/clock"

#: The shared map frame (REP 105); the one definition lives with the message checks.
MAP_FRAME = EXPECTED_FRAME

#: Command topic per command kind: `cmd_vel` is the convention for velocity commands
#: (geometry_msgs/Twist); acceleration and force commands get names of their own so that
#: no velocity driver ever subscribes to them by mistake.
COMMAND_TOPICS: dict[str, str] = {"twist": "cmd_vel", "accel": "cmd_accel", "wrench": "cmd_wrench"}
#: The velocity command topic (kept for the many readers that mean Twist).
CMD_VEL = COMMAND_TOPICS["twist"]


def command_topic(kind: str) -> str:
    """The robot's command topic for its command kind (cmd_vel, cmd_accel, cmd_wrench)."""
    return COMMAND_TOPICS[kind]


def robot_topic(robot: str, topic: str) -> str:
    """A robot's topic relative to the fleet namespace, e.g. robot_topic("rover_a", ODOM)
    -> rover_a/odom (/rover_a/odom without a fleet namespace)."""
    return f"{robot}/{topic}"


def fleet_namespace_of(robot_namespace: str) -> str:
    """The fleet namespace a controller's namespace sits in: /fleet_a/rover_a -> /fleet_a,
    /rover_a -> / ."""
    parent = robot_namespace.rstrip("/").rsplit("/", 1)[0]
    return parent or "/"


def in_namespace(namespace: str, topic: str) -> str:
    """Absolute name of a relative topic in a namespace (for a controller reaching the
    fleet's topics): in_namespace("/fleet_a", GENERATION) -> /fleet_a/coverage/generation."""
    return f"{namespace.rstrip('/')}/{topic}"
