"""Keep-apart snapshots for tests that run a controller alone and play the rest of the graph:
with the mission's keep_apart on (the default) a controller brakes until it has a snapshot
of the fleet (control/keep_apart.py), which the partition node broadcasts in a whole graph."""

from __future__ import annotations

from pathlib import Path

import numpy as np
from std_msgs.msg import Float64MultiArray

from coverage_fleet.fleet.mission import load_mission
from coverage_fleet.geometry.buffered_cells import FleetSnapshot
from coverage_fleet.ros import qos, topics
from coverage_fleet.ros.conversions import snapshot_to_msg


class SnapshotSender:
    """Publishes on the fleet's `coverage/snapshot` a snapshot holding only `robot` (no
    neighbour, so no cell rows), as a partition node that hears one robot would."""

    def __init__(self, node, mission: Path, robot: str) -> None:
        loaded = load_mission(mission)
        entry = next(e for e in loaded.roster if e.name == robot)
        self.roster = loaded.robot_names
        self.robot = robot
        self.radius = entry.vehicle.model.footprint_radius
        self.speed = entry.vehicle.model.max_planar_speed
        self.node = node
        self.publisher = node.create_publisher(
            Float64MultiArray, f"/{topics.SNAPSHOT}", qos.REPORTS
        )

    def send(self, xy=(0.0, 0.0)) -> None:
        now = self.node.get_clock().now().nanoseconds * 1e-9
        snapshot = FleetSnapshot(
            time=now, names=(self.robot,), positions=np.array([xy], float),
            ages=np.zeros(1), radii=np.array([self.radius]), speed_limits=np.array([self.speed]),
        )
        self.publisher.publish(snapshot_to_msg(snapshot, self.roster))
