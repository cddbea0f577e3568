"""Partition node (one, on the base station): the density-weighted bounded Voronoi
partition of the mission's region at the robots' current positions.

At `rate` Hz (ROS clock) it takes every robot that is live, meaning its odometry is at most
`state_timeout` old and its controller has sent a progress report within
`controller_timeout`, computes the cells, their centroids (the candidate targets) and the
coverage cost H, and publishes `coverage/candidates` (layout in conversions.py),
`coverage/cost` and `coverage/cells` (RViz markers: cells, centroids, committed targets).
A robot that falls silent is left out, so the live robots share its cell: a fault in one
robot never stalls the fleet.

Density updates (fleet/density_updates.py): the mission's scripted `density_updates` are
applied at their times (ROS clock, counted from the first partition); with the parameter
`density_updates` true the node also takes every nav_msgs/OccupancyGrid on
`coverage/density` (map frame, not rotated) as the new density, by the occupancy rule
(-1 unknown -> `unknown_density`, 0..100 -> 0..1). Each new density gets the next
version, carried in the candidates, and the gate commits a fresh generation for it
(reason "density"). A grid that breaks the rule is refused with a warning and the
density in force stays.

Keep-apart snapshots (mission `keep_apart`, control/keep_apart.py): every
`snapshot_period` (ROS clock; default the roster's longest sample time; in lockstep at the
first step of each period, with that step's positions, before its candidates, as the
offline step takes them) the node publishes
`coverage/snapshot` (layout in conversions.py): every robot it has heard from, with its
newest position, the age of that position (the snapshot's stamp minus the odometry stamp),
its footprint radius and its largest planar speed (from the roster's vehicle files, which
the mission names and this node loads). The controllers build their buffered cells from it.

Why this broadcast and not each controller listening to its neighbours' odometry: cells are
disjoint only when both robots of a pair build them from the *same* positions. With one
snapshot for everyone, each pair shares the snapshot's positions, and the window rule
(control/keep_apart.py: every robot honours every snapshot of the last W seconds) makes any
two robots honour at least one common snapshot at every moment. Odometry heard separately
by each controller arrives at different times with different losses, so two neighbours
would build their shared boundary from different positions and their cells could overlap.
It is also one subscription per controller instead of one per neighbour.

Robots left out are still there: a robot that the partition leaves out (stale odometry,
silent controller, stopped, outside the geofence) stays in every snapshot at its last known
position, its age growing, so that its allowance (age times its largest speed) grows and
the neighbours keep clear of everywhere it could have got to. A robot is gone only when it
is no longer in the roster (the mission relaunched without it): within a run the node never
forgets a robot it has heard from. A roster robot never heard from is in no snapshot (there
is no position to keep clear of); snapshots start with the first partition, which waits
`startup_grace` for the whole roster.

Lockstep (parameter `lockstep`, set by the launcher for a lockstep simulation): instead of
a timer, the node partitions once per simulated step, as soon as the state of that step has
arrived from every live robot (fleet/lockstep.complete_step), and judges liveness at that
step's time. A state of the step already partitioned that arrives again is the simulator
re-publishing while it waits: the node sends that step's candidates again (the first copy
may have been lost while the gate's subscription was still being matched); the gate answers
a repeated table without offering it twice. The simulator's clock does not move until the
gate has answered that step, so a timer of the simulated clock would never fire at a held
step; and this way each step's states are partitioned exactly once, as offline
(fleet/step.py).

The liveness rules and the partition are core objects (fleet/liveness.py,
fleet/coordination.py); this node converts messages and calls them.
"""

from __future__ import annotations

import numpy as np
from diagnostic_msgs.msg import DiagnosticArray, DiagnosticStatus
from geometry_msgs.msg import PointStamped, Vector3Stamped
from nav_msgs.msg import OccupancyGrid, Odometry
from rclpy.node import Node
from std_msgs.msg import Float64, Float64MultiArray
from visualization_msgs.msg import MarkerArray

from coverage_fleet.fleet.controllers import fleet_snapshot, mission_cell_layout
from coverage_fleet.fleet.coordination import candidates_at
from coverage_fleet.fleet.density_updates import UNKNOWN_DENSITY, DensitySource, occupancy_density
from coverage_fleet.fleet.liveness import FleetLiveness
from coverage_fleet.fleet.lockstep import complete_step
from coverage_fleet.fleet.message_checks import check_finite, check_frame
from coverage_fleet.fleet.mission import simulation_step

from . import qos, topics
from .conversions import (
    CandidateValues,
    candidates_to_msg,
    occupancy_from_msg,
    partition_markers,
    seconds_to_stamp,
    snapshot_to_msg,
    target_from_msg,
)
from .frames import declare_map_frame
from .inbox import Inbox, declare_state_checks
from .mission_parameters import declare_mission
from .parameters import declare
from .runtime import main_for


class PartitionNode(Node):
    def __init__(self) -> None:
        super().__init__("coverage_partition")
        mission = declare_mission(
            self, "Mission file (YAML): region, density and roster.", "partition parameters"
        )
        self.map_frame = declare_map_frame(self)
        rate = declare(
            self, "rate", 10.0, "Partitions per second (ROS clock).", (0.1, 100.0)
        )
        state_timeout = declare(
            self, "state_timeout", 2.0,
            "Seconds after which a robot's odometry is too old and the robot is left out.",
            (0.01, 600.0),
        )
        controller_timeout = declare(
            self, "controller_timeout", 2.0,
            "Seconds without a progress report after which a robot's controller counts as "
            "not live and the robot is left out.", (0.01, 600.0),
        )
        startup_grace = declare(
            self, "startup_grace", 5.0,
            "Seconds the first partition waits for every roster robot to be live; after "
            "that it starts with the live ones (the others join later).", (0.0, 600.0),
        )
        take_density = declare(
            self, "density_updates", False,
            "Take nav_msgs/OccupancyGrid messages on coverage/density as the density at run "
            "time (-1 unknown -> unknown_density, 0..100 -> 0..1).",
        )
        self.unknown_density = declare(
            self, "unknown_density", UNKNOWN_DENSITY,
            "Density of unknown (-1) occupancy cells and of the area outside the grid.",
            (0.0, 1.0),
        )
        self.lockstep = declare(
            self, "lockstep", False,
            "Partition once per simulated step, when every live robot's state of that step "
            "has arrived, instead of at `rate` (a lockstep simulation; the launcher sets it).",
        )
        self.mission = mission
        self.densities = DensitySource(self.mission.density, self.mission.density_updates)
        diagnostics_period = declare(
            self, "diagnostics_period", 1.0, "Seconds between /diagnostics messages.",
            (0.05, 600.0),
        )
        self.state_checks = declare_state_checks(
            self, self.mission.region, state_timeout, self.map_frame
        )
        self.inbox = Inbox(self)
        self.names = list(self.mission.robot_names)
        self.liveness = FleetLiveness(
            self.names, state_timeout, controller_timeout, startup_grace
        )
        self.run_start: float | None = None
        self._warm_up()
        self.positions: dict[str, np.ndarray] = {}
        #: Odometry stamp (s) of each robot's newest position (the snapshots' ages).
        self.position_stamps: dict[str, float] = {}
        #: robot -> stamp of its newest accepted state (lockstep: which step has arrived)
        self.state_times: dict[str, float] = {}
        self.last_step: float | None = None
        self.last_candidates: Float64MultiArray | None = None
        self.targets: dict[str, np.ndarray] = {}
        for name in self.names:
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
                Vector3Stamped, topics.robot_topic(name, topics.PROGRESS),
                lambda msg, n=name: self._on_progress(n), qos.REPORTS,
            )
            self.create_subscription(
                PointStamped, topics.robot_topic(name, topics.TARGET),
                lambda msg, n=name: self._on_target(n, msg), qos.LATCHED,
            )
        #: The resolved density topic (in the fleet namespace), for the log.
        self.density_topic = ""
        if take_density:
            subscription = self.create_subscription(
                OccupancyGrid, topics.DENSITY, self._on_density, qos.LATCHED
            )
            self.density_topic = subscription.topic_name
        self.candidates_pub = self.create_publisher(
            Float64MultiArray, topics.CANDIDATES, qos.REPORTS
        )
        self.cost_pub = self.create_publisher(Float64, topics.COST, qos.DISPLAY)
        self.cells_pub = self.create_publisher(MarkerArray, topics.CELLS, qos.LATCHED)
        self.diag_pub = self.create_publisher(DiagnosticArray, topics.DIAGNOSTICS, qos.DISPLAY)
        self.partitions = 0
        #: Other publishers of our candidates topic seen at the last diagnostics.
        self._other_stations = 0
        if not self.lockstep:
            self.create_timer(1.0 / rate, self._on_timer)
        self.snapshots = 0
        #: Lockstep snapshots taken so far, and half a simulation step (their timing rule).
        self._snapshots_taken = 0
        self._half_step = (
            0.5 * simulation_step(self.mission.roster, self.mission.simulation)
            if self.lockstep else 0.0
        )
        layout = mission_cell_layout(self.mission) if self.mission.roster else None
        if layout is not None:
            self.snapshot_period = layout.snapshot_period
            self.snapshot_pub = self.create_publisher(
                Float64MultiArray, topics.SNAPSHOT, qos.REPORTS
            )
            if not self.lockstep:
                self.create_timer(self.snapshot_period, self._publish_snapshot)
        else:
            self.snapshot_period = None
        self.create_timer(diagnostics_period, self._publish_diagnostics)
        self.get_logger().info(
            f"partitioning {self.mission.name!r} for {len(self.names)} robots at {rate:g} Hz"
            + (f"; densities from {self.density_topic}" if take_density else "")
            + ("; lockstep: once per simulated step" if self.lockstep else "")
            + (f"; keep-apart snapshots every {self.snapshot_period:g} s"
               if self.snapshot_period else "; keep-apart off")
        )

    def _warm_up(self) -> None:
        """One partition of two points before listening to odometry: the compiled loops
        (numba) take seconds to load the first time, and the lockstep simulator waits for
        the first partition (fleet/lockstep.py), so loading them before the robots' states
        arrive shortens the start (with keep-apart the robots brake until the first
        snapshot, which comes after it)."""
        centre = np.asarray(self.mission.region.centroid, float)
        corner = np.asarray(self.mission.region.vertices[0], float)
        candidates_at(
            {"a": centre, "b": (centre + corner) / 2.0}, 0.0, self.mission.region,
            self.densities.density,
        )

    def _now(self) -> float:
        return self.get_clock().now().nanoseconds * 1e-9

    def _on_odom(self, name: str, msg: Odometry) -> None:
        good = self.inbox.odometry(name, msg, self.state_checks)
        if good is None:
            return
        odom, stamp = good
        self.positions[name] = np.array([odom.x, odom.y])
        self.position_stamps[name] = stamp
        self.liveness.saw_state(name, stamp)
        repeated = self.state_times.get(name) == stamp
        self.state_times[name] = stamp
        if self.lockstep and repeated and self.last_candidates is not None \
                and self.last_step == stamp:
            self.candidates_pub.publish(self.last_candidates)
            return
        self._partition_if_step_complete()

    def _on_progress(self, name: str) -> None:
        # Only that the controller answers matters here (the gate reads the content).
        self.inbox.rates.saw(f"{name}.progress")
        self.liveness.saw_answer(name, self._now())
        self._partition_if_step_complete()

    def _partition_if_step_complete(self) -> None:
        """Lockstep: partition the newest step once every live robot's state of it is in
        (at start-up: once the whole roster is live, or the start-up grace has passed)."""
        if not self.lockstep:
            return
        newest = max(self.state_times.values(), default=None)
        if newest is None:
            return
        # Liveness at the step's own time: /clock may arrive after the step's states.
        self._update_liveness(newest)
        step = complete_step(self.state_times, self.liveness.live, self.last_step)
        if step is not None and self._partition(step):
            self.last_step = step

    def _on_density(self, msg: OccupancyGrid) -> None:
        try:
            grid = occupancy_from_msg(msg)
            if grid.frame_id != self.map_frame:
                raise ValueError(f"frame {grid.frame_id!r}, expected {self.map_frame!r}")
            if abs(grid.yaw) > 1e-9:
                raise ValueError(f"the grid is rotated (yaw {grid.yaw:.3g} rad); publish it "
                                 "aligned with the map axes")
            density = occupancy_density(grid.cells, grid.origin, grid.resolution,
                                        self.mission.region, self.unknown_density)
        except ValueError as exc:
            self.get_logger().warning(f"density update refused ({exc}); the density in "
                                      "force stays")
            return
        version = self.densities.replace(density)
        height, width = grid.cells.shape
        self.get_logger().info(
            f"density update {version} from {self.density_topic}: {width} x {height} cells of "
            f"{grid.resolution:g} m; the next candidates start a new generation"
        )

    def _on_target(self, name: str, msg: PointStamped) -> None:
        def convert():
            xy, _ = target_from_msg(msg)
            check_frame(msg.header.frame_id, self.state_checks.frame)
            check_finite({"x": xy[0], "y": xy[1]})
            return xy

        target = self.inbox.accept(name, "target", convert)
        if target is not None:
            self.targets[name] = target

    def _publish_diagnostics(self) -> None:
        live = self.liveness.live
        missing = [n for n in self.names if n not in live]
        new_drops = self.inbox.new_drops()
        # A second base station for the same fleet (same namespace, same domain): both
        # gates would send the robots targets and the candidates of both would mix. It is
        # not refused (a crashed station's publisher lingers in discovery for a lease
        # period, so a restart would be refused for that long), but said loudly.
        topic = self.candidates_pub.topic_name
        others = max(0, self.count_publishers(topic) - 1)
        if others != self._other_stations:
            self._other_stations = others
            if others:
                self.get_logger().error(self._second_station_message(topic, others))
        if others:
            level, message = DiagnosticStatus.ERROR, self._second_station_message(topic, others)
        elif not live:
            level, message = DiagnosticStatus.ERROR, "no live robot"
        elif missing or new_drops:
            level = DiagnosticStatus.WARN
            message = (f"left out: {', '.join(missing)}; " if missing else "") + (
                f"{new_drops} messages dropped" if new_drops else "all messages good"
            )
        else:
            level, message = DiagnosticStatus.OK, "partitioning"
        values = {
            "other_stations": others,
            "live_robots": ",".join(live),
            "live_count": len(live),
            "left_out": ",".join(missing),
            "partitions": self.partitions,
            "snapshots": self.snapshots,
            **self.inbox.diagnostic_values(self.names),
        }
        self.inbox.publish(
            self.diag_pub, "coverage_fleet/partition", level, message, values
        )

    @staticmethod
    def _second_station_message(topic: str, others: int) -> str:
        return (
            f"{others} other node(s) publish {topic}: a second base station for this "
            "fleet? Its targets and candidates mix with ours; give each fleet a namespace "
            "or a ROS_DOMAIN_ID of its own"
        )

    def _publish_snapshot(self) -> None:
        """Every robot heard from, left out or not (module docstring), once the first
        partition has started."""
        if not self.liveness.started or not self.positions:
            return
        # On simulated time odometry may be stamped ahead of this node's clock (it reads
        # /clock later): the snapshot is never older than its newest position.
        self._send_snapshot(max(self._now(), max(self.position_stamps.values())))

    def _snapshot_when_due(self, step: float) -> None:
        """Lockstep: a snapshot at the step's time when a period has come, as the offline
        step takes them (at k * period, counted so that float sums do not drift), published
        before the step's candidates and so before the gate's answer lets time move on: the
        controllers hold it before the next step's states."""
        period = self.snapshot_period
        if period is None or step < self._snapshots_taken * period - self._half_step:
            return
        self._send_snapshot(step)
        while self._snapshots_taken * period - self._half_step <= step:
            self._snapshots_taken += 1

    def _send_snapshot(self, time: float) -> None:
        ages = {name: time - stamp for name, stamp in self.position_stamps.items()}
        snapshot = fleet_snapshot(self.mission, time, self.positions, ages)
        self.snapshot_pub.publish(snapshot_to_msg(snapshot, self.names))
        self.snapshots += 1

    def _update_liveness(self, now: float) -> None:
        for change in self.liveness.update(now):
            verb = "joins" if change.live else "left out (stale odometry or silent controller)"
            self.get_logger().info(f"{change.robot} {verb}")

    def _on_timer(self) -> None:
        now = self._now()
        self._update_liveness(now)
        self._partition(now)

    def _partition(self, now: float) -> bool:
        """Partition the live robots' newest states at `now` (liveness updated); returns
        whether candidates went out."""
        if not self.liveness.started:
            # The whole roster gets its first cells together (see fleet/liveness.py).
            if not self.liveness.may_start(now):
                return False
            missing = self.liveness.missing()
            if missing:
                self.get_logger().warning(
                    f"starting without {', '.join(missing)} (not live after the start-up "
                    "grace)"
                )
        # Scripted density updates count from the first partition (time 0 of an offline run;
        # on wall time the clock's epoch would make every update due at once).
        if self.run_start is None:
            self.run_start = now
        if self.densities.apply_due(now - self.run_start):
            self.get_logger().info(
                f"density update {self.densities.version} (scripted in the mission)"
            )
        live = self.liveness.live
        if not live:
            return False
        latest_state = self.liveness.newest_state_time(live)
        candidates, partition = candidates_at(
            {n: self.positions[n] for n in live},
            latest_state,
            self.mission.region,
            self.densities.density,
            self.densities.version,
        )
        index = {n: self.names.index(n) for n in live}
        values = CandidateValues(
            time=latest_state,
            cost=candidates.cost,
            positions={index[n]: p for n, p in candidates.positions.items()},
            centroids={index[n]: c for n, c in candidates.centroids.items()},
            masses={index[n]: m for n, m in candidates.masses.items()},
            density_version=candidates.density_version,
        )
        if self.lockstep:
            self._snapshot_when_due(latest_state)
        self.last_candidates = candidates_to_msg(values)
        self.candidates_pub.publish(self.last_candidates)
        self.partitions += 1
        self.cost_pub.publish(Float64(data=candidates.cost))
        self.cells_pub.publish(
            partition_markers(
                seconds_to_stamp(latest_state),
                {index[n]: n for n in live},
                {index[n]: np.asarray(partition.cells[k]) for k, n in enumerate(live)},
                values.centroids,
                {index[n]: t for n, t in self.targets.items() if n in index},
                self.map_frame,
            )
        )
        return True


def main() -> None:
    main_for(PartitionNode, program="coverage_fleet_partition")


if __name__ == "__main__":
    main()
