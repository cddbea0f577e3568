"""Reference gate node (one, on the base station; may share a process with the partition).

Holds the generations of committed targets (coverage_fleet.control.gate.ReferenceGate). Each
`coverage/candidates` message is offered to the gate; when the monotone-progress condition
holds it commits them and publishes every robot's `<robot>/coverage/target` (reliable,
transient-local; the header stamp identifies the generation), `coverage/generation`,
`coverage/openings` and `coverage/converged`.

Progress reports name their generation by the stamp of the target they refer to. A robot
counts for the current generation only once its newest report names it: a report with an
older stamp (or one from before the robot had a target) is ignored and never opens the gate.
The rule itself (every robot no farther than at the commit, one strictly closer) is then
evaluated on the positions in the candidates message, the very positions whose partition
would be committed, as in the offline simulation, so that the cost at successive openings
falls even though reports and partitions arrive at different moments. (The distance in a
report is the controller's own view, for monitoring.)

The robots in a candidates message are the gate's roster: robots the partition left out
leave the gate, and the next offer is committed for the remaining ones.
"""

from __future__ import annotations

import numpy as np
from geometry_msgs.msg import PointStamped, Vector3Stamped
from rclpy.node import Node
from std_msgs.msg import Bool, Float64MultiArray, UInt32

from coverage_fleet.control.gate import GateSettings, ProgressReport, ReferenceGate
from coverage_fleet.fleet.mission import load_mission

from . import qos, topics
from .conversions import (
    OpeningValues,
    candidates_from_msg,
    nanoseconds_to_stamp,
    opening_to_msg,
    progress_from_msg,
    target_to_msg,
)
from .parameters import declare
from .runtime import main_for


class GateNode(Node):
    def __init__(self) -> None:
        super().__init__("reference_gate")
        mission_file = declare(
            self, "mission_file", "", "Mission file (YAML): roster and gate tolerances."
        )
        mission = load_mission(mission_file)
        defaults = mission.gate
        settings = GateSettings(
            noise_tolerance=declare(
                self, "noise_tolerance", float(defaults.noise_tolerance),
                "Metres a robot may be farther than at the commit and still count as no "
                "farther (default: the mission's gate.noise_tolerance).", (0.0, 100.0),
            ),
            progress_tolerance=declare(
                self, "progress_tolerance", float(defaults.progress_tolerance),
                "Metres closer than at the commit a robot must be to count as strictly "
                "closer (default: the mission's gate.progress_tolerance).", (1e-6, 100.0),
            ),
            settle_distance=declare(
                self, "settle_distance", float(defaults.settle_distance),
                "The fleet is at rest when every robot is this close to its target "
                "(default: the mission's gate.settle_distance).", (1e-6, 100.0),
            ),
        )
        self.gate = ReferenceGate(settings)
        self.names = list(mission.robot_names)
        self.generation_of_stamp: dict[int, int] = {}
        #: robot -> generation its newest progress report names
        self.acknowledged: dict[str, int] = {}
        self.last_stamp_ns = 0
        self.ignored_reports = 0
        self.converged = False
        self.target_pubs = {
            name: self.create_publisher(
                PointStamped, topics.robot_topic(name, topics.TARGET), qos.LATCHED
            )
            for name in self.names
        }
        for name in self.names:
            self.create_subscription(
                Vector3Stamped, topics.robot_topic(name, topics.PROGRESS),
                lambda msg, n=name: self._on_progress(n, msg), qos.REPORTS,
            )
        self.create_subscription(
            Float64MultiArray, topics.CANDIDATES, self._on_candidates, qos.REPORTS
        )
        self.generation_pub = self.create_publisher(UInt32, topics.GENERATION, qos.LATCHED)
        self.openings_pub = self.create_publisher(
            Float64MultiArray, topics.OPENINGS, qos.OPENINGS
        )
        self.converged_pub = self.create_publisher(Bool, topics.CONVERGED, qos.LATCHED)
        self.converged_pub.publish(Bool(data=False))

    def _on_progress(self, name: str, msg: Vector3Stamped) -> None:
        report = progress_from_msg(msg)
        generation = self.generation_of_stamp.get(report.generation_stamp_ns)
        if generation is None:
            self.ignored_reports += 1
            self.acknowledged.pop(name, None)
            return
        if generation != self.gate.generation:
            self.ignored_reports += 1
        self.acknowledged[name] = generation

    def _on_candidates(self, msg: Float64MultiArray) -> None:
        candidates = candidates_from_msg(msg)
        present = {self.names[i] for i in candidates.positions}
        for name in list(self.gate.robots):
            if name not in present:
                self.get_logger().warning(f"{name} leaves the gate (left out by the partition)")
                self.gate.remove_robot(name)
        for name in sorted(present - set(self.gate.robots)):
            self.gate.add_robot(name)
        by_name = {self.names[i]: i for i in candidates.positions}
        for name, index in by_name.items():
            target = self.gate.targets.get(name)
            if target is not None and self.acknowledged.get(name) == self.gate.generation:
                distance = float(np.linalg.norm(candidates.positions[index] - target))
                self.gate.report(ProgressReport(name, self.gate.generation, distance))
        opening = self.gate.offer(
            {n: candidates.centroids[i] for n, i in by_name.items()},
            {n: candidates.positions[i] for n, i in by_name.items()},
            candidates.cost,
            candidates.time,
        )
        if opening is not None:
            self._publish_opening(opening, by_name)
        self._update_converged()

    def _publish_opening(self, opening, by_name: dict[str, int]) -> None:
        # The commit stamp names the generation: unique, increasing and never zero (zero
        # means "no target yet" in a progress report).
        stamp_ns = max(round(opening.time * 1e9), self.last_stamp_ns + 1, 1)
        self.last_stamp_ns = stamp_ns
        self.generation_of_stamp[stamp_ns] = opening.generation
        stamp = nanoseconds_to_stamp(stamp_ns)
        for name, target in opening.targets.items():
            self.target_pubs[name].publish(target_to_msg(target, stamp))
        self.generation_pub.publish(UInt32(data=opening.generation))
        self.openings_pub.publish(
            opening_to_msg(
                OpeningValues(
                    generation=opening.generation,
                    time=opening.time,
                    cost=opening.cost,
                    reason=opening.reason,
                    positions={by_name[n]: p for n, p in opening.positions.items()},
                    targets={by_name[n]: t for n, t in opening.targets.items()},
                    distances={by_name[n]: d for n, d in opening.distances.items()},
                )
            )
        )
        self.get_logger().info(
            f"generation {opening.generation} committed ({opening.reason}) at "
            f"t = {opening.time:.2f} s, cost {opening.cost:.4g}"
        )

    def _update_converged(self) -> None:
        converged = bool(self.gate.converged)
        if converged != self.converged:
            self.converged = converged
            self.converged_pub.publish(Bool(data=converged))
            if converged:
                self.get_logger().info(
                    f"fleet at rest in generation {self.gate.generation} "
                    "(every robot within the settle distance)"
                )


def main() -> None:
    main_for(GateNode, "coverage_fleet_gate")


if __name__ == "__main__":
    main()
