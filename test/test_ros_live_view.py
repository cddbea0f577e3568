"""`coverage-fleet watch` joins a running graph over DDS on loopback: the real base station
(partition and gate) in its own process, two robots played by this test (odometry and
progress reports, as in test_ros_gate_node.py), and a third namespace that sends a
non-finite position. The watch runs as its own process in plain-lines mode, as it would in
a pipe, and its output is read while it runs.

What it must show: a row per robot with live/stale, the fleet's cost and generation as the
base station publishes them (checked against this test's own subscriber: the messages on
the wire are the reference), a robot whose odometry stops turns stale (its newest state
older than the limit: common practice for watchdogs) while the other stays live, a robot
that appears in the graph gets a row, the odd message is counted, a node's warning on
/rosout is printed, the fleet stop shows, and Ctrl-C ends the watch with status 0 and no
traceback.
"""

from __future__ import annotations

import math
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

rclpy = pytest.importorskip("rclpy", reason="ROS 2 wheels not installed (scripts/setup_env.sh)")

from geometry_msgs.msg import Vector3Stamped  # noqa: E402
from nav_msgs.msg import Odometry  # noqa: E402
from std_msgs.msg import Float64, UInt32  # noqa: E402
from std_srvs.srv import SetBool  # noqa: E402
from support_processes import WatchedProcess  # noqa: E402

from coverage_fleet.ros import conversions as cv  # noqa: E402
from coverage_fleet.ros import qos, topics  # noqa: E402
from coverage_fleet.vehicles.base import OdometryValues  # noqa: E402

MISSION = """\
name: watch_check_yard   # invented test scenario
region: {vertices: [[0, 0], [10, 0], [10, 10], [0, 10]]}
density: {kind: uniform}
roster:
  - {name: rover_a, vehicle: differential_drive, initial_pose: [1.0, 1.0, 0.0]}
  - {name: rover_b, vehicle: differential_drive, initial_pose: [3.0, 1.5, 0.0]}
"""
POSITIONS = {"rover_a": (1.0, 1.0), "rover_b": (3.0, 1.5), "ghost_c": (math.nan, 2.0)}
PATIENCE = 60.0


class Robots:
    """The robots' side of the wire, from this process; `silent` robots stop publishing."""

    def __init__(self) -> None:
        self.node = rclpy.create_node("watch_test_robots")
        self.silent: set[str] = set()
        self.odom = {
            n: self.node.create_publisher(Odometry, topics.robot_topic(n, topics.ODOM), qos.STATE)
            for n in POSITIONS
        }
        self.progress = {
            n: self.node.create_publisher(
                Vector3Stamped, topics.robot_topic(n, topics.PROGRESS), qos.REPORTS
            )
            for n in POSITIONS
        }
        self.cost: float | None = None
        self.generation: int | None = None
        self.node.create_subscription(
            Float64, topics.COST, lambda m: setattr(self, "cost", m.data), qos.DISPLAY
        )
        self.node.create_subscription(
            UInt32, topics.GENERATION, lambda m: setattr(self, "generation", m.data), qos.LATCHED
        )
        self.node.create_timer(0.1, self.publish)

    def publish(self) -> None:
        stamp = self.node.get_clock().now().to_msg()
        now = self.node.get_clock().now().nanoseconds * 1e-9
        for name, (x, y) in POSITIONS.items():
            if name in self.silent:
                continue
            odom = cv.odometry_to_msg(OdometryValues(x, y, 0.0), stamp, f"{name}/base_link")
            self.odom[name].publish(odom)
            report = cv.ProgressValues(0, math.nan, math.nan, now)
            self.progress[name].publish(cv.progress_to_msg(report))

    def spin(self, seconds: float) -> None:
        end = time.monotonic() + seconds
        while time.monotonic() < end:
            rclpy.spin_once(self.node, timeout_sec=0.05)


def latest_block(lines: list[str]) -> list[str]:
    """The newest complete status block: a `fleet` line and the `robot` lines after it."""
    starts = [i for i, line in enumerate(lines) if line.startswith("fleet ")]
    if len(starts) < 2:
        return []
    return lines[starts[-2] : starts[-1]]


def robot_line(block: list[str], name: str) -> str:
    return next((line for line in block if line.startswith(f"robot {name} ")), "")


@pytest.fixture()
def graph(tmp_path: Path):
    mission = tmp_path / "mission.yaml"
    mission.write_text(MISSION)
    log = (tmp_path / "base_station.log").open("w")
    base = subprocess.Popen(
        [
            sys.executable, "-m", "coverage_fleet.ros.base_station", "--ros-args",
            "-p", f"mission_file:={mission}", "-p", "rate:=5.0",
            "-p", "controller_timeout:=600.0",
        ],
        stdout=log, stderr=subprocess.STDOUT,
    )
    rclpy.init()
    robots = Robots()
    watch = WatchedProcess(
        [sys.executable, "-m", "coverage_fleet.cli.main", "watch", "--mission", str(mission),
         "--plain", "--period", "0.5", "--stale-after", "1.5"],
        patience=PATIENCE,
    )
    yield robots, watch
    watch.cleanup()
    robots.node.destroy_node()
    rclpy.shutdown()
    base.terminate()
    base.wait(timeout=20)
    log.close()


def wait_for_block(robots: Robots, watch: WatchedProcess, condition, what: str) -> list[str]:
    found: list[list[str]] = []

    def seen() -> bool:
        robots.spin(0.2)
        block = latest_block(list(watch.lines))
        if block and condition(block):
            found.append(block)
            return True
        return False

    watch.wait_until(seen, what)
    return found[0]


def test_watch_shows_a_running_graph_and_a_robot_that_falls_silent(graph) -> None:
    robots, watch = graph
    block = wait_for_block(
        robots, watch,
        # The generation and each robot's target are latched topics of their own that may
        # reach the watch in any order: wait for the target too, then look at that block.
        lambda b: "generation 0" in b[0] and "cost -" not in b[0]
        and robot_line(b, "rover_a").startswith("robot rover_a live")
        and robot_line(b, "rover_b").startswith("robot rover_b live")
        and "target -" not in robot_line(b, "rover_a"),
        "both robots live, a cost, generation 0 and rover_a's target",
    )
    # What the watch shows reached the watch's process; this probe hears the generation and
    # the cost on its own subscriptions, which may lag on a loaded machine.
    watch.wait_until(
        lambda: robots.spin(0.2) or (robots.generation is not None and robots.cost is not None),
        "the generation and the cost at this probe",
    )
    assert robots.generation == 0
    assert "stop: off" in block[0]  # the gate's fleet stop, released
    # The cost shown is the one on the wire (5 significant digits): the robots stand still.
    shown = float(block[0].split(" cost ")[1].split()[0])
    assert robots.cost is not None and shown == pytest.approx(robots.cost, rel=1e-4)
    assert "at 1.00,1.00" in robot_line(block, "rover_a")
    assert "target " in robot_line(block, "rover_a") and "target -" not in robot_line(
        block, "rover_a"
    )

    # ghost_c appeared in the graph with a non-finite position: a row, never a position.
    block = wait_for_block(
        robots, watch, lambda b: "odd messages ignored" in b[0] and robot_line(b, "ghost_c"),
        "the ghost's row and its odd message",
    )
    assert "ghost_c/odom: not finite" in block[0]
    assert robot_line(block, "ghost_c").startswith("robot ghost_c STALE (never heard)")

    # rover_b's odometry stops: it turns stale, rover_a stays live.
    robots.silent.add("rover_b")
    block = wait_for_block(
        robots, watch, lambda b: robot_line(b, "rover_b").startswith("robot rover_b STALE"),
        "rover_b stale",
    )
    assert robot_line(block, "rover_a").startswith("robot rover_a live")
    # The partition leaves rover_b out; the gate's warning reaches the watch via /rosout.
    watch.wait_until(
        lambda: robots.spin(0.2) or any(
            line.startswith("log WARN") and "rover_b leaves the gate" in line
            for line in list(watch.lines)
        ),
        "the gate's warning about rover_b",
    )

    # The fleet stop, set through the gate's service, shows at once.
    client = robots.node.create_client(SetBool, topics.FLEET_STOP_SERVICE)
    assert client.wait_for_service(timeout_sec=PATIENCE)
    future = client.call_async(SetBool.Request(data=True))
    rclpy.spin_until_future_complete(robots.node, future, timeout_sec=PATIENCE)
    assert future.result() is not None and future.result().success
    wait_for_block(robots, watch, lambda b: "stop: STOPPED" in b[0], "the fleet stop shown")

    # Ctrl-C ends the watch cleanly.
    watch.process.send_signal(signal.SIGINT)
    assert watch.wait() == 0, watch.output[-3000:]
    assert "Traceback" not in watch.output
