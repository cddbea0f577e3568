"""Reference gate node (one, on the base station; may share a process with the partition).

Holds the generations of committed targets (coverage_fleet.control.gate.ReferenceGate). Each
`coverage/candidates` message is offered to the gate; when the monotone-progress condition
holds it commits them and publishes every robot's `<robot>/coverage/target` (reliable,
transient-local; the header stamp identifies the generation), `coverage/generation`,
`coverage/openings` and `coverage/settling`.

Progress reports name their generation by the stamp of the target they refer to. A robot
counts for the current generation only once its newest report names it: a report with an
older stamp (or one from before the robot had a target) is ignored and never opens the gate.
The rule itself (every robot no farther than at the commit, one strictly closer) is then
evaluated on the positions in the candidates message, the very positions whose partition
would be committed, as in the offline simulation, so that the cost at successive openings
falls even though reports and partitions arrive at different moments. (The distance in a
report is the controller's own view, for monitoring.)

The robots in a candidates message are the gate's roster: robots the partition left out
leave the gate, and the next offer is committed for the remaining ones. A robot farther
from its target than at the commit for `stall_timeout` (pushed away, outside the geofence)
would keep the gate shut for everyone: it leaves the roster (logged with the reason) and
rejoins once it is back within its distance at the commit. These rules live in
the core (fleet/coordination.py, GateKeeper); this node converts messages and calls it.

After every candidates message (offered, or skipped while the fleet is stopped) the gate
publishes `coverage/station_answer` stamped with the candidates' state time, after any
targets it committed: the lockstep simulator waits for it before leaving that state
(fleet/lockstep.py), so the base station acts on every step as offline. A table identical
to the one offered last (the partition re-sends it while the lockstep simulator waits) is
answered again but not offered twice: one offer per state, as offline.

After every offer the settle monitor (coverage_fleet.fleet.settling, the object the offline
simulation uses) judges the fleet from the candidates message (positions and the centroids
of the current cells, at the partition's time) and each robot's latest `odom` twist (its
planar speed, as the robot's localisation reports it: no differencing of noisy positions).
Its status, "moving", "settled" or "stuck", goes out on `coverage/settling` (latched)
whenever it changes.

The gate's health goes out on /diagnostics (`coverage_fleet/reference_gate`) every
`diagnostics_period` and at every opening: the generation as a plain number (the stamps
that name generations on the wire are not meant for people), when and why it was
committed, the cost then, the robots, the settle status and the reports ignored.

Every message is checked first (ros/inbox.py): a candidates table without the documented
layout, with values that are not finite or with robot indices outside the roster, a progress
report with a time that is not finite, and odometry that fails the state checks are dropped
(throttled warning, counted) and never reach the gate; the counts (per robot and for the
candidates) and the robots not in the gate's roster join its /diagnostics.

The gate also serves the fleet-wide software stop (fleet_stop.py): while stopped it offers
nothing to the gate (no generation is committed) and the settle monitor does not run (a
stopped fleet is neither settled nor stuck); on release the monitor starts afresh.
"""

from __future__ import annotations

import numpy as np
from diagnostic_msgs.msg import DiagnosticArray, DiagnosticStatus
from geometry_msgs.msg import PointStamped, Vector3Stamped
from nav_msgs.msg import Odometry
from rclpy.node import Node
from std_msgs.msg import Float64MultiArray, Header, String, UInt32

from coverage_fleet.control.gate import GateSettings
from coverage_fleet.errors import ConfigError, Problem
from coverage_fleet.fleet.coordination import Candidates, GateKeeper
from coverage_fleet.fleet.message_checks import check_finite
from coverage_fleet.fleet.mission import mission_settle_problems
from coverage_fleet.fleet.settling import SettleMonitor, SettleSettings

from . import qos, topics
from .conversions import (
    OpeningValues,
    candidates_from_msg,
    diagnostic_status,
    nanoseconds_to_stamp,
    opening_to_msg,
    progress_from_msg,
    seconds_to_stamp,
    target_to_msg,
)
from .fleet_stop import FleetStopService, listen_to_fleet_stop
from .frames import declare_map_frame
from .inbox import Inbox, declare_state_checks
from .mission_parameters import declare_mission
from .parameters import declare
from .runtime import main_for


class GateNode(Node):
    def __init__(self) -> None:
        super().__init__("reference_gate")
        mission = declare_mission(
            self, "Mission file (YAML): roster and gate tolerances.", "reference_gate parameters"
        )
        state_timeout = declare(
            self, "state_timeout", 2.0,
            "Seconds after which an odometry message is too old to give a robot's speed.",
            (0.01, 600.0),
        )
        self.map_frame = declare_map_frame(self)
        self.state_checks = declare_state_checks(
            self, mission.region, state_timeout, self.map_frame
        )
        self.inbox = Inbox(self)
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
        )
        settle_defaults = mission.settle
        settle = SettleSettings(
            distance=declare(
                self, "settle_distance", float(settle_defaults.distance),
                "Metres from the centroid of its current cell within which a robot counts "
                "as settled (default: the mission's settle.distance).", (1e-6, 100.0),
            ),
            speed=declare(
                self, "settle_speed", float(settle_defaults.speed),
                "Planar speed (m/s, from odom) below which a robot counts as still "
                "(default: the mission's settle.speed).", (1e-6, 100.0),
            ),
            dwell=declare(
                self, "settle_dwell", float(settle_defaults.dwell),
                "Seconds the settled condition must hold (default: the mission's "
                "settle.dwell).", (0.0, 3600.0),
            ),
            stuck_timeout=declare(
                self, "stuck_timeout", float(settle_defaults.stuck_timeout),
                "Seconds of a shut gate and a still fleet, not settled, before it is "
                "reported stuck (default: the mission's settle.stuck_timeout).",
                (1e-6, 3600.0),
            ),
            # Keep-apart: "near" measured from the point of the buffered cell nearest the
            # centroid, as offline (fleet/settling.py; built by the mission loader).
            cells=settle_defaults.cells,
        )
        problems = mission_settle_problems(mission.roster, settings, settle, mission.simulation)
        if problems:
            names = {
                "distance": "settle_distance", "speed": "settle_speed",
                "stuck_timeout": "stuck_timeout",
            }
            raise ConfigError([
                Problem("reference_gate parameters", names[key], message)
                for key, message in problems
            ])
        stall_timeout = declare(
            self, "stall_timeout", 5.0,
            "Seconds (ROS clock) a robot may be farther from its target than at the commit "
            "(it blocks the gate for everyone) before it leaves the gate's roster; it rejoins "
            "when it is back within that distance.", (0.01, 3600.0),
        )
        self.keeper = GateKeeper(settings, stall_timeout)
        self.gate = self.keeper.gate
        self.monitor = SettleMonitor(settle)
        #: robot -> planar speed from its latest odometry (m/s)
        self.speeds: dict[str, float] = {}
        self.names = list(mission.robot_names)
        self.generation_of_stamp: dict[int, int] = {}
        self.last_stamp_ns = 0
        self.ignored_reports = 0
        self.settling = "moving"
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
                Odometry, topics.robot_topic(name, topics.ODOM),
                lambda msg, n=name: self._on_odom(n, msg), qos.STATE_IN,
            )
            # A robot whose controller forms its state from a localization pose publishes
            # that state here (controller_node.py, state_from_pose).
            self.create_subscription(
                Odometry, topics.robot_topic(name, topics.STATE),
                lambda msg, n=name: self._on_odom(n, msg), qos.STATE_IN,
            )
        self.create_subscription(
            Float64MultiArray, topics.CANDIDATES, self._on_candidates, qos.REPORTS
        )
        self.generation_pub = self.create_publisher(UInt32, topics.GENERATION, qos.LATCHED)
        self.openings_pub = self.create_publisher(
            Float64MultiArray, topics.OPENINGS, qos.OPENINGS
        )
        self.settling_pub = self.create_publisher(String, topics.SETTLING, qos.LATCHED)
        # Latched: a simulator that matched late still gets the newest answer.
        self.answer_pub = self.create_publisher(Header, topics.STATION_ANSWER, qos.LATCHED)
        self.settling_pub.publish(String(data=self.settling))
        self.last_opening = None
        #: The data of the candidates table offered last (a repeated table is not offered).
        self.last_offered: list[float] | None = None
        self.diag_pub = self.create_publisher(DiagnosticArray, topics.DIAGNOSTICS, qos.DISPLAY)
        diagnostics_period = declare(
            self, "diagnostics_period", 1.0, "Seconds between /diagnostics messages.",
            (0.05, 600.0),
        )
        self.create_timer(diagnostics_period, self._publish_diagnostics)
        self.settle_settings = settle
        self.fleet_stopped = False
        # The service sets the state before it answers; the topic also carries stops that
        # other tools publish.
        self.fleet_stop = FleetStopService(self, self._on_fleet_stop)
        listen_to_fleet_stop(self, self._on_fleet_stop)

    def _on_fleet_stop(self, stopped: bool) -> None:
        if self.fleet_stopped and not stopped:
            # Time spent stopped must not count towards settling or being stuck.
            self.monitor = SettleMonitor(self.settle_settings)
        self.fleet_stopped = stopped

    def _on_odom(self, name: str, msg: Odometry) -> None:
        good = self.inbox.odometry(name, msg, self.state_checks)
        if good is not None:
            odom, _ = good
            self.speeds[name] = float(np.hypot(odom.body_vx, odom.body_vy))

    def _on_progress(self, name: str, msg: Vector3Stamped) -> None:
        def convert():
            report = progress_from_msg(msg)
            check_finite({"state_time": report.state_time})
            return report

        report = self.inbox.accept(name, "progress report", convert)
        if report is None:
            return
        generation = self.generation_of_stamp.get(report.generation_stamp_ns)
        if generation != self.gate.generation:
            self.ignored_reports += 1
        self.keeper.acknowledge(name, generation)

    def _on_candidates(self, msg: Float64MultiArray) -> None:
        values = self.inbox.accept(
            "candidates", "candidates table", lambda: candidates_from_msg(msg, len(self.names))
        )
        if values is None:
            return
        repeated = self.last_offered is not None and list(msg.data) == self.last_offered
        if not self.fleet_stopped and not repeated:
            self.last_offered = list(msg.data)
            self._offer(values)
        # Last: the targets of a commit go out before the answer that lets time move on.
        self.answer_pub.publish(
            Header(stamp=seconds_to_stamp(values.time), frame_id=self.map_frame)
        )

    def _offer(self, values) -> None:
        names = {i: self.names[i] for i in values.positions}
        candidates = Candidates(
            time=values.time,
            cost=values.cost,
            positions={names[i]: p for i, p in values.positions.items()},
            centroids={names[i]: c for i, c in values.centroids.items()},
            masses={names[i]: m for i, m in values.masses.items()},
            density_version=values.density_version,
        )
        decision = self.keeper.offer(candidates)
        for name in decision.left:
            self.get_logger().warning(f"{name} leaves the gate (left out by the partition)")
        for name, reason in decision.stalled:
            self.get_logger().warning(f"{name} leaves the gate: {reason}; the others go on")
        for name in decision.rejoined:
            self.get_logger().info(f"{name} rejoins the gate (back within its distance)")
        if decision.opening is not None:
            self._publish_opening(decision.opening, {n: i for i, n in names.items()})
        self._update_settling(candidates, gate_shut=decision.opening is None)

    def _publish_opening(self, opening, by_name: dict[str, int]) -> None:
        # The commit stamp names the generation: unique, increasing and never zero (zero
        # means "no target yet" in a progress report).
        stamp_ns = max(round(opening.time * 1e9), self.last_stamp_ns + 1, 1)
        self.last_stamp_ns = stamp_ns
        self.generation_of_stamp[stamp_ns] = opening.generation
        stamp = nanoseconds_to_stamp(stamp_ns)
        for name, target in opening.targets.items():
            self.target_pubs[name].publish(target_to_msg(target, stamp, self.map_frame))
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
        self.last_opening = opening
        self._publish_diagnostics()
        self.get_logger().info(
            f"generation {opening.generation} committed ({opening.reason}) at "
            f"t = {opening.time:.2f} s, cost {opening.cost:.4g}"
        )

    def _publish_diagnostics(self) -> None:
        opening = self.last_opening
        if opening is None:
            level, message = DiagnosticStatus.OK, "waiting for the first candidates"
        else:
            stuck = self.settling == "stuck"
            level = DiagnosticStatus.WARN if stuck else DiagnosticStatus.OK
            message = f"generation {opening.generation}: {self.settling}"
        if self.fleet_stopped:
            level, message = DiagnosticStatus.WARN, "fleet stop: committing nothing"
        new_drops = self.inbox.new_drops()
        missing = [n for n in self.names if n not in self.gate.robots] if opening else []
        if level == DiagnosticStatus.OK and (new_drops or missing):
            level = DiagnosticStatus.WARN
            message += (f"; not in the gate: {', '.join(missing)}" if missing else "") + (
                f"; {new_drops} messages dropped" if new_drops else ""
            )
        values = {
            "generation": opening.generation if opening else 0,
            "committed_at": f"{opening.time:.3f}" if opening else "",
            "reason": opening.reason if opening else "",
            "cost_at_commit": f"{opening.cost:.6g}" if opening else "",
            "robots": ",".join(sorted(opening.targets)) if opening else "",
            "settling": self.settling,
            "ignored_reports": self.ignored_reports,
            "fleet_stopped": int(self.fleet_stopped),
            # The tolerances of the progress rule, so that a viewer judges flags alike.
            "noise_tolerance": repr(self.gate.settings.noise_tolerance),
            "progress_tolerance": repr(self.gate.settings.progress_tolerance),
            "roster": ",".join(self.gate.robots),
            "not_in_gate": ",".join(missing),
            "benched": ",".join(self.keeper.benched),
            **self.inbox.diagnostic_values(["candidates", *self.names]),
        }
        array = DiagnosticArray()
        array.header.stamp = self.get_clock().now().to_msg()
        array.status = [
            diagnostic_status(
                "coverage_fleet/reference_gate", "base_station", level, message, values
            )
        ]
        self.diag_pub.publish(array)

    def _update_settling(self, candidates: Candidates, gate_shut: bool) -> None:
        status = self.monitor.update(
            candidates.time,
            candidates.positions,
            # A robot whose odometry the gate has not heard yet counts as moving.
            {n: self.speeds.get(n, np.inf) for n in candidates.positions},
            candidates.centroids,
            gate_shut,
            # A robot the partition left out keeps the fleet from "settled": the run must
            # not end as if the whole fleet had reached its configuration.
            absent=[n for n in self.names if n not in candidates.positions],
        )
        if status != self.settling:
            self.settling = status
            self.settling_pub.publish(String(data=status))
            if status == "settled":
                self.get_logger().info(
                    f"fleet settled within tolerance in generation {self.gate.generation}"
                )
            elif status == "stuck" and len(candidates.positions) < len(self.names):
                missing = [n for n in self.names if n not in candidates.positions]
                self.get_logger().warning(
                    f"fleet stuck in generation {self.gate.generation}: the others are still "
                    f"but {', '.join(missing)} not taking part (left out by the partition)"
                )
            elif status == "stuck":
                self.get_logger().warning(
                    f"fleet stuck in generation {self.gate.generation}: gate shut, every "
                    "robot still, not all within the settle distance of their centroids "
                    f"(largest {self.monitor.largest_distance:.3g} m)"
                )


def main() -> None:
    main_for(GateNode, program="coverage_fleet_gate")


if __name__ == "__main__":
    main()
