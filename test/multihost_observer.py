"""Observer for the multi-host rehearsal (test_ros_multihost.py): runs inside the base
station's network namespace and prints one line per message it receives, so the test can
judge the run by message order:

    generation <n>           the gate committed generation n
    live <robot> <robot>...  the robots of a partition's candidates (the live robots)
    target <robot>           the gate sent a target to robot
    progress <robot>         robot's controller sent a progress report (it crossed the link)

Usage: python multihost_observer.py <mission file>
"""

from __future__ import annotations

import contextlib
import sys

import rclpy
from geometry_msgs.msg import PointStamped, Vector3Stamped
from rclpy.executors import ExternalShutdownException
from std_msgs.msg import Float64MultiArray, UInt32

from coverage_fleet.fleet.mission import load_mission
from coverage_fleet.ros import qos, topics
from coverage_fleet.ros.conversions import candidates_from_msg


def say(line: str) -> None:
    print(line, flush=True)


def on_candidates(names: list[str], msg: Float64MultiArray) -> None:
    values = candidates_from_msg(msg)
    say("live " + " ".join(names[i] for i in sorted(values.positions)))


def main() -> None:
    names = list(load_mission(sys.argv[1]).robot_names)
    rclpy.init()
    node = rclpy.create_node("multihost_observer")
    node.create_subscription(
        UInt32, topics.GENERATION, lambda msg: say(f"generation {msg.data}"), qos.LATCHED
    )
    node.create_subscription(
        Float64MultiArray, topics.CANDIDATES, lambda msg: on_candidates(names, msg),
        qos.REPORTS,
    )
    for robot in names:
        node.create_subscription(
            PointStamped, topics.robot_topic(robot, topics.TARGET),
            lambda msg, r=robot: say(f"target {r}"), qos.LATCHED,
        )
        node.create_subscription(
            Vector3Stamped, topics.robot_topic(robot, topics.PROGRESS),
            lambda msg, r=robot: say(f"progress {r}"), qos.REPORTS,
        )
    say("observer ready")
    with contextlib.suppress(KeyboardInterrupt, ExternalShutdownException):
        rclpy.spin(node)


if __name__ == "__main__":
    main()
