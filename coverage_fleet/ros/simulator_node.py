"""Headless simulator: integrates every simulated robot of a mission and publishes its
odometry (`<robot>/odom`, map frame) and /clock.

Two modes:
- realtime: a wall-clock timer advances the plants by `step` with the latest commands;
  /clock follows the wall clock.
- lockstep: simulated time advances by `step` only when every live controller has answered
  the current state: it has published a command and a progress report whose vector.z (the
  state time) equals the current time (see conversions.py). A controller that does not
  answer within `lockstep_timeout` wall seconds (`startup_timeout` before its first answer)
  is marked not live: its robot brakes and the fleet goes on. It becomes live again when it
  answers. States are re-published every `republish_period` while waiting, so a controller
  that joins late still receives the current state.

A robot without a fresh command (in realtime mode: older than `command_timeout`; in
lockstep: its controller marked not live) is given its model's braking input: a silent
controller never leaves its robot driving on a stale command. The mission's simulation
noise applies as offline: process noise on the positions every tick, measurement noise on
the published positions (one numpy generator seeded with the mission's seed).
"""

from __future__ import annotations

import time as wallclock
from dataclasses import dataclass, field

import numpy as np
from geometry_msgs.msg import Vector3Stamped
from nav_msgs.msg import Odometry
from rclpy.node import Node
from rosgraph_msgs.msg import Clock
from std_msgs.msg import String

from coverage_fleet.errors import ConfigError
from coverage_fleet.fleet.mission import RobotEntry, load_mission, simulation_step
from coverage_fleet.fleet.plants import initial_state

from . import qos, topics
from .conversions import (
    command_from_msg,
    command_message_type,
    odometry_to_msg,
    progress_from_msg,
    seconds_to_stamp,
)
from .parameters import declare
from .runtime import RunFinished, main_for

MODES = ("realtime", "lockstep")
#: Two state times closer than this are the same step (far below any sample time).
SAME_TIME = 1e-6


@dataclass
class SimulatedRobot:
    entry: RobotEntry
    plant: object
    state: np.ndarray
    odom_pub: object
    command: np.ndarray | None = None
    command_wall_time: float = -np.inf
    commands_since_publish: int = 0
    answered_time: float = -np.inf
    #: "waiting" (no answer yet), "live", or "lost" (timed out; brakes until it answers)
    liveness: str = "waiting"
    #: simulated time at which it was marked lost, and wall time it came back
    lost_at: float = np.inf
    revived_wall: float = -np.inf
    subscriptions: list = field(default_factory=list)


class SimulatorNode(Node):
    def __init__(self) -> None:
        super().__init__("simulator")
        mission_file = declare(
            self, "mission_file", "", "Mission file (YAML): the roster to simulate."
        )
        self.mode = declare(self, "mode", "lockstep", "realtime or lockstep (see the node docs).")
        step = declare(
            self, "step", 0.0,
            "Simulation tick (s); 0 = the mission's simulation.step (default: the smallest "
            "controller sample time).", (0.0, 1.0),
        )
        self.plant_substeps = declare(
            self, "plant_substeps", 0, "RK4 substeps per tick; 0 = the mission's.", (0, 1000)
        )
        self.duration = declare(
            self, "duration", 0.0,
            "Simulated seconds to run, then exit 0; 0 = the mission's simulation.duration.",
            (0.0, 1e7),
        )
        self.stop_when_settled = declare(
            self, "stop_when_settled", True,
            "Exit 0 once the gate node reports the fleet settled or stuck "
            "(coverage/settling).",
        )
        self.lockstep_timeout = declare(
            self, "lockstep_timeout", 3.0,
            "Lockstep: wall seconds to wait for a live controller's answer before marking it "
            "not live.", (0.05, 600.0),
        )
        self.startup_timeout = declare(
            self, "startup_timeout", 120.0,
            "Lockstep: wall seconds to wait for a controller's first answer (solver set-up "
            "included).", (1.0, 3600.0),
        )
        self.republish_period = declare(
            self, "republish_period", 0.5,
            "Lockstep: wall seconds between re-publications of the current state while waiting.",
            (0.01, 60.0),
        )
        self.command_timeout = declare(
            self, "command_timeout", 1.0,
            "Realtime: wall seconds after which a robot's last command counts as stale (it "
            "brakes).",
            (0.01, 600.0),
        )
        self.odom_subscribers = declare(
            self, "odom_subscribers", 2,
            "Lockstep: the first step waits until every robot's odom has this many "
            "subscribers (its controller, the partition node, a recorder...).", (0, 100),
        )
        if self.mode not in MODES:
            raise ConfigError.single(
                "simulator parameters", "mode",
                f"must be one of {', '.join(MODES)}, got {self.mode!r}",
            )
        mission = load_mission(mission_file)
        self.step = step or simulation_step(mission.roster, mission.simulation)
        self.plant_substeps = self.plant_substeps or mission.simulation.plant_substeps
        self.duration = self.duration or mission.simulation.duration
        # The mission's noise, as the offline simulation applies it: process noise on the
        # positions per tick, measurement noise on the positions published.
        self.process_noise = mission.simulation.process_noise_std
        self.measurement_noise = mission.simulation.measurement_noise_std
        self.rng = np.random.default_rng(mission.simulation.seed)
        self.time = 0.0
        self.measured: dict[str, np.ndarray] = {}
        self.settling = "moving"
        self.robots: dict[str, SimulatedRobot] = {}
        for entry in mission.roster:
            if not entry.simulated:
                self.get_logger().info(f"{entry.name}: real robot, not simulated")
                continue
            self.robots[entry.name] = self._add_robot(entry)
        self.clock_pub = self.create_publisher(Clock, topics.CLOCK, qos.CLOCK)
        self.create_subscription(String, topics.SETTLING, self._on_settling, qos.LATCHED)
        self.started_wall = wallclock.monotonic()
        self.get_logger().info(
            f"simulating {len(self.robots)} robots of mission {mission.name!r} in {self.mode} "
            f"mode, step {self.step:g} s, for {self.duration:g} s"
        )
        if self.mode == "realtime":
            self.time = self.get_clock().now().nanoseconds * 1e-9
            self.end_time = self.time + self.duration
            self.create_timer(self.step, self._realtime_tick)
            self._publish_states()
        else:
            self.end_time = self.duration
            self.step_published_wall = wallclock.monotonic()
            self.last_republish = self.step_published_wall
            self._publish_states()
            # A short wall timer polls the handshake; the executor delivers answers between.
            self.create_timer(0.002, self._lockstep_poll)

    def _add_robot(self, entry: RobotEntry) -> SimulatedRobot:
        model = entry.vehicle.model
        robot = SimulatedRobot(
            entry=entry,
            plant=model.discrete_dynamics(self.step, self.plant_substeps),
            state=initial_state(entry, entry.initial_pose),
            odom_pub=self.create_publisher(
                Odometry, topics.robot_topic(entry.name, topics.ODOM), qos.STATE
            ),
        )
        kind = entry.vehicle.command_kind
        robot.subscriptions.append(
            self.create_subscription(
                command_message_type(kind),
                topics.robot_topic(entry.name, topics.CMD_VEL),
                lambda msg, r=robot, k=kind: self._on_command(r, msg, k),
                qos.COMMAND,
            )
        )
        robot.subscriptions.append(
            self.create_subscription(
                Vector3Stamped,
                topics.robot_topic(entry.name, topics.PROGRESS),
                lambda msg, r=robot: self._on_progress(r, msg),
                qos.REPORTS,
            )
        )
        return robot

    # --- inputs -------------------------------------------------------------------------

    def _on_command(self, robot: SimulatedRobot, msg, kind) -> None:
        model = robot.entry.vehicle.model
        values = command_from_msg(msg, kind)
        robot.command = np.asarray(model.input_from_command(values, robot.state), float)
        robot.command_wall_time = wallclock.monotonic()
        robot.commands_since_publish += 1

    def _on_progress(self, robot: SimulatedRobot, msg: Vector3Stamped) -> None:
        report = progress_from_msg(msg)
        current = abs(report.state_time - self.time) < SAME_TIME
        if current:
            robot.answered_time = report.state_time
        # A lost controller that answers any state since it was lost is back; from now on
        # it is waited for again.
        if current or (robot.liveness == "lost" and report.state_time > robot.lost_at):
            if robot.liveness != "live":
                self.get_logger().info(f"{robot.entry.name}: controller answering, live")
                robot.revived_wall = wallclock.monotonic()
            robot.liveness = "live"

    def _on_settling(self, msg: String) -> None:
        self.settling = str(msg.data)

    # --- stepping -----------------------------------------------------------------------

    def _input_for(self, robot: SimulatedRobot) -> np.ndarray:
        model = robot.entry.vehicle.model
        if self.mode == "lockstep":
            # Every live robot answered this very step; how long the step took does not
            # matter (a slow neighbour must not make it brake).
            fresh = True
        else:
            fresh = wallclock.monotonic() - robot.command_wall_time <= self.command_timeout
        if robot.command is None or not fresh or robot.liveness == "lost":
            return np.asarray(model.braking_input(robot.state), float)
        return robot.command

    def _advance(self) -> None:
        for robot in self.robots.values():
            u = self._input_for(robot)
            robot.state = np.asarray(robot.plant(robot.state, u), float).ravel()
            if self.process_noise > 0:
                i, j = robot.entry.vehicle.model.position_indices
                robot.state[[i, j]] += self.rng.normal(0.0, self.process_noise, 2)
        self.time += self.step
        self.measured = {}

    def _publish_states(self) -> None:
        stamp = seconds_to_stamp(self.time)
        self.clock_pub.publish(Clock(clock=stamp))
        for name, robot in self.robots.items():
            model = robot.entry.vehicle.model
            if name not in self.measured:  # a re-publication sends the same measurement
                x = robot.state.copy()
                if self.measurement_noise > 0:
                    i, j = model.position_indices
                    x[[i, j]] += self.rng.normal(0.0, self.measurement_noise, 2)
                self.measured[name] = x
            odom = model.odometry_from_state(self.measured[name], robot.command)
            robot.odom_pub.publish(odometry_to_msg(odom, stamp, child_frame_id=f"{name}/base_link"))

    def _finish_if_done(self) -> None:
        if self.time >= self.end_time - SAME_TIME:
            self.get_logger().info(f"run over at t = {self.time:.2f} s (duration reached)")
            raise RunFinished(0)
        if self.stop_when_settled and self.settling in ("settled", "stuck"):
            ending = "settled within tolerance" if self.settling == "settled" else "stuck"
            self.get_logger().info(f"run over at t = {self.time:.2f} s (fleet {ending})")
            raise RunFinished(0)

    def _realtime_tick(self) -> None:
        self._advance()
        self._publish_states()
        self._finish_if_done()

    def _lockstep_poll(self) -> None:
        now = wallclock.monotonic()
        waiting = []
        for name, robot in self.robots.items():
            if robot.liveness == "lost":
                continue
            answered = (
                abs(robot.answered_time - self.time) < SAME_TIME
                and robot.commands_since_publish > 0
            )
            if answered:
                continue
            waiting.append(name)
            if abs(robot.answered_time - self.time) < SAME_TIME:
                continue  # it answered this state; its command is on the way
            limit = self.startup_timeout if robot.liveness == "waiting" else self.lockstep_timeout
            if now - max(self.step_published_wall, robot.revived_wall) > limit:
                self.get_logger().warning(
                    f"{name}: no answer for t = {self.time:.2f} s within {limit:g} s; "
                    "marking its controller not live (its robot brakes)"
                )
                robot.liveness = "lost"
                robot.lost_at = self.time
                waiting.remove(name)
        if self.time == 0.0 and not waiting:
            short = [
                n for n, r in self.robots.items()
                if r.odom_pub.get_subscription_count() < self.odom_subscribers
            ]
            if short and now - self.step_published_wall <= self.startup_timeout:
                waiting = short
        if waiting:
            if now - self.last_republish > self.republish_period:
                self.last_republish = now
                self._publish_states()
            return
        self._finish_if_done()
        self._advance()
        self.step_published_wall = self.last_republish = wallclock.monotonic()
        for robot in self.robots.values():
            # Counted from the step's first publication: an answer to a re-publication
            # of the same state is as good as the first.
            robot.commands_since_publish = 0
        self._publish_states()


def main() -> None:
    main_for(SimulatorNode, program="coverage_fleet_simulator")


if __name__ == "__main__":
    main()
