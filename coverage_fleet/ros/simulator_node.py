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
  that joins late still receives the current state. The base station is one more
  participant (`wait_for_base_station`, default on): time does not leave a state until the
  gate has answered it on `coverage/station_answer` (it has offered the candidates of that
  state and published any targets it committed), so the first step waits for the first
  generation, and every step's states are partitioned before the plants move on, as
  offline. A base station that does not answer in time is reported not answering and the
  fleet goes on without new commits; it is waited for again once it answers. Why this design:
  fleet/lockstep.py.

The plants, their noise and the lockstep barrier are core objects (fleet/plants.py,
fleet/lockstep.py); this node converts messages and calls them.

A robot without a fresh command (in realtime mode: older than `command_timeout`; in
lockstep: its controller marked not live) is given its model's braking input: a silent
controller never leaves its robot driving on a stale command. The mission's simulation
noise applies as offline: process noise on the positions every tick, measurement noise on
the published positions (one numpy generator seeded with the mission's seed). While the
fleet stop is set (fleet_stop.py) every robot gets its braking input, whatever commands
arrive; time goes on as it would for real robots.

Every message is checked first (ros/inbox.py): a command with a value that is not finite or
a progress report with a time that is not finite is dropped (throttled warning, counted per
robot), so no message can put NaN into a plant. A run that ends (duration, settled or stuck)
while a robot's controller is lost (lockstep) or its command stale (realtime) exits with
status EXIT_ROBOTS_MISSING, naming the robots: a fleet with a robot missing never reports a
clean end. Before it exits, the node waits (at most DELIVERY_LIMIT) until the recorder has
acknowledged its last states and clock: the recorder subscribes to simulated odometry
reliably, and a state lost on the way is sent again only while the writer lives.
Every `diagnostics_period` wall seconds the node publishes /diagnostics:
simulated time, steps, per robot its controller's condition, messages received per second
and dropped.
"""

from __future__ import annotations

import os
import signal
import time as wallclock

import numpy as np
import rclpy.clock
from diagnostic_msgs.msg import DiagnosticArray, DiagnosticStatus
from geometry_msgs.msg import Vector3Stamped
from nav_msgs.msg import Odometry
from rclpy.duration import Duration
from rclpy.node import Node
from rosgraph_msgs.msg import Clock
from std_msgs.msg import Header, String

from coverage_fleet.errors import ConfigError
from coverage_fleet.fleet.liveness import fresh
from coverage_fleet.fleet.lockstep import SAME_TIME, LockstepBarrier, LockstepTimeouts
from coverage_fleet.fleet.message_checks import check_finite
from coverage_fleet.fleet.mission import RobotEntry, load_mission, simulation_step
from coverage_fleet.fleet.plants import FleetPlants, NoiseLevels

from . import qos, topics
from .conversions import (
    command_from_msg,
    command_message_type,
    odometry_to_msg,
    progress_from_msg,
    seconds_to_stamp,
    stamp_to_seconds,
)
from .fleet_stop import listen_to_fleet_stop
from .frames import declare_map_frame, default_base_frame
from .inbox import Inbox
from .launcher_contract import EXIT_ROBOTS_MISSING, EXIT_STOPPED_EARLY
from .parameters import declare
from .runtime import RunFinished, main_for

MODES = ("realtime", "lockstep")
#: The base station's name as a participant of the lockstep barrier (never a robot's: robot
#: names are ROS name segments, which hold no space).
BASE_STATION = "base station"
#: At the end of a run the node waits up to this long (wall seconds) for every reliable
#: reader of its states and clock (the recorder) to acknowledge them, so that a last state
#: lost on the way is sent again before the process (and its history) is gone. Readers
#: acknowledge when the writer asks, and Fast DDS asks every 3 s by default (its
#: WriterTimes.heartbeat_period): measured 2.1-2.4 s at the end of a recorded 3-robot run.
DELIVERY_LIMIT = 4.0


class SimulatorNode(Node):
    def __init__(self) -> None:
        super().__init__("coverage_simulator")
        mission_file = declare(
            self, "mission_file", "", "Mission file (YAML): the roster to simulate."
        )
        self.mode = declare(self, "mode", "lockstep", "realtime or lockstep (see the node docs).")
        step = declare(
            self, "step", 0.0,
            "Simulation tick (s); 0 = the mission's simulation.step (default: the smallest "
            "controller sample time).", (0.0, 1.0),
        )
        plant_substeps = declare(
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
        lockstep_timeout = declare(
            self, "lockstep_timeout", 3.0,
            "Lockstep: wall seconds to wait for a live controller's answer before marking it "
            "not live.", (0.05, 600.0),
        )
        startup_timeout = declare(
            self, "startup_timeout", 120.0,
            "Lockstep: wall seconds to wait for a controller's first answer (solver set-up "
            "included).", (1.0, 3600.0),
        )
        republish_period = declare(
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
        self.wait_for_base_station = declare(
            self, "wait_for_base_station", True,
            "Lockstep: also wait for the base station's answer to each state "
            "(coverage/station_answer), under the same timeouts as a controller.",
        )
        self.odom_subscribers = declare(
            self, "odom_subscribers", 3,
            "Lockstep: the first step waits until every robot's odom has this many "
            "subscribers (its controller, the partition node, the gate, a recorder: "
            "cli/graph.odom_readers).", (0, 100),
        )
        diagnostics_period = declare(
            self, "diagnostics_period", 1.0, "Wall seconds between /diagnostics messages.",
            (0.05, 600.0),
        )
        self.map_frame = declare_map_frame(self)
        if self.mode not in MODES:
            raise ConfigError.single(
                "simulator parameters", "mode",
                f"must be one of {', '.join(MODES)}, got {self.mode!r}",
            )
        mission = load_mission(mission_file)
        self.step = step or simulation_step(mission.roster, mission.simulation)
        self.duration = self.duration or mission.simulation.duration
        self.settling = "moving"
        simulated = [e for e in mission.roster if e.simulated]
        for entry in mission.roster:
            if not entry.simulated:
                self.get_logger().info(f"{entry.name}: real robot, not simulated")
        start = 0.0 if self.mode == "lockstep" else self.get_clock().now().nanoseconds * 1e-9
        # The mission's noise, as the offline simulation applies it.
        self.plants = FleetPlants(
            simulated,
            self.step,
            plant_substeps or mission.simulation.plant_substeps,
            NoiseLevels(
                mission.simulation.process_noise_std, mission.simulation.measurement_noise_std
            ),
            mission.simulation.seed,
            time=start,
        )
        #: robot -> (input, wall time it arrived)
        self.commands: dict[str, tuple[np.ndarray, float]] = {}
        self.odom_pubs = {}
        self.inbox = Inbox(self)
        for entry in simulated:
            self._connect(entry)
        self.clock_pub = self.create_publisher(Clock, topics.CLOCK, qos.CLOCK)
        # /clock is global (ROS convention), fleet namespaces or not: a second simulator in
        # the domain would make every node's time jump between the two. Checked every second
        # as discovery brings news.
        self.create_timer(1.0, self._refuse_a_second_clock)
        self.create_subscription(String, topics.SETTLING, self._on_settling, qos.LATCHED)
        self.fleet_stopped = False
        listen_to_fleet_stop(self, self._on_fleet_stop)
        self.end_time = start + self.duration
        self.get_logger().info(
            f"simulating {len(simulated)} robots of mission {mission.name!r} in {self.mode} "
            f"mode, step {self.step:g} s, for {self.duration:g} s"
        )
        self.barrier: LockstepBarrier | None = None
        if self.mode == "realtime":
            self.create_timer(self.step, self._realtime_tick)
        else:
            self.barrier = LockstepBarrier(
                self.plants.names,
                LockstepTimeouts(lockstep_timeout, startup_timeout, republish_period),
                now=wallclock.monotonic(),
                stations=[BASE_STATION] if self.wait_for_base_station else [],
            )
            if self.wait_for_base_station:
                self.create_subscription(
                    Header, topics.STATION_ANSWER, self._on_station_answer, qos.LATCHED
                )
            # A short wall timer polls the barrier; the executor delivers answers between.
            self.create_timer(0.002, self._lockstep_poll)
        self.diag_pub = self.create_publisher(DiagnosticArray, topics.DIAGNOSTICS, qos.DISPLAY)
        # A wall-clock timer: the simulator's own clock is not simulated time.
        self.create_timer(
            diagnostics_period, self._publish_diagnostics,
            clock=rclpy.clock.Clock(clock_type=rclpy.clock.ClockType.STEADY_TIME),
        )
        self._publish_states()

    def _refuse_a_second_clock(self) -> None:
        others = self.count_publishers(topics.CLOCK) - 1
        if others > 0:
            domain = os.environ.get("ROS_DOMAIN_ID", "0")
            raise ConfigError.single(
                f"ROS_DOMAIN_ID {domain}", topics.CLOCK,
                f"{others} other node(s) publish /clock in this domain (another simulated "
                "fleet?); /clock is global, so each simulated fleet needs a ROS_DOMAIN_ID of "
                "its own",
            )

    @property
    def robots(self) -> tuple[str, ...]:
        """The simulated robots."""
        return self.plants.names

    def _connect(self, entry: RobotEntry) -> None:
        name = entry.name
        self.odom_pubs[name] = self.create_publisher(
            Odometry, topics.robot_topic(name, topics.ODOM), qos.SIMULATED_STATE
        )
        kind = entry.vehicle.command_kind
        self.create_subscription(
            command_message_type(kind, entry.vehicle.command_stamped),
            topics.robot_topic(name, topics.command_topic(kind)),
            lambda msg, n=name, k=kind: self._on_command(n, msg, k),
            qos.COMMAND,
        )
        self.create_subscription(
            Vector3Stamped,
            topics.robot_topic(name, topics.PROGRESS),
            lambda msg, n=name: self._on_progress(n, msg),
            qos.REPORTS,
        )

    # --- inputs -------------------------------------------------------------------------

    def _on_command(self, name: str, msg, kind) -> None:
        model = self.plants.entries[name].vehicle.model

        def convert():
            values = command_from_msg(msg, kind)
            check_finite(dict(enumerate((*values.linear, *values.angular))))
            u = np.asarray(model.input_from_command(values, self.plants.states[name]), float)
            check_finite(dict(enumerate(u)))
            return u

        u = self.inbox.accept(name, "command", convert)
        if u is None:
            return
        self.commands[name] = (u, wallclock.monotonic())
        if self.barrier is not None:
            self.barrier.command(name)

    def _on_progress(self, name: str, msg: Vector3Stamped) -> None:
        if self.barrier is None:
            return
        report = self.inbox.accept(name, "progress report", lambda: self._report(msg))
        if report is None:
            return
        if self.barrier.answer(name, report.state_time, wallclock.monotonic()):
            self.get_logger().info(f"{name}: controller answering, live")

    def _on_station_answer(self, msg: Header) -> None:
        if self.barrier is None:
            return

        def convert() -> float:
            state_time = stamp_to_seconds(msg.stamp)
            check_finite({"state_time": state_time})
            return state_time

        state_time = self.inbox.accept(BASE_STATION, "station answer", convert)
        if state_time is None:
            return
        if self.barrier.answer(BASE_STATION, state_time, wallclock.monotonic()):
            self.get_logger().info("base station answering, live")

    def _on_fleet_stop(self, stopped: bool) -> None:
        if stopped != self.fleet_stopped:
            self.get_logger().info("fleet stop: braking every robot" if stopped
                                   else "fleet stop released")
        self.fleet_stopped = stopped

    @staticmethod
    def _report(msg: Vector3Stamped):
        report = progress_from_msg(msg)
        check_finite({"state_time": report.state_time})
        return report

    def _on_settling(self, msg: String) -> None:
        self.settling = str(msg.data)

    def missing(self) -> list[str]:
        """Simulated robots whose controllers are not answering now: lost (lockstep), or
        without a fresh command (realtime)."""
        if self.barrier is not None:
            return [n for n in self.robots if self.barrier.is_lost(n)]
        now = wallclock.monotonic()
        return [
            n for n in self.robots
            if not fresh(self.commands.get(n, (None, None))[1], now, self.command_timeout)
        ]

    def _publish_diagnostics(self) -> None:
        missing = self.missing()
        new_drops = self.inbox.new_drops()
        if missing or new_drops:
            level = DiagnosticStatus.WARN
            message = (f"not answering: {', '.join(missing)}; " if missing else "") + (
                f"{new_drops} messages dropped" if new_drops else "all messages good"
            )
        else:
            level, message = DiagnosticStatus.OK, f"simulating ({self.mode})"
        conditions = {
            f"{n}.controller": "lost" if n in missing else (
                self.barrier.condition(n) if self.barrier is not None else "live"
            )
            for n in self.robots
        }
        if self.barrier is not None and self.wait_for_base_station:
            conditions["base_station"] = self.barrier.condition(BASE_STATION)
            if self.barrier.is_lost(BASE_STATION):
                level = DiagnosticStatus.WARN
                message = "base station not answering; " + message
        values = {
            "time": f"{self.plants.time:.3f}",
            "steps": self.barrier.steps if self.barrier is not None else "",
            "live_robots": ",".join(n for n in self.robots if n not in missing),
            "settling": self.settling,
            **conditions,
            **self.inbox.diagnostic_values(self.robots),
        }
        self.inbox.publish(self.diag_pub, "coverage_fleet/simulator", level, message, values)

    # --- stepping -----------------------------------------------------------------------

    def _input_for(self, name: str) -> np.ndarray | None:
        """The robot's command, or None (the plant brakes): no command yet, its controller
        lost (lockstep) or its command stale (realtime). In lockstep every live robot
        answered this very step; how long the step took does not matter (a slow neighbour
        must not make it brake)."""
        command = self.commands.get(name)
        if command is None or self.fleet_stopped:
            return None
        if self.barrier is not None:
            return None if self.barrier.is_lost(name) else command[0]
        usable = fresh(command[1], wallclock.monotonic(), self.command_timeout)
        return command[0] if usable else None

    def _advance(self) -> None:
        self.plants.advance({name: self._input_for(name) for name in self.plants.names})

    def _publish_states(self) -> None:
        stamp = seconds_to_stamp(self.plants.time)
        self.clock_pub.publish(Clock(clock=stamp))
        # A re-publication sends the same measurement (the plants keep it for the tick).
        for name, x in self.plants.measure().items():
            model = self.plants.entries[name].vehicle.model
            command = self.commands.get(name)
            # While the fleet is stopped the plant brakes: report that, not the command.
            applied = None if command is None or self.fleet_stopped else command[0]
            odom = model.odometry_from_state(x, applied)
            self.odom_pubs[name].publish(
                odometry_to_msg(odom, stamp, default_base_frame(name), self.map_frame)
            )

    def _finish_if_done(self) -> None:
        time = self.plants.time
        if time >= self.end_time - SAME_TIME:
            self._finish(f"run over at t = {time:.2f} s (duration reached)")
        if self.stop_when_settled and self.settling in ("settled", "stuck"):
            ending = "settled within tolerance" if self.settling == "settled" else "stuck"
            self._finish(f"run over at t = {time:.2f} s (fleet {ending})")

    def status_on_stop(self, number: int | None) -> int:
        """Exit status when a stop signal ends the process (see runtime.run_nodes)."""
        name = signal.Signals(number).name if number else "a stop request"
        time = self.plants.time
        self.get_logger().warning(
            f"stopped by {name} at t = {time:.2f} s, before the run was over "
            f"(duration {self.duration:g} s)"
        )
        return 0 if number in (None, signal.SIGINT) else EXIT_STOPPED_EARLY

    def _deliver_last_states(self) -> None:
        """Wait (at most DELIVERY_LIMIT) until the reliable readers acknowledged every state
        and clock published; say so when they did not."""
        deadline = wallclock.monotonic() + DELIVERY_LIMIT
        late = []
        writers = [(topics.CLOCK, self.clock_pub)] + [
            (topics.robot_topic(name, topics.ODOM), pub) for name, pub in self.odom_pubs.items()
        ]
        for topic, publisher in writers:
            left = max(0.0, deadline - wallclock.monotonic())
            if not publisher.wait_for_all_acked(Duration(seconds=left)):
                late.append(topic)
        if late:
            self.get_logger().warning(
                f"the last states were not acknowledged within {DELIVERY_LIMIT:g} s on "
                f"{', '.join(late)}: a reliable reader (the recorder) may miss them"
            )

    def _finish(self, why: str) -> None:
        self._deliver_last_states()
        missing = self.missing()
        if self.barrier is not None and self.wait_for_base_station \
                and self.barrier.is_lost(BASE_STATION):
            self.get_logger().warning(
                f"{why}; the base station was not answering at the end (no new commits)"
            )
        if missing:
            self.get_logger().error(
                f"{why}, but not with the whole fleet: {', '.join(missing)} not answering "
                f"(its robot braked); exit status {EXIT_ROBOTS_MISSING}"
            )
            raise RunFinished(EXIT_ROBOTS_MISSING)
        self.get_logger().info(why)
        raise RunFinished(0)

    def _realtime_tick(self) -> None:
        self._advance()
        self._publish_states()
        self._finish_if_done()

    def _connected(self) -> bool:
        return all(
            pub.get_subscription_count() >= self.odom_subscribers
            for pub in self.odom_pubs.values()
        )

    def _lockstep_poll(self) -> None:
        barrier = self.barrier
        if barrier is None:  # only polled in lockstep mode
            return
        decision = barrier.poll(wallclock.monotonic(), self._connected())
        if decision.paused:
            self.get_logger().warning(
                f"lockstep: this process was held for {decision.paused:.2f} s (a loaded or "
                "paused machine); that time is counted against no controller"
            )
        for name in decision.lost:
            consequence = (
                "the fleet goes on without new commits until it answers"
                if name == BASE_STATION
                else "marking its controller not live (its robot brakes)"
            )
            self.get_logger().warning(
                f"{name}: no answer for t = {barrier.time:.2f} s in time (lockstep_timeout, "
                f"or startup_timeout before its first answer); {consequence}"
            )
        if not decision.advance:
            if decision.republish:
                self._publish_states()
            return
        self._finish_if_done()
        self._advance()
        barrier.advanced(self.plants.time, wallclock.monotonic())
        self._publish_states()


def main() -> None:
    main_for(SimulatorNode, program="coverage_fleet_simulator")


if __name__ == "__main__":
    main()
