"""Partition node (one, on the base station): the density-weighted bounded Voronoi
partition of the mission's region at the robots' current positions.

At `rate` Hz (ROS clock) it takes every robot that is live, meaning its odometry is at most
`state_timeout` old and its controller has sent a progress report within
`controller_timeout`, computes the cells, their centroids (the candidate targets) and the
coverage cost H, and publishes `coverage/candidates` (layout in conversions.py),
`coverage/cost` and `coverage/cells` (RViz markers: cells, centroids, committed targets).
A robot that falls silent is left out, so the live robots share its cell: a fault in one
robot never stalls the fleet.
"""

from __future__ import annotations

import numpy as np
from geometry_msgs.msg import PointStamped, Vector3Stamped
from nav_msgs.msg import Odometry
from rclpy.node import Node
from std_msgs.msg import Float64, Float64MultiArray
from visualization_msgs.msg import MarkerArray

from coverage_fleet.fleet.mission import load_mission
from coverage_fleet.geometry.partition import compute_partition

from . import qos, topics
from .conversions import (
    CandidateValues,
    candidates_to_msg,
    odometry_from_msg,
    partition_markers,
    seconds_to_stamp,
    stamp_to_seconds,
    target_from_msg,
)
from .parameters import declare
from .runtime import main_for


class PartitionNode(Node):
    def __init__(self) -> None:
        super().__init__("partition")
        mission_file = declare(
            self, "mission_file", "", "Mission file (YAML): region, density and roster."
        )
        rate = declare(
            self, "rate", 10.0, "Partitions per second (ROS clock).", (0.1, 100.0)
        )
        self.state_timeout = declare(
            self, "state_timeout", 2.0,
            "Seconds after which a robot's odometry is too old and the robot is left out.",
            (0.01, 600.0),
        )
        self.controller_timeout = declare(
            self, "controller_timeout", 2.0,
            "Seconds without a progress report after which a robot's controller counts as "
            "not live and the robot is left out.", (0.01, 600.0),
        )
        self.startup_grace = declare(
            self, "startup_grace", 5.0,
            "Seconds the first partition waits for every roster robot to be live; after "
            "that it starts with the live ones (the others join later).", (0.0, 600.0),
        )
        self.started = False
        self.first_tick: float | None = None
        self.mission = load_mission(mission_file)
        self.names = list(self.mission.robot_names)
        self.positions: dict[int, np.ndarray] = {}
        self.state_times: dict[int, float] = {}
        self.report_times: dict[int, float] = {}
        self.targets: dict[int, np.ndarray] = {}
        self.live: set[int] = set()
        for index, name in enumerate(self.names):
            self.create_subscription(
                Odometry, topics.robot_topic(name, topics.ODOM),
                lambda msg, i=index: self._on_odom(i, msg), qos.STATE,
            )
            self.create_subscription(
                Vector3Stamped, topics.robot_topic(name, topics.PROGRESS),
                lambda msg, i=index: self._on_progress(i), qos.REPORTS,
            )
            self.create_subscription(
                PointStamped, topics.robot_topic(name, topics.TARGET),
                lambda msg, i=index: self._on_target(i, msg), qos.LATCHED,
            )
        self.candidates_pub = self.create_publisher(
            Float64MultiArray, topics.CANDIDATES, qos.REPORTS
        )
        self.cost_pub = self.create_publisher(Float64, topics.COST, qos.DISPLAY)
        self.cells_pub = self.create_publisher(MarkerArray, topics.CELLS, qos.LATCHED)
        self.create_timer(1.0 / rate, self._on_timer)
        self.get_logger().info(
            f"partitioning {self.mission.name!r} for {len(self.names)} robots at {rate:g} Hz"
        )

    def _now(self) -> float:
        return self.get_clock().now().nanoseconds * 1e-9

    def _on_odom(self, index: int, msg: Odometry) -> None:
        odom = odometry_from_msg(msg)
        self.positions[index] = np.array([odom.x, odom.y])
        self.state_times[index] = stamp_to_seconds(msg.header.stamp)

    def _on_progress(self, index: int) -> None:
        self.report_times[index] = self._now()

    def _on_target(self, index: int, msg: PointStamped) -> None:
        self.targets[index] = target_from_msg(msg)[0]

    def _live_robots(self, now: float) -> list[int]:
        live = []
        for index in range(len(self.names)):
            fresh_state = now - self.state_times.get(index, -np.inf) <= self.state_timeout
            fresh_report = now - self.report_times.get(index, -np.inf) <= self.controller_timeout
            if fresh_state and fresh_report:
                live.append(index)
        changed = set(live) ^ self.live
        for index in sorted(changed):
            verb = "joins" if index in live else "left out (stale odometry or silent controller)"
            self.get_logger().info(f"{self.names[index]} {verb}")
        self.live = set(live)
        return live

    def _on_timer(self) -> None:
        now = self._now()
        live = self._live_robots(now)
        if not self.started:
            # The whole roster gets its first cells together, so that the first generation
            # is not followed at once by a roster change when a slower robot appears.
            self.first_tick = now if self.first_tick is None else self.first_tick
            waited = now - self.first_tick
            if len(live) < len(self.names) and waited < self.startup_grace:
                return
            self.started = True
            missing = sorted(set(self.names) - {self.names[i] for i in live})
            if missing:
                self.get_logger().warning(
                    f"starting without {', '.join(missing)} (not live after {waited:.1f} s)"
                )
        if not live:
            return
        stacked = np.array([self.positions[i] for i in live])
        partition = compute_partition(stacked, self.mission.region, self.mission.density)
        latest_state = max(self.state_times[i] for i in live)
        values = CandidateValues(
            time=latest_state,
            cost=float(partition.cost),
            positions={i: stacked[k] for k, i in enumerate(live)},
            centroids={i: np.asarray(partition.centroids[k]) for k, i in enumerate(live)},
            masses={i: float(partition.masses[k]) for k, i in enumerate(live)},
        )
        self.candidates_pub.publish(candidates_to_msg(values))
        self.cost_pub.publish(Float64(data=float(partition.cost)))
        self.cells_pub.publish(
            partition_markers(
                seconds_to_stamp(latest_state),
                {i: self.names[i] for i in live},
                {i: np.asarray(partition.cells[k]) for k, i in enumerate(live)},
                values.centroids,
                {i: t for i, t in self.targets.items() if i in live},
            )
        )


def main() -> None:
    main_for(PartitionNode, program="coverage_fleet_partition")


if __name__ == "__main__":
    main()
