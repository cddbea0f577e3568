"""Controller node, one per robot in the robot's namespace: the tracking MPC as a ROS node.

Subscribes to its `odom` and its committed `coverage/target`; at every sample time it runs
RobotController.step on the newest state and target and publishes the first input as
`cmd_vel` (Twist, Accel or Wrench, as the vehicle file's command kind names), a progress
report (`coverage/progress`, layout in conversions.py), the predicted plan (`coverage/plan`),
the outcome of each solve (`coverage/solve`, so that a recording knows every solve) and its
health on /diagnostics.

Timing: the node answers every state it receives, at once (no timer phase adds latency):
it solves when a sample time (less `sample_tolerance`, for jitter in the state stamps) has
passed since the state of its last solve, and otherwise re-sends the held command (zero-order
hold). Each answer carries a progress report, which is also what the lockstep simulator
waits for. A watchdog timer (every sample time, ROS clock, so use_sim_time is honoured)
sends the braking input while the newest state is older than `state_timeout`, and the
node sends it once more as it stops (Ctrl-C, SIGTERM, a launcher). The solve
rule, the held input and the progress bookkeeping are the core's SampledController
(control/sampling.py), the same object the offline simulation runs.

Fleet stop (fleet_stop.py): when the stop arrives the node sends the braking input at once,
and while stopped every command it sends is the braking input (it still answers each state
with a progress report, so a lockstep simulator keeps its pace); on release it tracks again.

Arming: the node is a lifecycle node (ROS 2 managed nodes: unconfigured -> configure ->
inactive -> activate -> active). Start-up checks (mission, vehicle) run when the node is
built; the heavy set-up (terminal ingredients, the MPC) runs in on_configure, which the node
triggers itself at start. Motion only while active ("armed"): a robot the roster marks
simulated arms itself; a real robot's controller stays inactive, disarmed, publishing
nothing at all (no command, no progress report, so the partition leaves the robot out)
until an explicit `activate` (`coverage-fleet arm`, or any lifecycle client). `deactivate`
disarms: the braking input once, then silence.

Every message is checked first (ros/inbox.py, fleet/message_checks.py): odometry that is
not finite, not in the map frame, stamped more than `stamp_future_tolerance` ahead of the
node's clock or more than `state_timeout` behind it, or farther than `implausible_distance`
outside the region is dropped, and so is a target that is not finite or not in the map
frame (throttled warning, counted on /diagnostics). A dropped state is never solved on: the
newest good state ages, and the watchdog brakes once it is stale. States beyond
`max_state_rate` per second (a flood on the robot's odometry) are dropped and counted too,
so that a flood cannot make the controller flood the rest of the graph with answers.

State from a localization pose (`state_from_pose`): instead of `odom` the node takes
geometry_msgs/PoseWithCovarianceStamped on `pose` (map frame), checked like odometry plus a
covariance check (`max_position_std`, reason too_uncertain); the velocity parts of the state
are filtered finite differences of successive poses (fleet/pose_state.py, time constant
`pose_velocity_time_constant`). The state so formed goes out as nav_msgs/Odometry on
`coverage/state`, where the base station reads the robot's map-frame position and speed.

Keep-apart (the mission's `keep_apart`, control/keep_apart.py): when enabled, the MPC
carries the fleet's fixed number of buffered-cell rows and the node keeps a CellWindow of
the snapshots the partition node broadcasts on `coverage/snapshot` (in the fleet namespace;
why that broadcast in partition_node.py). Every snapshot is checked (the documented table,
roster indices, no negative age/radius/speed, stamped at most `stamp_future_tolerance`
ahead) and dropped and counted like any bad message otherwise; snapshots without this robot
are skipped (counted as `keep_apart_without_own`): the partition node has not heard from it
yet. At each solve the rows come from every snapshot of the window (window W = longest
sample time + snapshot period + the mission's keep_apart `latency`, the bound on how late a
snapshot may reach a controller); with no snapshot, or the newest older than `max_age`
(stamp of the state solved on minus the snapshot's), the robot brakes and its status says
why. The settings are the mission file's, like the gate tolerances: the window rule needs
the same period, window and row count in every robot, which one file guarantees.

Geofence (control/geofence.py): a robot more than `geofence_margin` outside the region gets
its braking input and an ERROR diagnostic; once slower than `geofence_rest_speed` a return
plan (the MPC on a problem shifted inside, position invariance) brings it back, then normal
tracking resumes. Progress reports go on throughout (distance to the committed target), so
the gate sees that the robot is farther than at the commit.
"""

from __future__ import annotations

import math
import sys
import time as wallclock

import numpy as np
from diagnostic_msgs.msg import DiagnosticArray, DiagnosticStatus
from geometry_msgs.msg import PointStamped, PoseWithCovarianceStamped, Vector3Stamped
from nav_msgs.msg import Odometry, Path
from rclpy.duration import Duration
from rclpy.lifecycle import LifecycleNode, LifecycleState, TransitionCallbackReturn
from std_msgs.msg import Float64MultiArray, UInt32

from coverage_fleet.control.controller import RobotController
from coverage_fleet.control.geofence import BRAKING, INSIDE, RETURNING, Geofence, GeofenceSettings
from coverage_fleet.control.keep_apart import (
    CellLayout,
    CellRows,
    CellWindow,
    horizon_reach,
    shifted_rows,
)
from coverage_fleet.control.sampling import SampledController
from coverage_fleet.control.solver_chain import describe_path
from coverage_fleet.control.terminal import terminal_for_vehicle
from coverage_fleet.errors import ConfigError
from coverage_fleet.fleet.controllers import mission_cell_layout
from coverage_fleet.fleet.liveness import fresh
from coverage_fleet.fleet.message_checks import (
    FLOOD,
    WRONG_FRAME,
    BadMessageError,
    RateLimit,
    StampLimits,
    check_finite,
    check_frame,
    check_odometry,
    check_stamp,
)
from coverage_fleet.fleet.mission import load_mission
from coverage_fleet.fleet.pose_state import PoseVelocity, check_position_covariance
from coverage_fleet.gc_freeze import freeze_after_setup

from . import qos, topics
from .conversions import (
    ProgressValues,
    SolveValues,
    command_message_type,
    command_to_msg,
    diagnostic_status,
    odometry_to_msg,
    plan_to_msg,
    pose_from_msg,
    progress_to_msg,
    snapshot_from_msg,
    solve_to_msg,
    stamp_to_seconds,
    target_from_msg,
)
from .fleet_stop import listen_to_fleet_stop
from .frames import declare_frames
from .inbox import Inbox, declare_state_checks
from .parameters import declare
from .runtime import main_for
from .topics import fleet_namespace_of
from .vehicle_parameters import controller_vehicle, declare_vehicle_parameters

#: Inbox source of the keep-apart snapshots (counts on /diagnostics as `snapshot.*`).
SNAPSHOT_SOURCE = "snapshot"
#: Seconds the stopping node waits for the braking input's acknowledgement: well inside a
#: launch service's grace period (5 s before it escalates), long enough for a loaded host.
STOP_ACK_TIMEOUT = 1.0

#: How RobotController's status starts when keep-apart makes it brake.
KEEP_APART_STATUS = "keep-apart:"


class ControllerNode(LifecycleNode):
    def __init__(self) -> None:
        super().__init__("controller")
        mission_file = declare(
            self, "mission_file", "", "Mission file (YAML): region (geofence) and roster."
        )
        vehicle_file = declare(
            self, "vehicle_file", "",
            "Vehicle parameter file; empty = vehicle.* / mpc.* parameters if given (e.g. "
            "--params-file with a vehicle file), else the file the mission's roster names for "
            "this robot.",
        )
        robot_name = declare(
            self, "robot_name", "", "Robot name in the roster; empty = the node's namespace."
        )
        sample_tolerance = declare(
            self, "sample_tolerance", 0.01,
            "Seconds: a new solve is due when the state is at least sample time minus this "
            "newer than the last solved one (absorbs jitter in odometry stamps).", (0.0, 1.0),
        )
        self.state_timeout = declare(
            self, "state_timeout", 1.0,
            "Seconds (ROS clock) after which the newest odometry is stale and the robot brakes.",
            (0.01, 600.0),
        )
        self.diagnostics_period = declare(
            self, "diagnostics_period", 1.0, "Seconds between /diagnostics messages.",
            (0.05, 600.0),
        )
        max_state_rate = declare(
            self, "max_state_rate", 200.0,
            "States answered per wall-clock second at most (bursts of a tenth of that); "
            "more (a flood on odom) are dropped and counted. Lockstep runs far below it.",
            (1.0, 1e5),
        )
        self.state_limit = RateLimit(max_state_rate, max(1.0, max_state_rate / 10.0))
        self.state_from_pose = declare(
            self, "state_from_pose", False,
            "Take the state from a localization pose (geometry_msgs/PoseWithCovarianceStamped "
            "on `pose`, map frame) instead of `odom`; velocities from filtered differences of "
            "successive poses; the state is republished on coverage/state for the base station.",
        )
        self.max_position_std = declare(
            self, "max_position_std", 0.5,
            "Metres: a pose whose covariance gives a larger position standard deviation (worst "
            "direction) is dropped as too_uncertain (state_from_pose only).", (1e-3, 1000.0),
        )
        self.pose_velocity = PoseVelocity(declare(
            self, "pose_velocity_time_constant", 0.2,
            "Seconds: time constant of the low-pass filter on pose differences that gives the "
            "velocity (state_from_pose only; 0 = raw differences).", (0.0, 10.0),
        ))
        geofence = GeofenceSettings(
            margin=declare(
                self, "geofence_margin", 0.5,
                "Metres outside the region beyond which the robot brakes and then returns.",
                (0.0, 1000.0),
            ),
            rest_speed=declare(
                self, "geofence_rest_speed", 0.05,
                "Planar speed (m/s, odom) below which a robot outside may start its return.",
                (1e-6, 100.0),
            ),
            inset=declare(
                self, "geofence_inset", 0.5,
                "Metres inside the boundary that the return plan aims for.", (0.0, 1000.0),
            ),
        )
        self.robot = robot_name or self.get_namespace().strip("/").split("/")[-1]
        self.frames = declare_frames(self, self.robot)
        mission = load_mission(mission_file)
        self.state_checks = declare_state_checks(
            self, mission.region, self.state_timeout, self.frames.map
        )
        self.geofence = Geofence(mission.region, geofence)
        self.speed = 0.0
        self.inbox = Inbox(self)
        entry = next((e for e in mission.roster if e.name == self.robot), None)
        if entry is None:
            raise ConfigError.single(
                str(mission.source), "roster",
                f"no robot named {self.robot!r} (the controller's robot_name or namespace); "
                f"the roster has {', '.join(mission.robot_names)}",
            )
        spec = controller_vehicle(self, entry.vehicle, vehicle_file, sys.argv)
        declare_vehicle_parameters(self, spec)
        self.spec = spec
        self.model = spec.model
        self.sample_time = float(spec.mpc.sample_time)
        self._mission = mission
        self._sample_tolerance = sample_tolerance
        self.simulated = entry.simulated
        #: The fleet's keep-apart layout (None: the mission turns keep-apart off).
        # The roster's layout, the same in every node of the graph (the window rule needs
        # that); a vehicle override on this robot does not change it.
        self.cell_layout: CellLayout | None = mission_cell_layout(mission)
        self.snapshots_without_own = 0
        #: Built in on_configure; motion commands only while armed (active).
        self.controller: SampledController | None = None
        self.armed = False
        self._configure_failure: Exception | None = None
        self._target: tuple[int, np.ndarray] | None = None
        self.state: np.ndarray | None = None
        self.state_time = -np.inf
        self.generation_stamp_ns = 0
        #: The fleet's generation as the gate announces it (for people reading diagnostics).
        self.fleet_generation: int | None = None

        self.cmd_pub = self.create_publisher(
            command_message_type(spec.command_kind, spec.command_stamped),
            topics.command_topic(spec.command_kind), qos.COMMAND,
        )
        self.progress_pub = self.create_publisher(
            Vector3Stamped, topics.PROGRESS, qos.ROBOT_REPORTS
        )
        self.plan_pub = self.create_publisher(Path, topics.PLAN, qos.DISPLAY)
        self.solve_pub = self.create_publisher(
            DiagnosticStatus, topics.SOLVE, qos.ROBOT_REPORTS
        )
        self.diag_pub = self.create_publisher(DiagnosticArray, topics.DIAGNOSTICS, qos.DISPLAY)
        # Fleet-wide topics are in the fleet's namespace, one level up (topics.py).
        fleet = fleet_namespace_of(self.get_namespace())
        # Before odom: when both are waiting, the executor takes the stop first.
        self.fleet_stopped = False
        listen_to_fleet_stop(self, self._on_fleet_stop, fleet)
        if self.state_from_pose:
            self.state_pub = self.create_publisher(Odometry, topics.STATE, qos.STATE)
            self.create_subscription(
                PoseWithCovarianceStamped, topics.POSE, self._on_pose, qos.STATE_IN
            )
        else:
            self.create_subscription(Odometry, topics.ODOM, self._on_odom, qos.STATE_IN)
        self.create_subscription(PointStamped, topics.TARGET, self._on_target, qos.LATCHED)
        self.create_subscription(
            UInt32, topics.in_namespace(fleet, topics.GENERATION),
            lambda msg: setattr(self, "fleet_generation", int(msg.data)), qos.LATCHED,
        )
        if self.cell_layout is not None:
            self.create_subscription(
                Float64MultiArray, topics.in_namespace(fleet, topics.SNAPSHOT),
                self._on_snapshot, qos.REPORTS,
            )
        self.create_timer(self.sample_time, self._watchdog)
        self.create_timer(self.diagnostics_period, self._publish_diagnostics)
        if self.trigger_configure() != TransitionCallbackReturn.SUCCESS:
            raise self._configure_failure or RuntimeError("configure failed")
        if self.simulated:
            self.trigger_activate()
        else:
            self.get_logger().warning(
                f"{self.robot}: real robot: DISARMED, no commands until armed "
                "(`coverage-fleet arm`, or the lifecycle transition `activate`)"
            )

    # --- lifecycle (arming) -------------------------------------------------------------

    def on_configure(self, state: LifecycleState) -> TransitionCallbackReturn:
        """The heavy set-up: terminal ingredients and the MPC (seconds for some models)."""
        started = wallclock.perf_counter()
        try:
            terminal, _ = terminal_for_vehicle(self.spec)
            layout = self.cell_layout
            self.controller = SampledController(
                RobotController(
                    self.model, self.spec.mpc, self._mission.region.halfspaces(), terminal,
                    cell_rows=0 if layout is None else layout.rows,
                ),
                self.sample_time,
                self._sample_tolerance,
                self._mission.gate.noise_tolerance,
                self._mission.gate.progress_tolerance,
            )
            if layout is not None:
                self.controller.cells = CellWindow(
                    self.robot, self._mission.keep_apart, layout.window, layout.rows,
                    horizon_reach(
                        self.model.max_planar_speed, self.sample_time, self.spec.mpc.horizon
                    ),
                )
        except Exception as error:  # kept for __init__ (rclpy would swallow it)
            self._configure_failure = error
            return TransitionCallbackReturn.FAILURE
        if self._target is not None:
            self.controller.set_target(*self._target)
        freeze_after_setup()  # the set-up's objects out of the collector's passes
        self.get_logger().info(
            f"{self.robot}: {self.model.kind} from {self.spec.source}, sample time "
            f"{self.sample_time:g} s, command {self.spec.command_kind}; MPC ready in "
            f"{wallclock.perf_counter() - started:.1f} s; {describe_path(self.spec.mpc)}"
            + (
                "; keep-apart off" if self.cell_layout is None else
                f"; keep-apart: {self.cell_layout.rows} cell rows, snapshots of the last "
                f"{self.cell_layout.window:g} s"
            )
        )
        return TransitionCallbackReturn.SUCCESS

    def on_activate(self, state: LifecycleState) -> TransitionCallbackReturn:
        self.armed = True
        self.get_logger().warning(f"{self.robot}: ARMED: commanding the robot")
        return super().on_activate(state)

    def on_deactivate(self, state: LifecycleState) -> TransitionCallbackReturn:
        self._brake()
        self.armed = False
        self.get_logger().warning(f"{self.robot}: disarmed: braking input sent, then silence")
        return super().on_deactivate(state)

    def on_cleanup(self, state: LifecycleState) -> TransitionCallbackReturn:
        self.controller = None
        return TransitionCallbackReturn.SUCCESS

    def on_shutdown(self, state: LifecycleState) -> TransitionCallbackReturn:
        self._brake()
        self.armed = False
        return TransitionCallbackReturn.SUCCESS

    # --- inputs -------------------------------------------------------------------------

    def _flooded(self, what: str) -> bool:
        if self.state_limit.allow(wallclock.monotonic()):
            return False
        self.inbox.rates.saw(self.robot)
        self.inbox.drop(self.robot, BadMessageError(FLOOD, "more states than max_state_rate"), what)
        return True

    def _on_pose(self, msg: PoseWithCovarianceStamped) -> None:
        if self._flooded("pose"):
            return

        def convert():
            pose, covariance = pose_from_msg(msg)
            stamp = stamp_to_seconds(msg.header.stamp)
            check_odometry(pose, msg.header.frame_id, stamp, self.inbox.now(), self.state_checks)
            check_position_covariance(covariance, self.max_position_std)
            return self.pose_velocity.update(pose.x, pose.y, pose.yaw, stamp), stamp

        good = self.inbox.accept(self.robot, "pose", convert)
        if good is None:
            return
        odom, stamp = good
        self.state_pub.publish(
            odometry_to_msg(odom, msg.header.stamp, self.frames.base, self.frames.map)
        )
        self._take_state(odom, stamp)

    def _on_odom(self, msg: Odometry) -> None:
        if self._flooded("odometry"):
            return
        if msg.child_frame_id != self.frames.base:
            # The twist is read in the robot's base frame (REP 105); another frame's twist
            # would be misread. Counted with the other drops (inbox.py).
            self.inbox.rates.saw(self.robot)
            self.inbox.drop(self.robot, BadMessageError(WRONG_FRAME, (
                f"twist in frame {msg.child_frame_id!r}, expected the base frame "
                f"{self.frames.base!r}")), "odometry")
            return
        good = self.inbox.odometry(self.robot, msg, self.state_checks)
        if good is None:
            return
        self._take_state(*good)

    def _take_state(self, odom, stamp: float) -> None:
        self.speed = float(np.hypot(odom.body_vx, odom.body_vy))
        self.state = np.asarray(self.model.state_from_odometry(odom), float)
        self.state_time = stamp
        if self.armed:
            self._control()

    def _on_target(self, msg: PointStamped) -> None:
        def convert():
            target, stamp_ns = target_from_msg(msg)
            check_frame(msg.header.frame_id, self.state_checks.frame)
            check_finite({"x": target[0], "y": target[1]})
            return target, stamp_ns

        good = self.inbox.accept(self.robot, "target", convert)
        if good is None:
            return
        target, stamp_ns = good
        self.generation_stamp_ns = stamp_ns
        self._target = (stamp_ns, target)
        if self.controller is not None:
            self.controller.set_target(stamp_ns, target)

    def _on_snapshot(self, msg: Float64MultiArray) -> None:
        future = self.state_checks.stamps.future if self.state_checks.stamps else math.inf

        def convert():
            snapshot = snapshot_from_msg(msg, self._mission.robot_names)
            check_stamp(snapshot.time, self.inbox.now(), StampLimits(future, math.inf))
            return snapshot

        snapshot = self.inbox.accept(SNAPSHOT_SOURCE, "keep-apart snapshot", convert)
        if snapshot is None or self.controller is None or self.controller.cells is None:
            return
        if self.robot not in snapshot.names:
            self.snapshots_without_own += 1
            return
        self.controller.cells.add(snapshot)

    def _on_fleet_stop(self, stopped: bool) -> None:
        if stopped == self.fleet_stopped:
            return
        self.fleet_stopped = stopped
        if stopped:
            self._brake()
            self.get_logger().warning(f"{self.robot}: fleet stop: braking until released")
        else:
            self.get_logger().info(f"{self.robot}: fleet stop released: tracking again")

    def _brake(self) -> None:
        """The braking input, when this node commands the robot at all (armed)."""
        if self.state is not None and self.armed and self.controller is not None:
            self._send(self.controller.brake(self.state), self.state)

    def _stale(self) -> bool:
        now = self.get_clock().now().nanoseconds * 1e-9
        return self.state is not None and not fresh(self.state_time, now, self.state_timeout)

    def _watchdog(self) -> None:
        """No fresh odometry, or the fleet stopped: brake at least once per sample time
        rather than drive on an old command."""
        if self._stale() or self.fleet_stopped:
            self._brake()

    def before_stop(self) -> None:
        """The node is stopping (Ctrl-C, SIGTERM, the launcher or the launch service): the
        robot's last command from here is its braking input, never the last motion command."""
        if self.state is None or not self.armed:
            return
        self._brake()
        # The process ends right after this: a reliable writer destroyed before its readers
        # acknowledged drops the sample, and a robot driver would keep the last motion
        # command (seen once in CI: the braking input lost, motion was the last word).
        if self.cmd_pub.wait_for_all_acked(Duration(seconds=STOP_ACK_TIMEOUT)):
            self.get_logger().info(f"{self.robot}: stopping; braking input sent and acknowledged")
        else:
            self.get_logger().warning(
                f"{self.robot}: stopping; braking input sent but not acknowledged by every "
                f"subscriber within {STOP_ACK_TIMEOUT} s"
            )

    # --- control ------------------------------------------------------------------------

    def _send(self, u: np.ndarray, x: np.ndarray) -> None:
        """One input on the command topic, plain or stamped as the vehicle file says
        (stamped: now on the node's clock, in the robot's base frame)."""
        stamp = self.get_clock().now().to_msg() if self.spec.command_stamped else None
        command = self.model.command_from_input(u, x)
        self.cmd_pub.publish(command_to_msg(command, stamp, self.frames.base))

    def _control(self) -> None:
        x = self.state
        before = self.geofence.mode
        mode = self.geofence.update(self.model.position(x), self.speed)
        if mode != before:
            self._log_geofence(mode)
        if mode == INSIDE:
            answer = self.controller.answer(x, self.state_time)
            u, step, shift = answer.input, answer.step, None
            progress = answer.progress
        else:
            u, step, shift = self._outside(x, mode)
            progress = self.controller.tracker.observe(self.model.position(x))
        if step is not None:
            self._publish_plan(step, shift)
            self.solve_pub.publish(
                solve_to_msg(
                    SolveValues(
                        self.robot, self.state_time, float(step.solve_time), str(step.status),
                        bool(step.success), step.fallback, int(step.iterations),
                    )
                )
            )
        u = self.controller.brake(x) if self.fleet_stopped else u
        self._send(u, x)
        if progress is None:
            report = ProgressValues(0, np.nan, np.nan, self.state_time)
        else:
            report = ProgressValues(
                self.generation_stamp_ns,
                progress.distance_at_commit,
                progress.distance_now,
                self.state_time,
            )
        self.progress_pub.publish(progress_to_msg(report, self.frames.map))

    def _outside(self, x: np.ndarray, mode: str):
        """(input, solve step or None, shift of the plan) outside the geofence."""
        if mode == BRAKING:
            return self.controller.brake(x), None, None
        position = self.model.position(x)
        problem = self.geofence.return_problem(position)
        shifted = x.copy()
        shifted[list(self.model.position_indices)] += problem.shift
        step = self.controller.controller.step(
            shifted, problem.target, self._shifted_cell(position, problem.shift)
        )
        self.controller.held_input = np.asarray(step.input, float)
        return self.controller.held_input.copy(), step, problem.shift

    def _shifted_cell(self, position: np.ndarray, shift: np.ndarray) -> CellRows | None:
        """The keep-apart rows for a return plan: taken at the robot's real position, then
        moved with the problem (keep_apart.shifted_rows)."""
        cells = self.controller.cells
        if cells is None:
            return None
        rows = cells.rows_at(self.state_time, position)
        self.controller.last_cells = rows
        return shifted_rows(rows, shift)

    def _log_geofence(self, mode: str) -> None:
        where = f"{self.geofence.outside:.2f} m outside the region"
        if mode == BRAKING:
            self.get_logger().error(f"{self.robot}: {where} (geofence): braking")
        elif mode == RETURNING:
            self.get_logger().warning(f"{self.robot}: {where}, at rest: returning inside")
        else:
            self.get_logger().info(f"{self.robot}: back inside the region: tracking")

    def _publish_plan(self, step, shift: np.ndarray | None = None) -> None:
        positions = np.asarray(step.plan_positions, float).reshape(-1, 2)
        if shift is not None:  # a return plan: back to where the robot really is
            positions = positions - shift
        # Poses face along the path (the plan carries positions only).
        heading = np.arctan2(*np.diff(positions, axis=0).T[::-1]) if len(positions) > 1 else []
        yaws = [*heading, heading[-1]] if len(heading) else [0.0] * len(positions)
        self.plan_pub.publish(
            plan_to_msg(positions, yaws, self.state_time, self.sample_time, self.frames.map)
        )

    def _keep_apart_values(self, now: float, step) -> dict[str, object]:
        """Keep-apart on /diagnostics: newest snapshot's age, the newest solve's cell
        violation (soft slack, m) and rows used / dropped for lack of room."""
        if self.cell_layout is None:
            return {"keep_apart": "off"}
        cells = self.controller.cells if self.controller is not None else None
        newest = cells.newest if cells is not None else None
        rows = self.controller.last_cells if self.controller is not None else None
        return {
            "keep_apart": "on",
            "snapshot_age": "inf" if newest is None else f"{now - newest.time:.3f}",
            "cell_violation": f"{step.cell_violation:.4f}" if step else "nan",
            "cell_rows_used": rows.used if rows is not None else "",
            "cell_rows_dropped": rows.dropped if rows is not None else "",
            "keep_apart_without_own": self.snapshots_without_own,
        }

    def _publish_diagnostics(self) -> None:
        now = self.get_clock().now().nanoseconds * 1e-9
        step = self.controller.last_step if self.controller is not None else None
        age = now - self.state_time if self.state is not None else float("inf")
        if not self.armed:
            level, message = DiagnosticStatus.WARN, "disarmed: no commands until armed"
        elif self.state is None:
            level, message = DiagnosticStatus.STALE, "no odometry yet"
        elif age > self.state_timeout:
            level, message = DiagnosticStatus.ERROR, "odometry stale: braking"
        elif self.fleet_stopped:
            level, message = DiagnosticStatus.WARN, "fleet stop: braking"
        elif self.geofence.mode != INSIDE:
            action = "braking" if self.geofence.mode == BRAKING else "returning inside"
            level = DiagnosticStatus.ERROR
            message = f"outside the geofence ({self.geofence.outside:.2f} m): {action}"
        elif step is not None and step.status.startswith(KEEP_APART_STATUS):
            level, message = DiagnosticStatus.WARN, step.status
        elif self.inbox.new_drops():
            level, message = DiagnosticStatus.WARN, "messages dropped (see dropped.*)"
        elif step is not None and step.used_fallback:
            level, message = DiagnosticStatus.WARN, f"solver: {step.status} ({step.fallback})"
        else:
            level, message = DiagnosticStatus.OK, "tracking"
        wrong_frame = self.inbox.drops.counts(self.robot).get(WRONG_FRAME, 0)
        if wrong_frame and (self.state is None or age > self.state_timeout):
            # Odometry keeps coming but in another frame: say so, not just "stale".
            source = "pose" if self.state_from_pose else "odometry"
            level, message = DiagnosticStatus.ERROR, (
                f"{source} refused: not in the frames {self.frames.map!r} / "
                f"{self.frames.base!r} (see {self.robot}.dropped.{WRONG_FRAME})"
            )
        values = {
            "solve_time": f"{step.solve_time:.4f}" if step else "nan",
            "status": step.status if step else "",
            "iterations": step.iterations if step else "",
            "fallback": step.fallback if step else "",
            "state_age": f"{age:.3f}",
            "solver_failures": self.controller.failures if self.controller else 0,
            "solves": self.controller.solves if self.controller else 0,
            "armed": int(self.armed),
            # Readable: the fleet's generation number and, in seconds of the graph's clock,
            # the commit stamp of the target this robot tracks (0 = no target yet).
            "generation": "" if self.fleet_generation is None else self.fleet_generation,
            "target_committed_at": f"{self.generation_stamp_ns * 1e-9:.3f}",
            "geofence": self.geofence.mode,
            "outside_m": f"{self.geofence.outside:.3f}",
            **self._keep_apart_values(now, step),
            **self.inbox.diagnostic_values([self.robot, SNAPSHOT_SOURCE]),
        }
        array = DiagnosticArray()
        array.header.stamp = self.get_clock().now().to_msg()
        array.status = [
            diagnostic_status(
                f"coverage_fleet/{self.robot}/controller", self.robot, level, message, values
            )
        ]
        self.diag_pub.publish(array)


def main() -> None:
    main_for(ControllerNode, program="coverage_fleet_controller")


if __name__ == "__main__":
    main()
