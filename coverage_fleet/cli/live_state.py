"""What a person watching a running graph needs to know, gathered from plain values.

`FleetWatch` is fed by a thin rclpy adapter (coverage_fleet.ros.live_listener), one call per
message, already converted to plain values; `snapshot(now)` freezes it into a `WatchSnapshot`
that the renderers (coverage_fleet.cli.live_render) draw. No rclpy and no terminal library
here, so the rules are tested with made-up values and times.

Two clocks on purpose:
- `now` (wall-clock seconds, monotonic, of the watching process) decides whether a robot is
  live: a robot whose odometry has not arrived for `stale_after` seconds is stale, whatever
  the graph's clock says (a stopped simulator stops its clock too);
- graph time (the stamps in the messages: simulated time under the headless simulator, ROS
  time on real robots) dates the coverage cost and the gate openings, so "time since the
  last opening" and the cost trend are in the graph's seconds.

Odd messages (a NaN position, a malformed table, an unknown level) never stop the watch:
the adapter and `FleetWatch` count them and keep the last reason for the display.
"""

from __future__ import annotations

import math
from collections import deque
from dataclasses import dataclass, field

from coverage_fleet.control.progress import judge

#: Graph seconds over which the cost trend is measured.
TREND_WINDOW = 10.0
#: A relative cost change smaller than this over the window counts as flat.
FLAT_CHANGE = 1e-3
#: Warnings and errors from the nodes' logs kept for the display (newest last).
RECENT_LOG_LINES = 3
#: Diagnostic levels (diagnostic_msgs/DiagnosticStatus: OK 0, WARN 1, ERROR 2, STALE 3).
LEVEL_NAMES = {0: "OK", 1: "WARN", 2: "ERROR", 3: "STALE"}


@dataclass
class RobotWatch:
    """Everything heard about one robot (None: not heard yet)."""

    name: str
    state_heard_at: float | None = None
    position: tuple[float, float] | None = None
    speed: float | None = None
    target: tuple[float, float] | None = None
    target_stamp_ns: int | None = None
    report_stamp_ns: int | None = None
    distance_at_commit: float | None = None
    distance_now: float | None = None
    solve_time: float | None = None
    solve_status: str = ""
    solve_success: bool | None = None
    fallback: str = ""
    diagnostic_level: int | None = None
    diagnostic_message: str = ""
    #: whether the controller may command the robot (its diagnostics' `armed`; None: not said)
    armed: bool | None = None


@dataclass(frozen=True)
class RobotRow:
    """One robot as displayed."""

    name: str
    live: bool
    #: wall seconds since its newest odometry (None: never heard)
    state_age: float | None
    position: tuple[float, float] | None
    speed: float | None
    target: tuple[float, float] | None
    distance_at_commit: float | None
    distance_now: float | None
    #: the newest progress report names the target the robot has now
    report_current: bool | None
    no_farther: bool | None
    closer: bool | None
    solve_time: float | None
    solve_status: str
    solve_success: bool | None
    fallback: str
    diagnostic_level: str
    diagnostic_message: str
    armed: bool | None = None

    @property
    def progress_word(self) -> str:
        """closer / no farther / farther / old report / - (not known yet)."""
        if self.report_current is False:
            return "old report"
        if self.no_farther is None:
            return "-"
        if self.closer:
            return "closer"
        return "no farther" if self.no_farther else "farther"


@dataclass(frozen=True)
class WatchSnapshot:
    """The fleet at one moment of the watch."""

    rows: list[RobotRow]
    graph_time: float | None
    generation: int | None
    opening_reason: str
    cost: float | None
    #: relative change of the cost over the trend window (None: too few samples)
    cost_change: float | None
    cost_window: float
    since_opening: float | None
    settling: str
    stop_state: str | None
    #: worst diagnostic not tied to a robot: (level name, "name: message") or None
    other_health: tuple[str, str] | None
    odd_messages: int
    last_odd: str
    #: (level, node, message) of the newest warnings and errors in the nodes' logs
    recent_log: tuple[tuple[str, str, str], ...] = ()
    #: how many such lines were heard in all (the newest are `recent_log`)
    log_count: int = 0

    @property
    def live_count(self) -> int:
        return sum(row.live for row in self.rows)

    @property
    def trend_word(self) -> str:
        if self.cost_change is None:
            return "-"
        if abs(self.cost_change) < FLAT_CHANGE:
            return "flat"
        return "falling" if self.cost_change < 0 else "rising"


def _finite(*values: float) -> bool:
    return all(isinstance(v, int | float) and math.isfinite(v) for v in values)


@dataclass
class FleetWatch:
    """The watch's state; every `saw_*` method takes plain values from one message."""

    stale_after: float = 2.0
    robots: dict[str, RobotWatch] = field(default_factory=dict)
    generation: int | None = None
    opening_time: float | None = None
    opening_reason: str = ""
    settling: str = "-"
    stop_state: str | None = None
    #: the gate's progress tolerances, as its diagnostics announce them
    tolerances: tuple[float, float] | None = None
    odd_messages: int = 0
    last_odd: str = ""
    _graph_time: float | None = None
    _costs: deque = field(default_factory=deque)
    _other_health: dict[str, tuple[int, str]] = field(default_factory=dict)
    _log: deque = field(default_factory=lambda: deque(maxlen=RECENT_LOG_LINES))
    _log_count: int = 0

    # --- robots -----------------------------------------------------------------------

    def robot(self, name: str) -> RobotWatch:
        """The robot's record, created when a robot is first seen (robots may appear at
        any time; roster robots are added before anything is heard)."""
        if name not in self.robots:
            self.robots[name] = RobotWatch(name)
        return self.robots[name]

    def odd(self, where: str, reason: str) -> None:
        self.odd_messages += 1
        self.last_odd = f"{where}: {reason}"

    def _advance_graph_time(self, t: float) -> None:
        if _finite(t) and (self._graph_time is None or t > self._graph_time):
            self._graph_time = float(t)

    def saw_state(
        self, name: str, now: float, stamp: float, x: float, y: float, speed: float
    ) -> None:
        if not _finite(stamp, x, y, speed):
            self.odd(f"{name}/odom", "not finite")
            return
        robot = self.robot(name)
        robot.state_heard_at = now
        robot.position = (float(x), float(y))
        robot.speed = float(speed)
        self._advance_graph_time(stamp)

    def saw_target(self, name: str, x: float, y: float, stamp_ns: int) -> None:
        if not _finite(x, y):
            self.odd(f"{name}/target", "not finite")
            return
        robot = self.robot(name)
        robot.target = (float(x), float(y))
        robot.target_stamp_ns = int(stamp_ns)

    def saw_progress(
        self, name: str, stamp_ns: int, distance_at_commit: float, distance_now: float
    ) -> None:
        robot = self.robot(name)
        robot.report_stamp_ns = int(stamp_ns)
        # NaN distances are the wire's "no target yet" (conversions.py), not a fault.
        robot.distance_at_commit = (
            float(distance_at_commit) if _finite(distance_at_commit) else None
        )
        robot.distance_now = float(distance_now) if _finite(distance_now) else None

    def saw_solve(
        self, name: str, solve_time: float, status: str, success: bool, fallback: str
    ) -> None:
        robot = self.robot(name)
        robot.solve_time = float(solve_time) if _finite(solve_time) else None
        robot.solve_status = str(status)
        robot.solve_success = bool(success)
        robot.fallback = str(fallback)

    def saw_diagnostic(
        self, name: str, hardware_id: str, level: int, message: str, values: dict[str, str]
    ) -> None:
        """One diagnostic_msgs status: a controller's goes to its robot's row, the gate's
        gives the tolerances, any other is kept for the fleet's health line."""
        if level not in LEVEL_NAMES:
            self.odd(f"/diagnostics {name}", f"unknown level {level}")
            return
        parts = name.split("/")
        if len(parts) == 3 and parts[0] == "coverage_fleet" and parts[2] == "controller":
            robot = self.robot(parts[1])
            robot.diagnostic_level = level
            robot.diagnostic_message = str(message)
            armed = values.get("armed")
            robot.armed = None if armed not in ("0", "1") else armed == "1"
            return
        if name == "coverage_fleet/reference_gate":
            try:
                noise = float(values["noise_tolerance"])
                progress = float(values["progress_tolerance"])
            except (KeyError, ValueError):
                pass  # a gate from before the tolerances were announced
            else:
                if _finite(noise, progress):
                    self.tolerances = (noise, progress)
        self._other_health[name] = (level, str(message))

    # --- the fleet --------------------------------------------------------------------

    def saw_candidates(self, time: float, cost: float) -> None:
        if not _finite(time, cost):
            self.odd("/coverage/candidates", "time or cost not finite")
            return
        self._advance_graph_time(time)
        self._costs.append((float(time), float(cost)))
        while self._costs and self._costs[0][0] < time - 2.0 * TREND_WINDOW:
            self._costs.popleft()

    def saw_opening(self, generation: int, time: float, reason: str) -> None:
        if self.generation is not None and generation < self.generation:
            return  # a late copy of an older opening (the topic keeps its history)
        self.generation = int(generation)
        self.opening_time = float(time) if _finite(time) else None
        self.opening_reason = str(reason)

    def saw_settling(self, status: str) -> None:
        self.settling = str(status)

    def saw_stop(self, state: str) -> None:
        self.stop_state = str(state)

    def saw_clock(self, time: float) -> None:
        self._advance_graph_time(time)

    def saw_log(self, level: str, node: str, message: str) -> None:
        """A warning or error from a node's log (/rosout)."""
        self._log.append((str(level), str(node), str(message)))
        self._log_count += 1

    # --- the snapshot -----------------------------------------------------------------

    def _cost_change(self) -> float | None:
        if len(self._costs) < 2:
            return None
        latest_time, latest = self._costs[-1]
        # The newest sample at least a window old, else the oldest there is.
        earlier = self._costs[0]
        for sample in self._costs:
            if sample[0] <= latest_time - TREND_WINDOW:
                earlier = sample
        if earlier[0] >= latest_time or earlier[1] == 0:
            return None
        return (latest - earlier[1]) / abs(earlier[1])

    def _row(self, robot: RobotWatch, now: float) -> RobotRow:
        age = None if robot.state_heard_at is None else max(0.0, now - robot.state_heard_at)
        current = None
        if robot.report_stamp_ns is not None and robot.target_stamp_ns is not None:
            current = robot.report_stamp_ns == robot.target_stamp_ns
        no_farther = closer = None
        if (
            self.tolerances is not None
            and robot.distance_at_commit is not None
            and robot.distance_now is not None
        ):
            flags = judge(robot.distance_at_commit, robot.distance_now, *self.tolerances)
            no_farther, closer = flags.no_farther, flags.closer
        level = robot.diagnostic_level
        return RobotRow(
            name=robot.name,
            live=age is not None and age <= self.stale_after,
            state_age=age,
            position=robot.position,
            speed=robot.speed,
            target=robot.target,
            distance_at_commit=robot.distance_at_commit,
            distance_now=robot.distance_now,
            report_current=current,
            no_farther=no_farther,
            closer=closer,
            solve_time=robot.solve_time,
            solve_status=robot.solve_status,
            solve_success=robot.solve_success,
            fallback=robot.fallback,
            diagnostic_level="-" if level is None else LEVEL_NAMES[level],
            diagnostic_message=robot.diagnostic_message,
            armed=robot.armed,
        )

    def snapshot(self, now: float) -> WatchSnapshot:
        worst = None
        for name, (level, message) in sorted(self._other_health.items()):
            if worst is None or level > worst[0]:
                worst = (level, f"{name.removeprefix('coverage_fleet/')}: {message}")
        since = None
        if self.opening_time is not None and self._graph_time is not None:
            since = max(0.0, self._graph_time - self.opening_time)
        return WatchSnapshot(
            rows=[self._row(self.robots[n], now) for n in sorted(self.robots)],
            graph_time=self._graph_time,
            generation=self.generation,
            opening_reason=self.opening_reason,
            cost=self._costs[-1][1] if self._costs else None,
            cost_change=self._cost_change(),
            cost_window=TREND_WINDOW,
            since_opening=since,
            settling=self.settling,
            stop_state=self.stop_state,
            other_health=None if worst is None else (LEVEL_NAMES[worst[0]], worst[1]),
            odd_messages=self.odd_messages,
            last_odd=self.last_odd,
            recent_log=tuple(self._log),
            log_count=self._log_count,
        )
