"""`coverage-fleet watch`: join a running graph and show the fleet live in the terminal.

Per robot: live or stale, position, target, distance at commit and now, the progress rule's
verdict, the newest solve (time and status), the fallback in use and the controller's
diagnostic level; for the fleet: generation, cost and its trend, time since the last gate
opening, settle status, the stop state (when the graph has a stop topic), other nodes'
health and their recent warnings. In a terminal the view redraws in place (rich); when the
output is not a terminal (a pipe, a log, CI) it prints plain status lines instead.

It joins the graph the way the launcher starts it: the same ROS_DOMAIN_ID (from
--domain-id or the environment; the launcher prints the one it chose) and discovery kept
on this machine unless ROS_AUTOMATIC_DISCOVERY_RANGE says otherwise. It only listens.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path
from typing import TextIO

from coverage_fleet.errors import ConfigError
from coverage_fleet.inputs.fields import Collector, number_fault

from .fleet_command import add_namespace_option
from .live_render import plain_lines, render
from .live_state import FleetWatch

#: Seconds between redraws in a terminal, and between plain status blocks otherwise.
TERMINAL_PERIOD = 0.25
PLAIN_PERIOD = 2.0


def register(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser(
        "watch",
        help="show a running graph live: robots, targets, solver health, cost, generation",
        description=__doc__.split("\n\n")[1],
    )
    parser.add_argument(
        "--mission", type=Path,
        help="mission file: its robots are shown from the start (default: robots appear as "
        "they are found in the graph)",
    )
    parser.add_argument(
        "--domain-id", type=int,
        help="ROS_DOMAIN_ID of the graph (default: the environment's)",
    )
    add_namespace_option(parser)
    parser.add_argument(
        "--plain", action="store_true",
        help="print plain status lines even in a terminal",
    )
    parser.add_argument(
        "--period", type=float,
        help=f"seconds between redraws (default {TERMINAL_PERIOD:g} in a terminal, "
        f"{PLAIN_PERIOD:g} for plain lines)",
    )
    parser.add_argument(
        "--stale-after", type=float, default=2.0,
        help="seconds without odometry after which a robot is shown stale (default 2)",
    )
    parser.add_argument(
        "--duration", type=float, default=0.0,
        help="stop after this many seconds (default: until Ctrl-C)",
    )
    parser.set_defaults(handler=run)


def is_terminal(stream: TextIO) -> bool:
    return bool(getattr(stream, "isatty", lambda: False)())


class WatchDisplay:
    """Shows snapshots: redrawn in place in a terminal (rich Live), else plain lines at most
    every `period` seconds. Anything printed meanwhile appears above the live view."""

    def __init__(
        self, stream: TextIO, plain: bool, period: float | None = None, show_log: bool = True
    ) -> None:
        self.stream = stream
        self.plain = plain
        #: plain mode: print each warning from the nodes' logs once (the launcher relays
        #: them itself and passes False)
        self.show_log = show_log
        self._logs_shown = 0
        self.period = period if period is not None else PLAIN_PERIOD if plain else TERMINAL_PERIOD
        self._next = 0.0
        self._live = None
        if not plain:
            from rich.console import Console
            from rich.live import Live

            self._live = Live(
                console=Console(file=stream), auto_refresh=False, redirect_stdout=True,
                redirect_stderr=True,
            )
            self._live.start()

    def due(self, now: float) -> bool:
        return now >= self._next

    def show(self, watch: FleetWatch, now: float) -> None:
        if not self.due(now):
            return
        self._next = now + self.period
        snapshot = watch.snapshot(now)
        if self._live is not None:
            self._live.update(render(snapshot), refresh=True)
        else:
            since = self._logs_shown if self.show_log else None
            self._logs_shown = snapshot.log_count
            self.stream.write("\n".join(plain_lines(snapshot, since)) + "\n")
            self.stream.flush()

    def close(self) -> None:
        if self._live is not None:
            self._live.stop()
            self._live = None


class LiveView:
    """A listener and a display together: `wait(seconds)` handles messages and redraws when
    due. The launcher waits through one between its checks of the node processes."""

    def __init__(
        self,
        robots: list[str],
        stream: TextIO,
        plain: bool,
        period: float | None = None,
        stale_after: float = 2.0,
        on_log=None,
        namespace: str = "",
    ) -> None:
        from coverage_fleet.ros.live_listener import LiveListener

        self.watch = FleetWatch(stale_after=stale_after)
        self.listener = LiveListener(self.watch, robots, on_log=on_log, namespace=namespace)
        self.display = WatchDisplay(stream, plain, period, show_log=on_log is None)

    def wait(self, seconds: float) -> None:
        self.listener.spin(seconds)
        self.display.show(self.watch, time.monotonic())

    def close(self) -> None:
        self.display.close()
        self.listener.close()


def run(args: argparse.Namespace) -> int:
    from .fleet_command import graph_domain, graph_namespace, join_domain

    options = Collector("command line")
    domain = graph_domain(args.domain_id, options)
    namespace = graph_namespace(args.fleet_namespace, options)
    if args.period is not None:
        options.check("--period", number_fault(
            args.period, minimum=0.05, maximum=3600.0))
    options.check("--stale-after", number_fault(args.stale_after, minimum=0.1, maximum=3600.0))
    options.check("--duration", number_fault(args.duration, minimum=0.0, maximum=1e6))
    robots: list[str] = []
    if args.mission is not None:
        from coverage_fleet.fleet.mission import load_mission

        try:
            robots = list(load_mission(args.mission).robot_names)
        except ConfigError as error:
            options.extend(error)
    options.raise_if_any()
    join_domain(domain)
    plain = args.plain or not is_terminal(sys.stdout)
    view = LiveView(
        robots, sys.stdout, plain, args.period, args.stale_after, namespace=namespace
    )
    end = time.monotonic() + args.duration if args.duration > 0 else float("inf")
    try:
        while time.monotonic() < end:
            view.wait(0.1)
    except KeyboardInterrupt:
        pass  # Ctrl-C is how a watch ends: no traceback, status 0
    finally:
        view.close()
    return 0
