"""The base station (partition node + reference gate) as a real process over DDS on
loopback. The test plays the robots: it publishes their odometry and progress reports.

Checks the gate's rule as stated in the architecture (monotone-progress condition; Cortes,
Martinez, Karatas & Bullo, IEEE T-RA 20(2), 2004, for why the cost then falls): after the
robots have moved onto their targets, a report that names an older generation never opens
the gate, while the same report naming the current generation does (the positive control
that makes the check able to fail), and the cost at the openings falls."""

from __future__ import annotations

import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

rclpy = pytest.importorskip("rclpy", reason="ROS 2 wheels not installed (scripts/setup_env.sh)")

from diagnostic_msgs.msg import DiagnosticArray  # noqa: E402
from geometry_msgs.msg import PointStamped, Vector3Stamped  # noqa: E402
from nav_msgs.msg import Odometry  # noqa: E402
from std_msgs.msg import Float64MultiArray  # noqa: E402

from coverage_fleet.ros import conversions as cv  # noqa: E402
from coverage_fleet.ros import qos, topics  # noqa: E402
from coverage_fleet.vehicles.base import OdometryValues  # noqa: E402

MISSION = """\
name: gate_check_yard   # invented test scenario
region: {vertices: [[0, 0], [10, 0], [10, 10], [0, 10]]}
density: {kind: uniform}
roster:
  - {name: rover_a, vehicle: differential_drive, initial_pose: [1.0, 1.0, 0.0]}
  - {name: rover_b, vehicle: differential_drive, initial_pose: [3.0, 1.5, 0.0]}
"""
START = {"rover_a": (1.0, 1.0), "rover_b": (3.0, 1.5)}
WAIT = 60.0


class FakeFleet:
    """The robots' side of the wire, published from this process."""

    def __init__(self) -> None:
        self.node = rclpy.create_node("gate_test_fleet")
        self.positions = dict(START)
        self.odom = {
            n: self.node.create_publisher(Odometry, topics.robot_topic(n, topics.ODOM), qos.STATE)
            for n in START
        }
        self.progress = {
            n: self.node.create_publisher(
                Vector3Stamped, topics.robot_topic(n, topics.PROGRESS), qos.REPORTS
            )
            for n in START
        }
        self.targets: dict[str, int] = {}
        self.target_xy: dict[str, tuple[float, float]] = {}
        self.openings: list[cv.OpeningValues] = []
        self.candidates = 0
        #: the gate's newest /diagnostics values
        self.gate_health: dict[str, str] = {}
        self.node.create_subscription(
            DiagnosticArray, topics.DIAGNOSTICS, self._on_diagnostics, qos.DISPLAY
        )
        for name in START:
            self.node.create_subscription(
                PointStamped, topics.robot_topic(name, topics.TARGET),
                lambda msg, n=name: self._on_target(n, msg), qos.LATCHED,
            )
        self.node.create_subscription(
            Float64MultiArray, topics.OPENINGS,
            lambda msg: self.openings.append(cv.opening_from_msg(msg)), qos.OPENINGS,
        )
        self.node.create_subscription(
            Float64MultiArray, topics.CANDIDATES, self._on_candidates, qos.REPORTS
        )
        self.node.create_timer(0.1, self.publish_states)

    def _on_target(self, name: str, msg: PointStamped) -> None:
        xy, stamp = cv.target_from_msg(msg)
        self.targets[name] = stamp
        self.target_xy[name] = (float(xy[0]), float(xy[1]))

    def _on_diagnostics(self, msg: DiagnosticArray) -> None:
        for status in msg.status:
            if status.name == "coverage_fleet/reference_gate":
                self.gate_health = {kv.key: kv.value for kv in status.values}

    def move_onto_targets(self) -> None:
        self.positions = dict(self.target_xy)

    def _on_candidates(self, _msg) -> None:
        self.candidates += 1

    def publish_states(self) -> None:
        stamp = self.node.get_clock().now().to_msg()
        for name, (x, y) in self.positions.items():
            odom = cv.odometry_to_msg(OdometryValues(x, y, 0.0), stamp, f"{name}/base_link")
            self.odom[name].publish(odom)

    def report(self, generation_stamp_ns: int, distance_now: float) -> None:
        now = self.node.get_clock().now().nanoseconds * 1e-9
        for name in START:
            values = cv.ProgressValues(generation_stamp_ns, 5.0, distance_now, now)
            self.progress[name].publish(cv.progress_to_msg(values))

    def spin_until(self, condition, what: str, keep_reporting=None) -> None:
        deadline = time.monotonic() + WAIT
        while not condition():
            assert time.monotonic() < deadline, f"timed out waiting for {what}"
            if keep_reporting:
                keep_reporting()
            rclpy.spin_once(self.node, timeout_sec=0.05)


@pytest.fixture()
def base_station(tmp_path: Path):
    mission = tmp_path / "mission.yaml"
    mission.write_text(MISSION)
    log = (tmp_path / "base_station.log").open("w")
    process = subprocess.Popen(
        [
            sys.executable, "-m", "coverage_fleet.ros.base_station", "--ros-args",
            "-p", f"mission_file:={mission}", "-p", "rate:=5.0",
            "-p", "controller_timeout:=600.0",
        ],
        stdout=log, stderr=subprocess.STDOUT,
    )
    rclpy.init()
    fleet = FakeFleet()
    yield fleet
    fleet.node.destroy_node()
    rclpy.shutdown()
    process.terminate()
    process.wait(timeout=20)
    log.close()
    assert process.returncode == 0, (tmp_path / "base_station.log").read_text()[-3000:]


def test_a_stale_progress_report_never_opens_the_gate(base_station: FakeFleet) -> None:
    fleet = base_station
    # Before any target the robots report "no generation" (zero stamp) to show they live.
    fleet.spin_until(
        lambda: len(fleet.targets) == 2 and fleet.openings,
        "generation 0", keep_reporting=lambda: fleet.report(0, 0.0),
    )
    assert fleet.openings[0].generation == 0 and fleet.openings[0].reason == "start"
    first = fleet.targets["rover_a"]
    assert all(d > 0.5 for d in fleet.openings[0].distances.values())

    # Both robots drive onto their targets and report on generation 0: the gate opens.
    fleet.move_onto_targets()
    fleet.report(first, 0.0)
    fleet.spin_until(lambda: len(fleet.openings) >= 2, "generation 1")
    assert fleet.openings[1].generation == 1 and fleet.openings[1].reason == "progress"
    fleet.spin_until(lambda: fleet.targets["rover_a"] != first, "the generation-1 targets")
    second = fleet.targets["rover_a"]
    assert fleet.targets["rover_b"] == second
    assert all(d > 0.1 for d in fleet.openings[1].distances.values())

    # They drive onto the new targets, but their reports name generation 0 (stale):
    # several partition rounds go by and the gate stays shut.
    fleet.move_onto_targets()
    fleet.report(first, 0.0)
    seen = fleet.candidates
    fleet.spin_until(lambda: fleet.candidates >= seen + 5, "five more partition rounds")
    assert [o.generation for o in fleet.openings] == [0, 1]

    # The same robots at the same places, reports naming generation 1: the gate opens.
    fleet.report(second, 0.0)
    fleet.spin_until(lambda: len(fleet.openings) >= 3, "generation 2")
    assert [o.generation for o in fleet.openings] == [0, 1, 2]
    costs = [o.cost for o in fleet.openings]
    assert costs[0] > costs[1] > costs[2] and np.isfinite(costs[2])

    # People read the generation on /diagnostics as a plain number, with the commit time
    # in seconds (the wire names generations by nanosecond stamps).
    fleet.spin_until(
        lambda: fleet.gate_health.get("generation") == "2", "generation 2 on /diagnostics"
    )
    assert float(fleet.gate_health["committed_at"]) == pytest.approx(
        fleet.openings[2].time, abs=1e-3
    )
    assert fleet.gate_health["robots"] == "rover_a,rover_b"
