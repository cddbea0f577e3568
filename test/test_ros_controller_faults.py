"""A real controller process over DDS on loopback, fed bad messages and put outside the
region; this test plays the robot (odometry) and the gate (a committed target).

Issue 9's rows for a controller:
- odometry stamped an hour ahead: the controller used to take it as its newest state and
  stop solving (every later state looked older), repeating its last command; now it is
  dropped and counted, and the controller keeps solving on the good states after it;
- odometry with NaN, in another frame or at (1000, -1000): dropped, counted, never solved on;
- a flood of odometry (1000 per second for 2 s): the states beyond max_state_rate (40 per
  second here) are dropped and counted as a flood, no more good states than the rate
  allows are solved on, and the controller goes on answering;
- the robot outside the region (geofence): braking input first and an ERROR diagnostic;
  once at rest a return plan drives it towards the region; back inside it tracks again.

Issue 12's rows (keep-apart on, the probe plays the partition node's snapshots too):
- a snapshot giving a negative age: dropped and counted (`snapshot.dropped.bad_table`);
- no snapshot for longer than the mission's keep_apart.max_age: the braking input, and
  the status on /diagnostics says why; with snapshots again it tracks again.

Braking is the vehicle model's own braking input (common practice: a controller without a
usable state leaves its actuators in a safe state); finite values, the map frame (REP 105)
and the stamp limits are fleet/message_checks.py's rules.
"""

from __future__ import annotations

import math
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

rclpy = pytest.importorskip("rclpy", reason="ROS 2 wheels not installed (scripts/setup_env.sh)")

from diagnostic_msgs.msg import DiagnosticArray, DiagnosticStatus  # noqa: E402
from geometry_msgs.msg import PointStamped, Twist  # noqa: E402
from nav_msgs.msg import Odometry  # noqa: E402
from rclpy.duration import Duration  # noqa: E402
from support_snapshots import SnapshotSender  # noqa: E402

from coverage_fleet.fleet.mission import load_mission  # noqa: E402
from coverage_fleet.geometry.buffered_cells import FleetSnapshot  # noqa: E402
from coverage_fleet.ros import qos, topics  # noqa: E402
from coverage_fleet.ros.conversions import (  # noqa: E402
    SNAPSHOT_COLUMNS,
    command_from_msg,
    odometry_to_msg,
    seconds_to_stamp,
    snapshot_to_msg,
    solve_from_msg,
    target_to_msg,
)
from coverage_fleet.vehicles.base import OdometryValues  # noqa: E402

REPO = Path(__file__).resolve().parents[1]
MISSION = REPO / "config" / "missions" / "solar_row_quick_check.yaml"  # region 12 m x 8 m
ROBOT = "rover_a"
STATUS = f"coverage_fleet/{ROBOT}/controller"
PATIENCE = 120.0
MAX_STATE_RATE = 40.0

FLOOD = """
import sys, time, rclpy
from nav_msgs.msg import Odometry
from coverage_fleet.ros import conversions as cv, qos, topics
from coverage_fleet.vehicles.base import OdometryValues
from rclpy.duration import Duration
ahead = Duration(seconds=float(sys.argv[1]))
rclpy.init()
node = rclpy.create_node("odom_flood")
pub = node.create_publisher(Odometry, topics.robot_topic("rover_a", topics.ODOM), qos.STATE)
waited = time.monotonic() + 60.0
while pub.get_subscription_count() == 0 and time.monotonic() < waited:
    time.sleep(0.05)  # discovery: a flood sent before the controller matched is lost
time.sleep(0.5)
first = node.get_clock().now().nanoseconds * 1e-9
start = time.monotonic()
for k in range(2000):
    stamp = (node.get_clock().now() + ahead).to_msg()
    pub.publish(cv.odometry_to_msg(OdometryValues(2.0, 1.0, 0.0), stamp, "rover_a/base_link"))
    pause = start + (k + 1) / 1000.0 - time.monotonic()
    if pause > 0:
        time.sleep(pause)
last = node.get_clock().now().nanoseconds * 1e-9
print("sent 2000", pub.get_subscription_count(), first, last, flush=True)
"""


class Robot:
    def __init__(self, controller: subprocess.Popen) -> None:
        self.controller = controller
        self.node = rclpy.create_node("controller_fault_probe")
        self.commands: list[np.ndarray] = []
        self.solved_at: list[float] = []
        #: (state time, solve time in s) per solve report
        self.solve_times: list[tuple[float, float]] = []
        self.diagnostics: dict[str, str] = {}
        self.level = None
        self.message = ""
        self.node.create_subscription(
            Twist, topics.robot_topic(ROBOT, topics.CMD_VEL), self._on_command, qos.COMMAND
        )
        self.node.create_subscription(
            DiagnosticStatus, topics.robot_topic(ROBOT, topics.SOLVE),
            self._on_solve, qos.REPORTS,
        )
        self.node.create_subscription(
            DiagnosticArray, topics.DIAGNOSTICS, self._on_diagnostics, qos.DISPLAY
        )
        self.odom = self.node.create_publisher(
            Odometry, topics.robot_topic(ROBOT, topics.ODOM), qos.STATE
        )
        self.target = self.node.create_publisher(
            PointStamped, topics.robot_topic(ROBOT, topics.TARGET), qos.LATCHED
        )
        # Keep-apart: the fleet is this robot alone (a snapshot with each state sent).
        self.snapshots = SnapshotSender(self.node, MISSION, ROBOT)
        self.sending_snapshots = True

    def _on_solve(self, msg: DiagnosticStatus) -> None:
        solve = solve_from_msg(msg)
        self.solved_at.append(solve.state_time)
        self.solve_times.append((solve.state_time, solve.solve_time))

    def _on_command(self, msg: Twist) -> None:
        values = command_from_msg(msg, "twist")
        self.commands.append(np.array([*values.linear, *values.angular]))

    def _on_diagnostics(self, msg: DiagnosticArray) -> None:
        for status in msg.status:
            if status.name == STATUS:
                self.diagnostics = {kv.key: kv.value for kv in status.values}
                self.level, self.message = status.level, status.message

    def count(self, reason: str, source: str = ROBOT) -> int:
        return int(self.diagnostics.get(f"{source}.dropped.{reason}", "0"))

    def now(self):
        return self.node.get_clock().now()

    def send(self, values: OdometryValues, stamp=None, frame: str = "map") -> float:
        stamp = stamp or self.now()
        self.odom.publish(odometry_to_msg(values, stamp.to_msg(), f"{ROBOT}/base_link", frame))
        return stamp.nanoseconds * 1e-9

    def drive_until(self, values, condition, what: str, **kwargs) -> None:
        """Send `values` at 10 Hz (fresh stamps) until `condition()`."""
        deadline = time.monotonic() + PATIENCE
        while not condition():
            assert self.controller.poll() is None, "the controller died"
            assert time.monotonic() < deadline, f"never saw {what}"
            if self.sending_snapshots:
                self.snapshots.send()
            self.send(values, **kwargs)
            for _ in range(2):
                rclpy.spin_once(self.node, timeout_sec=0.05)


@pytest.fixture(scope="module")
def robot(tmp_path_factory: pytest.TempPathFactory):
    log_path = tmp_path_factory.mktemp("controller_faults") / "controller.log"
    log = log_path.open("w")
    controller = subprocess.Popen(
        [sys.executable, "-m", "coverage_fleet.ros.controller_node", "--ros-args",
         "-r", f"__ns:=/{ROBOT}", "-p", f"mission_file:={MISSION}",
         "-p", "diagnostics_period:=0.2",
         # Well above the 10 states per second this test sends, well below what a flood
         # delivers even to a busy process (the default, 200, is for real odometry rates).
         "-p", f"max_state_rate:={MAX_STATE_RATE}"],
        stdout=log, stderr=subprocess.STDOUT,
    )
    rclpy.init()
    probe = Robot(controller)
    probe.target.publish(target_to_msg([10.0, 1.0], seconds_to_stamp(1.0)))
    try:
        probe.drive_until(OdometryValues(1.0, 1.0, 0.0), lambda: len(probe.solved_at) >= 10,
                          "the first solves")
        yield probe
    finally:
        probe.node.destroy_node()
        rclpy.shutdown()
        if controller.poll() is None:
            controller.terminate()
            controller.wait(timeout=60)
        log.close()
    assert controller.returncode == 0, log_path.read_text()[-3000:]
    assert "Traceback" not in log_path.read_text(), log_path.read_text()[-3000:]


def test_a_state_stamped_an_hour_ahead_does_not_stop_the_solves(robot: Robot) -> None:
    here = OdometryValues(1.0, 1.0, 0.0)
    ahead = robot.now() + Duration(seconds=3600)
    for _ in range(10):  # a second of states stamped an hour ahead
        robot.send(here, stamp=ahead)
        rclpy.spin_once(robot.node, timeout_sec=0.1)
    resumed = robot.now().nanoseconds * 1e-9
    # The previous code took the future state as its newest and never solved again.
    robot.drive_until(here, lambda: any(t >= resumed for t in robot.solved_at),
                      "a solve on a good state after the future ones")
    assert all(t < resumed + 600 for t in robot.solved_at)  # never on the future state
    robot.drive_until(here, lambda: robot.count("stamp_future") >= 1, "the future state counted")


def test_nan_wrong_frame_and_far_states_are_dropped_and_never_solved_on(robot: Robot) -> None:
    marked = 1000.0  # stamps of the bad states, to find them among the solves
    cases = [
        ("not_finite", OdometryValues(math.nan, 1.0, 0.0), "map"),
        ("wrong_frame", OdometryValues(1.0, 1.0, 0.0), "odom"),
        ("implausible_position", OdometryValues(1000.0, -1000.0, 0.0), "map"),
    ]
    for reason, values, frame in cases:
        stamp = robot.now()
        marked = stamp.nanoseconds * 1e-9
        robot.drive_until(values, lambda r=reason: robot.count(r) >= 1, f"{reason} counted",
                          stamp=stamp, frame=frame)
        assert marked not in robot.solved_at, reason


def flood_and_wait(robot: Robot, ahead: float) -> tuple[float, float]:
    """2000 states in 2 s from another process, stamped `ahead` seconds after now; returns
    the span of their stamps."""
    flood = subprocess.Popen([sys.executable, "-c", FLOOD, str(ahead)], stdout=subprocess.PIPE,
                             text=True)
    deadline = time.monotonic() + PATIENCE
    while flood.poll() is None:
        assert time.monotonic() < deadline, "the flood never ended"
        rclpy.spin_once(robot.node, timeout_sec=0.05)
    words = flood.stdout.read().split()
    assert words[:2] == ["sent", "2000"] and int(words[2]) >= 1, words  # matched the controller
    return float(words[3]), float(words[4])


def test_an_odometry_flood_is_cut_and_counted(robot: Robot) -> None:
    """States beyond max_state_rate are dropped and counted; good states are taken at most
    at that rate (plus the bucket's burst); the controller answers again afterwards.

    The count is shown with a flood stamped an hour ahead: the controller drops each such
    state cheaply after the rate check, so it receives the flood at full speed. A flood of
    good states makes it solve inside its odometry callback, and its reader keeps only the
    newest state (qos.STATE_IN); on a loaded machine, with solves longer than
    1 / max_state_rate, the reader drops the excess before the rate check sees it, so the
    count from that flood depends on the machine; the bound on the states taken does not."""
    flooded_before = robot.count("flood")
    flood_and_wait(robot, ahead=3600.0)
    robot.drive_until(OdometryValues(2.0, 1.0, 0.0),
                      lambda: robot.count("flood") > flooded_before, "the flood counted")
    solved_before = len(robot.solve_times)
    first, last = flood_and_wait(robot, ahead=0.0)
    solves = len(robot.solved_at)
    robot.drive_until(OdometryValues(2.0, 1.0, 0.0), lambda: len(robot.solved_at) > solves,
                      "solves after the flood")
    during = [t for t, _ in robot.solve_times[solved_before:] if first <= t <= last]
    burst = max(1.0, MAX_STATE_RATE / 10.0)  # controller_node.py's bucket
    assert during, "no state of the good flood was taken"
    assert len(during) <= MAX_STATE_RATE * (last - first) + burst + 1, (len(during), last - first)


def test_outside_the_geofence_it_brakes_then_returns_then_tracks(robot: Robot) -> None:
    model = next(e for e in load_mission(MISSION).roster if e.name == ROBOT).vehicle.model
    # 2 m east of the region (margin 0.5 m), facing it, still driving at 0.5 m/s.
    moving = OdometryValues(14.0, 4.0, math.pi, body_vx=0.5)
    x = np.asarray(model.state_from_odometry(moving), float)
    braking = model.command_from_input(model.braking_input(x), x)
    expected = np.array([*braking.linear, *braking.angular])
    robot.drive_until(moving, lambda: "outside the geofence" in robot.message,
                      "the geofence diagnostic")
    assert robot.level == DiagnosticStatus.ERROR and "braking" in robot.message
    seen = len(robot.commands)
    robot.drive_until(moving, lambda: len(robot.commands) > seen + 3, "commands while outside")
    assert np.allclose(robot.commands[-1], expected, atol=1e-9), (robot.commands[-1], expected)
    # At rest outside: the return plan drives it forward, i.e. west, into the region.
    still = OdometryValues(14.0, 4.0, math.pi)
    robot.drive_until(still, lambda: "returning" in robot.message, "the return")
    seen = len(robot.commands)
    robot.drive_until(still, lambda: len(robot.commands) > seen + 3, "return commands")
    assert robot.commands[-1][0] > 0.05, robot.commands[-1]
    # Back inside: tracking again.
    robot.drive_until(OdometryValues(11.0, 4.0, math.pi),
                      lambda: robot.diagnostics.get("geofence") == "inside", "back inside")
    assert robot.level != DiagnosticStatus.ERROR, robot.message


def test_a_snapshot_with_a_negative_age_is_dropped_and_counted(robot: Robot) -> None:
    msg = snapshot_to_msg(FleetSnapshot(
        time=robot.now().nanoseconds * 1e-9, names=(ROBOT,), positions=np.array([[2.0, 1.0]]),
        ages=np.array([0.5]), radii=np.array([0.35]), speed_limits=np.array([1.0]),
    ), load_mission(MISSION).robot_names)
    data = list(msg.data)
    data[len(SNAPSHOT_COLUMNS) + SNAPSHOT_COLUMNS.index("age")] = -1.0
    msg.data = data
    robot.snapshots.publisher.publish(msg)
    robot.drive_until(OdometryValues(2.0, 1.0, 0.0),
                      lambda: robot.count("bad_table", "snapshot") > 0, "the snapshot counted")
    assert robot.diagnostics.get("keep_apart") == "on", robot.diagnostics


def test_without_recent_snapshots_it_brakes_and_says_why(robot: Robot) -> None:
    model = next(e for e in load_mission(MISSION).roster if e.name == ROBOT).vehicle.model
    here = OdometryValues(2.0, 1.0, 0.0)
    x = np.asarray(model.state_from_odometry(here), float)
    braking = model.command_from_input(model.braking_input(x), x)
    expected = np.array([*braking.linear, *braking.angular])
    robot.drive_until(here, lambda: robot.message == "tracking", "tracking")
    assert not np.allclose(robot.commands[-1], expected, atol=1e-9)  # it is driving
    robot.sending_snapshots = False
    try:
        robot.drive_until(here, lambda: "newest snapshot" in robot.message, "the stale snapshot")
        assert robot.message.startswith("keep-apart:") and "braking" in robot.message
        assert float(robot.diagnostics["snapshot_age"]) > 1.0, robot.diagnostics
        seen = len(robot.commands)
        robot.drive_until(here, lambda: len(robot.commands) > seen + 3, "commands while stale")
        assert np.allclose(robot.commands[-1], expected, atol=1e-9), robot.commands[-1]
    finally:
        robot.sending_snapshots = True
    robot.drive_until(here, lambda: robot.message == "tracking", "tracking again")
