"""The package's own launcher: starts the nodes of coverage_fleet.cli.graph as separate
processes where no ROS 2 install (and so no `ros2 launch`) exists, watches them and stops
them all on Ctrl-C, SIGTERM or SIGHUP.

The launcher owns its children: each node process is asked (PARENT_PID_VARIABLE, read by
coverage_fleet.ros.runtime) to receive SIGTERM from Linux when the launcher dies, even by
SIGKILL; while stopping, a further Ctrl-C (or SIGTERM/SIGHUP) does not abandon the nodes but
cuts the grace periods short and kills what is still running (see `StopSignals`).

Network safety first: unless the user set them, ROS_AUTOMATIC_DISCOVERY_RANGE is LOCALHOST
(discovery stays on this machine) and ROS_DOMAIN_ID is one of our own choosing, so a test
run never talks to robots on the network by accident.
"""

from __future__ import annotations

import contextlib
import os
import random
import signal
import subprocess
import sys
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import TextIO

from coverage_fleet.interrupts import RUN_STOP_SIGNALS as STOP_SIGNALS
from coverage_fleet.ros.launcher_contract import PARENT_PID_VARIABLE

from .graph import NodeSpec, ros_arguments

SAFETY_CAUTION = (
    "Safety: robots can hurt people and damage property. Run trials only under supervision, "
    "with a tested emergency stop within the operator's reach, a geofence enforced on each "
    "robot independently of this software, and within local aviation, maritime and road "
    "rules; defer to local regulations and qualified operators."
)

#: Seconds a node gets to shut down after SIGINT, then after SIGTERM, before SIGKILL.
STOP_GRACE = 10.0


def ros_environment(environ: Mapping[str, str]) -> tuple[dict[str, str], list[str]]:
    """The environment for the graph and a note per variable the launcher chose."""
    env = dict(environ)
    notes = []
    if not env.get("ROS_AUTOMATIC_DISCOVERY_RANGE"):
        env["ROS_AUTOMATIC_DISCOVERY_RANGE"] = "LOCALHOST"
        notes.append("ROS_AUTOMATIC_DISCOVERY_RANGE=LOCALHOST (discovery stays on this machine)")
    if not env.get("ROS_DOMAIN_ID"):
        env["ROS_DOMAIN_ID"] = str(random.SystemRandom().randint(5, 95))
        notes.append(f"ROS_DOMAIN_ID={env['ROS_DOMAIN_ID']} (chosen for this run)")
    # A node that crashes (in the middleware, a solver, or while importing them) prints its
    # Python stack into its log from the interpreter's first instruction on: once in CI a
    # recorder ended by SIGSEGV during start-up with an empty log. runtime.run_nodes
    # enables the same for nodes started any other way, from its own start.
    env.setdefault("PYTHONFAULTHANDLER", "1")
    return env, notes


def command_line(spec: NodeSpec, python: str = sys.executable) -> list[str]:
    """`python -m <module> --ros-args ...`: works from a source checkout or a venv, with or
    without the console scripts on PATH."""
    return [python, "-m", spec.module, *ros_arguments(spec)]


@dataclass
class RunningNode:
    spec: NodeSpec
    process: subprocess.Popen
    log_path: Path
    reported: bool = False

    @property
    def returncode(self) -> int | None:
        return self.process.poll()


class RunInterrupted(KeyboardInterrupt):
    """A stop signal arrived while the graph was running."""

    def __init__(self, number: int) -> None:
        super().__init__(signal.Signals(number).name)
        self.signal_name = signal.Signals(number).name


class StopSignals:
    """While running: SIGINT, SIGTERM and SIGHUP raise RunInterrupted (a clean stop). Once
    stopping has begun (`stopping()`), they only set `hurry`: the stop goes on, with the
    grace periods cut short, and the trial is still written."""

    def __init__(self) -> None:
        self.hurry = False
        self._previous = {number: signal.getsignal(number) for number in STOP_SIGNALS}

    def __enter__(self) -> StopSignals:
        for number in STOP_SIGNALS:
            signal.signal(number, self._interrupt)
        return self

    def _interrupt(self, number: int, _frame) -> None:
        raise RunInterrupted(number)

    def _hurry(self, number: int, _frame) -> None:
        self.hurry = True
        print(
            f"launch: {signal.Signals(number).name} again: killing the nodes still running",
            file=sys.stderr, flush=True,
        )

    def stopping(self) -> None:
        for number in STOP_SIGNALS:
            signal.signal(number, self._hurry)

    def __exit__(self, *exc) -> None:
        for number, handler in self._previous.items():
            signal.signal(number, handler)


class GraphProcesses:
    """Starts, watches and stops the processes of one graph."""

    def __init__(self, log_dir: Path, env: Mapping[str, str]) -> None:
        self.log_dir = Path(log_dir)
        self.env = {**env, PARENT_PID_VARIABLE: str(os.getpid())}
        self.nodes: list[RunningNode] = []

    def start(self, specs: list[NodeSpec]) -> None:
        self.log_dir.mkdir(parents=True, exist_ok=True)
        for spec in specs:
            log_path = self.log_dir / f"{spec.label.replace('/', '_').replace(' ', '_')}.log"
            handle = log_path.open("w")
            process = subprocess.Popen(
                command_line(spec),
                stdout=handle,
                stderr=subprocess.STDOUT,
                env=self.env,
                # Own process group: Ctrl-C reaches the launcher only, which then stops
                # the nodes in order (and waits for them).
                start_new_session=True,
            )
            handle.close()
            self.nodes.append(RunningNode(spec, process, log_path))

    def exited(self) -> list[RunningNode]:
        """Nodes that have exited and were not reported yet (each is reported once)."""
        found = []
        for node in self.nodes:
            if not node.reported and node.returncode is not None:
                node.reported = True
                found.append(node)
        return found

    def stop(self, hurry: Callable[[], bool] = lambda: False) -> None:
        """SIGINT to every node still running, then SIGTERM, then SIGKILL, each after a
        grace period that ends early when `hurry()` turns true (a second Ctrl-C). Processes
        that stop last (the recorder) are stopped once the others are gone."""
        first = [n for n in self.nodes if not n.spec.stops_last]
        last = [n for n in self.nodes if n.spec.stops_last]
        for group in (first, last):
            self._stop_group(group, hurry)

    def _stop_group(self, nodes: list[RunningNode], hurry: Callable[[], bool]) -> None:
        for sig in (signal.SIGINT, signal.SIGTERM, signal.SIGKILL):
            alive = [n for n in nodes if n.returncode is None]
            if not alive:
                return
            for node in alive:
                with contextlib.suppress(ProcessLookupError):
                    os.killpg(node.process.pid, sig)
            deadline = time.monotonic() + STOP_GRACE
            while (
                time.monotonic() < deadline
                and any(n.returncode is None for n in alive)
                and (sig == signal.SIGKILL or not hurry())
            ):
                time.sleep(0.05)

    def describe(self, out: TextIO) -> None:
        for node in self.nodes:
            out.write(f"  {node.spec.label:<28} pid {node.process.pid:<7} log {node.log_path}\n")
