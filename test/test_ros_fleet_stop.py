"""The fleet-wide software stop, through real nodes over DDS on loopback.

The launcher runs the invented quick-check mission (three rovers in a solar yard) in
lockstep. A probe node listens to every robot's cmd_vel and to the committed generation,
stops the fleet through the stop service while the rovers move, then releases it with
`coverage-fleet resume`. Judged by message order, never by time:
- the braking input (a differential-drive rover's is zero speed and zero yaw rate: its
  kinematic model is at rest when commanded zero, common practice) comes right after the
  stop: at most the commands already on their way when the stop arrived precede it (one
  being computed, one waiting in the keep-last-1 queue of the probe);
- every command after it is braking until the release, and no generation is committed;
- after the release the rovers move again and the generation rises again.
A stop request with nobody to answer it says so (exit 1) and points to the robots' own
emergency stops; a domain is never guessed.
"""

from __future__ import annotations

import os
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from support_processes import WatchedProcess
from test_cli_launch_ownership import QUICK_MISSION, Launcher, started_and_committing

rclpy = pytest.importorskip("rclpy", reason="ROS 2 wheels not installed (scripts/setup_env.sh)")

from geometry_msgs.msg import Twist  # noqa: E402
from std_msgs.msg import UInt32  # noqa: E402
from std_srvs.srv import SetBool  # noqa: E402

from coverage_fleet.ros import qos, topics  # noqa: E402
from coverage_fleet.ros.fleet_stop import STOP_CAUTION  # noqa: E402

ROBOTS = ("rover_a", "rover_b", "rover_c")
PATIENCE = 180.0
#: Commands already on their way when the stop arrives (see the module docstring).
IN_FLIGHT = 2
HELD = 15


def braking(command: np.ndarray) -> bool:
    return bool(np.all(command == 0.0))


class Probe:
    def __init__(self) -> None:
        self.node = rclpy.create_node("fleet_stop_probe")
        self.commands: dict[str, list[np.ndarray]] = {r: [] for r in ROBOTS}
        self.generations: list[int] = []
        for robot in ROBOTS:
            self.node.create_subscription(
                Twist, topics.robot_topic(robot, topics.CMD_VEL),
                lambda msg, r=robot: self.commands[r].append(
                    np.array([msg.linear.x, msg.linear.y, msg.angular.z])),
                qos.COMMAND,
            )
        self.node.create_subscription(
            UInt32, topics.GENERATION, lambda msg: self.generations.append(msg.data),
            qos.LATCHED,
        )
        self.client = self.node.create_client(SetBool, topics.FLEET_STOP_SERVICE)

    def spin_until(self, condition, what: str, launcher: Launcher) -> None:
        deadline = time.monotonic() + PATIENCE
        while not condition():
            if launcher.process.poll() is not None or time.monotonic() > deadline:
                launcher.cleanup()
                pytest.fail(f"never saw {what}:\n{launcher.output[-3000:]}")
            rclpy.spin_once(self.node, timeout_sec=0.05)

    def counts(self) -> dict[str, int]:
        return {r: len(c) for r, c in self.commands.items()}


def test_stop_brakes_every_robot_until_release(tmp_path: Path) -> None:
    out = tmp_path / "trial"
    launcher = Launcher(str(QUICK_MISSION), "--headless-sim", "--out", str(out),
                        "--duration", "600")
    rclpy.init()
    probe = Probe()
    try:
        started_and_committing(launcher, out)
        probe.spin_until(
            lambda: probe.generations and all(
                any(not braking(c) for c in probe.commands[r][-3:]) for r in ROBOTS),
            "every rover moving", launcher)
        probe.spin_until(lambda: probe.client.service_is_ready(), "the stop service", launcher)
        before = probe.counts()
        future = probe.client.call_async(SetBool.Request(data=True))
        probe.spin_until(future.done, "the stop answered", launcher)
        assert future.result().success and STOP_CAUTION in future.result().message
        probe.spin_until(
            lambda: all(
                sum(braking(c) for c in probe.commands[r][before[r]:]) >= IN_FLIGHT + 1
                for r in ROBOTS),
            "braking commands from every rover", launcher)
        stopped_generation = probe.generations[-1]
        seen = len(probe.generations)
        held_from = probe.counts()
        probe.spin_until(
            lambda: all(len(probe.commands[r]) >= held_from[r] + HELD for r in ROBOTS),
            f"{HELD} more commands from every rover", launcher)
        released_at = probe.counts()
        for robot in ROBOTS:
            after = probe.commands[robot][before[robot]:released_at[robot]]
            first = next(i for i, c in enumerate(after) if braking(c))
            assert first <= IN_FLIGHT, (robot, after[:first + 1])
            assert all(braking(c) for c in after[first:]), (robot, after[first:])
        # Nothing committed while stopped (the gate takes the stop before it answers).
        assert all(g == stopped_generation for g in probe.generations[seen:])

        resume = subprocess.run(
            [sys.executable, "-m", "coverage_fleet.cli.main", "resume", "--wait", "60"],
            capture_output=True, text=True, timeout=PATIENCE, check=False,
        )
        assert resume.returncode == 0, resume.stderr
        assert "fleet released" in resume.stdout and STOP_CAUTION in resume.stdout
        probe.spin_until(
            lambda: all(any(not braking(c) for c in probe.commands[r][released_at[r]:])
                        for r in ROBOTS),
            "every rover moving again", launcher)
        probe.spin_until(lambda: probe.generations[-1] > stopped_generation,
                         "a generation after the release", launcher)
    finally:
        probe.node.destroy_node()
        rclpy.shutdown()
        if launcher.process.poll() is None:
            launcher.process.send_signal(2)
        launcher.wait()


def test_a_stop_nobody_answers_says_so_and_points_to_the_emergency_stops() -> None:
    # A domain nobody else in this test run uses (conftest picks 5..95).
    done = WatchedProcess(
        [sys.executable, "-m", "coverage_fleet.cli.main", "stop", "--domain-id", "201",
         "--wait", "1"], PATIENCE)
    assert done.wait() == 1
    assert "no fleet stop service answered in domain 201" in done.output
    assert "use the robots' own emergency stops now" in done.output
    assert STOP_CAUTION in done.output


def test_the_domain_is_never_guessed() -> None:
    env = {k: v for k, v in os.environ.items() if k != "ROS_DOMAIN_ID"}
    done = subprocess.run(
        [sys.executable, "-m", "coverage_fleet.cli.main", "stop"],
        capture_output=True, text=True, env=env, timeout=PATIENCE, check=False,
    )
    assert done.returncode == 2 and "Traceback" not in done.stderr
    assert "command line: --domain-id: is required" in done.stderr


#: An invented fleet namespace (one ROS name segment, the robot-name rule).
NAMESPACE = "yard_b"


def _fleet_command(*arguments: str) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "coverage_fleet.cli.main", *arguments],
        capture_output=True, text=True, timeout=PATIENCE, check=False,
    )


def _last_input(robot_csv: Path) -> list[float]:
    """The inputs (differential drive: forward_speed, yaw_rate) of the last recorded row
    that has one (the state the run ended on may have had no command yet)."""
    import csv

    with robot_csv.open() as handle:
        rows = [[float(row[name] or "nan") for name in ("forward_speed", "yaw_rate")]
                for row in csv.DictReader(handle)]
    answered = [row for row in rows if np.all(np.isfinite(row))]
    assert answered, f"{robot_csv} has no row with an input"
    return answered[-1]


def test_a_fleet_under_a_namespace_runs_records_and_is_stopped_by_its_name(
    tmp_path: Path,
) -> None:
    """`launch --fleet-namespace` puts every node and robot topic under /yard_b (relative
    names, ROS 2 design article "Topic and Service name mapping to DDS"); the recorder
    hears them there; `stop` without the namespace finds no stop service (exit 1, as for an
    empty domain above), `stop --fleet-namespace yard_b` stops that fleet: every robot's
    last recorded input is the braking input."""
    out = tmp_path / "trial"
    # The quick-check mission made unable to end on its own (settle dwell and stuck timeout
    # longer than the run), so the fleet is still there whenever the stops arrive.
    text = QUICK_MISSION.read_text()
    endless = text.replace("dwell: 2.0", "dwell: 3600.0").replace(
        "stuck_timeout: 10.0", "stuck_timeout: 3600.0")
    assert endless.count("3600.0") == 2, "the quick-check mission's settle section changed"
    mission = tmp_path / "endless_quick_check.yaml"  # vehicles by name: config/vehicles
    mission.write_text(endless)
    launcher = Launcher(str(mission), "--headless-sim", "--out", str(out),
                        "--duration", "600", "--fleet-namespace", NAMESPACE)
    rclpy.init()
    node = rclpy.create_node("namespace_probe")
    try:
        started_and_committing(launcher, out)
        wanted = {f"/{NAMESPACE}/{r}/{topics.ODOM}" for r in ROBOTS} | {
            f"/{NAMESPACE}/{topics.FLEET_STOP}"}

        def names() -> set[str]:
            return {name for name, _ in node.get_topic_names_and_types()}

        launcher.wait_until(lambda: wanted <= names(), "the fleet's topics under /yard_b")
        outside = {n for n in names() if n.startswith(("/coverage/", "/rover_"))}
        assert outside == set(), outside

        unnamed = _fleet_command("stop", "--wait", "2")
        assert unnamed.returncode == 1, unnamed.stdout + unnamed.stderr
        assert "without a fleet namespace" in unnamed.stderr

        named = _fleet_command("stop", "--fleet-namespace", NAMESPACE, "--wait", "60")
        assert named.returncode == 0, named.stdout + named.stderr
        assert "fleet stopped" in named.stdout
        assert f"resume --domain-id {os.environ['ROS_DOMAIN_ID']} --fleet-namespace " \
            f"{NAMESPACE}" in named.stdout

        # Ctrl-C ends the run; the launcher still writes the trial (exit 130).
        launcher.process.send_signal(2)
        assert launcher.wait() == 130, launcher.output[-3000:]
        assert f"watch --domain-id {os.environ['ROS_DOMAIN_ID']} --fleet-namespace " \
            f"{NAMESPACE}" in launcher.output
        for robot in ROBOTS:
            assert braking(np.array(_last_input(out / "robots" / f"{robot}.csv"))), robot
    finally:
        node.destroy_node()
        rclpy.shutdown()
        if launcher.process.poll() is None:
            launcher.process.send_signal(2)
        launcher.wait()


@pytest.mark.parametrize("command", [
    ["stop", "--domain-id", "201"], ["resume", "--domain-id", "201"],
    ["watch", "--domain-id", "201"], ["arm", str(QUICK_MISSION), "--domain-id", "201"],
    ["launch", str(QUICK_MISSION), "--headless-sim", "--no-record"]])
def test_a_namespace_that_is_not_a_ros_name_is_refused(command: list[str]) -> None:
    done = _fleet_command(*command, "--fleet-namespace", "2nd/fleet")
    assert done.returncode == 2, done.stdout + done.stderr
    assert "Traceback" not in done.stderr
    assert ("command line: --fleet-namespace: '2nd/fleet' is not a valid ROS name: it starts "
            "with a digit") in done.stderr
