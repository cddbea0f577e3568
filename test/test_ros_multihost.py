"""Multi-host rehearsal: the base station and each robot's controller in their own Linux
network namespace, as on separate machines, joined by veth links to a bridge in the base
station's namespace (a private 10.213.19.0/24 network that reaches no real interface).

Inside the namespaces discovery runs over the private subnet (ROS_AUTOMATIC_DISCOVERY_RANGE
=SUBNET, multicast on the bridge) and Fast DDS uses UDPv4 only
(FASTDDS_BUILTIN_TRANSPORTS=UDPv4), so every message crosses the private links: its
shared-memory transport could otherwise connect processes of one host past a cut link. The
test checks that the cut robot's messages really stop arriving.

The invented quick-check mission (three rovers in a solar yard) runs with the headless
simulator in realtime mode next to the base station. An observer in the base station's
namespace prints what arrives there. Judged by message order, never by time:
- all links up: every rover is live and gets targets, the generation rises;
- rover_b's link down (`ip link set ... down`): the partition leaves rover_b out, its
  progress reports stop arriving (none while the others send many), and the others go on
  (new generations and targets);
- the link up again: rover_b is live again and gets a new target.
Skipped where network namespaces cannot be made (not root, no `ip`, no netns support).
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from collections.abc import Callable
from pathlib import Path

import pytest
from support_processes import WatchedProcess

pytest.importorskip("rclpy", reason="ROS 2 wheels not installed (scripts/setup_env.sh)")

from coverage_fleet.cli.graph import fleet_nodes
from coverage_fleet.cli.launcher import command_line

REPO = Path(__file__).resolve().parents[1]
MISSION = REPO / "config" / "missions" / "solar_row_quick_check.yaml"
OBSERVER = Path(__file__).resolve().parent / "multihost_observer.py"
ROBOTS = ("rover_a", "rover_b", "rover_c")
CUT = "rover_b"
#: Patience for each wait (solver set-up on a loaded machine included); a hang fails.
PATIENCE = 150.0
#: Progress reports each other robot sends while the cut robot's must stay silent.
REPORTS_WHILE_CUT = 20
SUBNET = "10.213.19"
TAG = f"cfmh{os.getpid() % 100000}"


def ip(*args: str) -> None:
    subprocess.run(["ip", *args], check=True, capture_output=True, text=True, timeout=60)


class PrivateNetwork:
    """A hub namespace (the base station's) with a bridge and one namespace per robot, each
    joined to the bridge by a veth link. Everything is removed by close()."""

    def __init__(self, robots: tuple[str, ...]) -> None:
        self.hub = f"{TAG}hub"
        self.bridge = f"{TAG}br"
        self.robot_ns = {r: f"{TAG}r{k}" for k, r in enumerate(robots)}
        #: The hub's end of each robot's link (the end the test cuts).
        self.hub_end = {r: f"{TAG}v{k}" for k, r in enumerate(robots)}
        self.made: list[str] = []

    def open(self) -> None:
        for ns in (self.hub, *self.robot_ns.values()):
            ip("netns", "add", ns)
            self.made.append(ns)
            ip("-n", ns, "link", "set", "lo", "up")
        ip("-n", self.hub, "link", "add", "name", self.bridge, "type", "bridge",
           "mcast_snooping", "0")
        ip("-n", self.hub, "addr", "add", f"{SUBNET}.1/24", "dev", self.bridge)
        ip("-n", self.hub, "link", "set", self.bridge, "up")
        self.multicast_route(self.hub, self.bridge)
        for k, (robot, ns) in enumerate(self.robot_ns.items()):
            end = self.hub_end[robot]
            ip("link", "add", end, "netns", self.hub, "type", "veth",
               "peer", "name", "eth0", "netns", ns)
            ip("-n", self.hub, "link", "set", end, "master", self.bridge)
            ip("-n", self.hub, "link", "set", end, "up")
            ip("-n", ns, "addr", "add", f"{SUBNET}.{11 + k}/24", "dev", "eth0")
            ip("-n", ns, "link", "set", "eth0", "up")
            self.multicast_route(ns, "eth0")

    @staticmethod
    def multicast_route(ns: str, device: str) -> None:
        # DDS discovery multicast goes out on the private link (there is no default route).
        ip("-n", ns, "route", "add", "224.0.0.0/4", "dev", device)

    def set_link(self, robot: str, up: bool) -> None:
        ip("-n", self.hub, "link", "set", self.hub_end[robot], "up" if up else "down")

    def close(self) -> None:
        # Deleting a namespace deletes its veth ends and the bridge with it.
        for ns in reversed(self.made):
            subprocess.run(["ip", "netns", "delete", ns], capture_output=True, timeout=60,
                           check=False)
        self.made.clear()


def namespaces_unavailable() -> str | None:
    if not sys.platform.startswith("linux"):
        return "network namespaces are Linux only"
    if os.geteuid() != 0:
        return "making network namespaces needs root"
    if shutil.which("ip") is None:
        return "the `ip` command (iproute2) is not installed"
    probe = f"{TAG}probe"
    made = subprocess.run(["ip", "netns", "add", probe], capture_output=True, text=True,
                          timeout=60, check=False)
    if made.returncode != 0:
        return f"cannot make a network namespace: {made.stderr.strip()}"
    subprocess.run(["ip", "netns", "delete", probe], capture_output=True, timeout=60,
                   check=False)
    return None


@pytest.fixture
def network():
    reason = namespaces_unavailable()
    if reason:
        pytest.skip(reason)
    net = PrivateNetwork(ROBOTS)
    try:
        net.open()
        yield net
    finally:
        net.close()


def namespace_env() -> dict[str, str]:
    """Discovery over the private subnet, UDP only (no shared memory across the 'hosts')."""
    env = dict(os.environ)
    env["ROS_AUTOMATIC_DISCOVERY_RANGE"] = "SUBNET"
    env["FASTDDS_BUILTIN_TRANSPORTS"] = "UDPv4"
    env.pop("ROS_STATIC_PEERS", None)
    env.pop("FASTRTPS_DEFAULT_PROFILES_FILE", None)
    env.pop("FASTDDS_DEFAULT_PROFILES_FILE", None)
    env["PYTHONUNBUFFERED"] = "1"
    return env


class Observation:
    """The observer's lines, read in order."""

    def __init__(self, process: WatchedProcess) -> None:
        self.process = process

    def lines(self, since: int = 0) -> list[str]:
        return self.process.lines[since:]

    def mark(self) -> int:
        return len(self.process.lines)

    def count(self, line: str, since: int = 0) -> int:
        return sum(1 for x in self.lines(since) if x == line)

    def live_sets(self, since: int = 0) -> list[set[str]]:
        return [set(x.split()[1:]) for x in self.lines(since) if x.startswith("live ")]

    def generations(self, since: int = 0) -> list[int]:
        return [int(x.split()[1]) for x in self.lines(since) if x.startswith("generation ")]

    def first(self, predicate: Callable[[str], bool], since: int = 0) -> int | None:
        for k, x in enumerate(self.lines(since), start=since):
            if predicate(x):
                return k
        return None


def wait_for(condition: Callable[[], bool], what: str, processes: list[WatchedProcess],
             observer: WatchedProcess) -> None:
    """Wait (bounded by PATIENCE) until condition holds; any node ending early fails the
    test with every node's output tail."""

    def report() -> str:
        return "\n".join(
            f"--- {' '.join(p.process.args[4:7])}\n" + "\n".join(p.lines[-12:])
            for p in processes
        ) + "\n--- observer\n" + "\n".join(observer.lines[-20:])

    def done() -> bool:
        if condition():
            return True
        if any(p.process.poll() is not None for p in processes):
            pytest.fail(f"a node ended while waiting for {what}:\n{report()}")
        return False

    observer.wait_until(done, what)
    if observer.process.poll() is not None:
        pytest.fail(f"the observer ended while waiting for {what}:\n{report()}")


def start(ns: str, command: list[str]) -> WatchedProcess:
    return WatchedProcess(["ip", "netns", "exec", ns, *command], PATIENCE, env=namespace_env())


def stop(process: WatchedProcess) -> None:
    if process.process.poll() is None:
        process.process.send_signal(2)
        try:
            process.process.wait(timeout=30)
        except subprocess.TimeoutExpired:
            process.process.kill()
            process.process.wait()


def test_cut_link_leaves_the_others_working_and_the_robot_rejoins(network: PrivateNetwork):
    specs = fleet_nodes(MISSION, "realtime", duration=3600.0, stop_when_settled=False)
    nodes: list[WatchedProcess] = []
    observer = None
    try:
        for spec in specs:
            robot = spec.namespace.strip("/")
            ns = network.robot_ns[robot] if robot else network.hub
            nodes.append(start(ns, command_line(spec)))
        observer = start(network.hub, [sys.executable, str(OBSERVER), str(MISSION)])
        seen = Observation(observer)

        def wait(condition: Callable[[], bool], what: str) -> None:
            wait_for(condition, what, nodes, observer)

        # All links up: the whole fleet is live, gets targets, and commits generations.
        wait(lambda: set(ROBOTS) in seen.live_sets()
             and all(seen.count(f"target {r}") for r in ROBOTS)
             and len(set(seen.generations())) >= 2,
             "every rover live with targets and a rising generation")

        # Cut rover_b's link: it is left out; its reports stop; the others carry on.
        before_cut = max(seen.generations())
        cut_at = seen.mark()
        network.set_link(CUT, up=False)
        others = set(ROBOTS) - {CUT}
        wait(lambda: others in seen.live_sets(cut_at), f"{CUT} left out after the cut")
        left_out = seen.first(lambda x: x.startswith("live ") and set(x.split()[1:]) == others,
                              cut_at)
        wait(lambda: all(seen.count(f"progress {r}", left_out) >= REPORTS_WHILE_CUT
                         and seen.count(f"target {r}", left_out) >= 1 for r in others)
             and max(seen.generations(left_out), default=-1) > before_cut,
             "the other rovers reporting, with new targets and a new generation")
        quiet_until = seen.mark()
        assert seen.count(f"progress {CUT}", left_out) == 0, (
            f"{CUT}'s reports still arrived with its link down "
            "(is the shared-memory transport off?)")
        assert all(live == others for live in seen.live_sets(left_out))

        # Link up again: rover_b reports again, is live again, and gets a new target.
        network.set_link(CUT, up=True)
        wait(lambda: set(ROBOTS) in seen.live_sets(quiet_until),
             f"{CUT} live again after the link came back")
        rejoined = seen.first(
            lambda x: x.startswith("live ") and set(x.split()[1:]) == set(ROBOTS), quiet_until)
        wait(lambda: seen.count(f"target {CUT}", rejoined) >= 1,
             f"a new target for {CUT} after it rejoined")
        assert seen.count(f"progress {CUT}", quiet_until) > 0
    finally:
        for process in ([observer] if observer else []) + nodes:
            stop(process)
