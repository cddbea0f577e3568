"""Drawing a WatchSnapshot: a rich table for a terminal, plain lines for anything else.

The terminal view fits 80 columns (an SSH session on a small screen): one table row per
robot, two text lines per row, fleet-wide figures above it. Colour only repeats what the
words say (a stale robot reads "STALE" in any terminal). The plain lines carry the same
figures, one line for the fleet and one per robot, for logs, pipes and tests.
"""

from __future__ import annotations

from rich import box
from rich.console import Group
from rich.table import Table
from rich.text import Text

from coverage_fleet.control.fallbacks import FALLBACK_KEEP_APART_BRAKE

from .live_state import RobotRow, WatchSnapshot

#: Longest solver status shown (statuses such as "Maximum_Iterations_Exceeded" are long).
STATUS_WIDTH = 16
#: Longest robot name shown in the table (the plain lines show it whole).
NAME_WIDTH = 12


def _number(value: float | None, digits: int = 2) -> str:
    return "-" if value is None else f"{value:.{digits}f}"


def _xy(point: tuple[float, float] | None) -> str:
    return "-" if point is None else f"{point[0]:.2f},{point[1]:.2f}"


def _age(seconds: float | None) -> str:
    if seconds is None:
        return "never heard"
    return f"{seconds:.1f} s ago" if seconds < 600 else f"{seconds / 60:.0f} min ago"


def _solve(row: RobotRow) -> tuple[str, str]:
    """(time, outcome) of the newest solve: "ok", "FAILED" or "no solve" (a keep-apart
    brake: the neighbours' positions are not known), then the solver's status."""
    if row.solve_time is None:
        return "-", ""
    if row.solve_success:
        outcome = "ok"
    elif row.fallback == FALLBACK_KEEP_APART_BRAKE:
        outcome = "no solve"
    else:
        outcome = "FAILED"
    status = outcome + (
        f" {row.solve_status}" if row.solve_status else ""
    )
    if len(status) > STATUS_WIDTH:
        status = status[: STATUS_WIDTH - 1] + "~"
    return f"{1e3 * row.solve_time:.1f} ms", status


def fleet_summary(snapshot: WatchSnapshot) -> list[str]:
    """Fleet-wide figures as short lines (shared by both renderers)."""
    cost = "-" if snapshot.cost is None else f"{snapshot.cost:.5g}"
    trend = snapshot.trend_word
    if snapshot.cost_change is not None:
        trend += f" {100 * snapshot.cost_change:+.1f}% over {snapshot.cost_window:g} s"
    generation = "-" if snapshot.generation is None else str(snapshot.generation)
    if snapshot.opening_reason:
        generation += f" ({snapshot.opening_reason})"
    since = "-" if snapshot.since_opening is None else f"{snapshot.since_opening:.1f} s"
    clock = "-" if snapshot.graph_time is None else f"{snapshot.graph_time:.1f} s"
    stop = snapshot.stop_state if snapshot.stop_state is not None else "not heard"
    lines = [
        f"graph time {clock}  robots live {snapshot.live_count}/{len(snapshot.rows)}  "
        f"fleet {snapshot.settling}  stop: {stop}",
        f"generation {generation}  since last opening {since}",
        f"cost {cost}  trend {trend}",
    ]
    if snapshot.other_health is not None and snapshot.other_health[0] != "OK":
        lines.append(f"health {snapshot.other_health[0]}: {snapshot.other_health[1]}")
    if snapshot.odd_messages:
        lines.append(f"odd messages ignored: {snapshot.odd_messages} (last {snapshot.last_odd})")
    return lines


def log_lines(snapshot: WatchSnapshot, since: int = 0) -> list[str]:
    """The newest log lines; with `since` (a log_count seen before) only those heard after."""
    fresh = min(len(snapshot.recent_log), max(0, snapshot.log_count - since))
    recent = snapshot.recent_log[len(snapshot.recent_log) - fresh :]
    return [f"{level} {node}: {message}" for level, node, message in recent]


def _short_age(seconds: float | None) -> str:
    if seconds is None:
        return "never"
    return f"{seconds:.0f}s" if seconds < 100 else f"{seconds / 60:.0f}min"


def render(snapshot: WatchSnapshot) -> Group:
    """The terminal view: the fleet's lines, then a table with one row per robot (two text
    lines each, so that the table fits 80 columns)."""
    header = Text("\n".join(fleet_summary(snapshot)))
    table = Table(box=box.SIMPLE_HEAD, padding=(0, 1), show_edge=False)
    table.add_column("robot", no_wrap=True, max_width=NAME_WIDTH)
    table.add_column("at\ntarget (m)", no_wrap=True)
    table.add_column("distance (m)\nprogress", no_wrap=True)
    table.add_column("solve\nstatus", no_wrap=True)
    table.add_column("health\nfallback", no_wrap=True)
    for row in snapshot.rows:
        if row.live:
            state = Text("live", style="green")
        else:
            state = Text(f"STALE {_short_age(row.state_age)}", style="bold red")
        name = row.name if len(row.name) <= NAME_WIDTH else row.name[: NAME_WIDTH - 1] + "~"
        solve_time, solve_status = _solve(row)
        fallback = row.fallback or ("-" if row.solve_time is None else "none")
        if row.armed is False:
            fallback = "DISARMED"  # the controller sends no commands: nothing falls back
        level_style = {"OK": "green", "WARN": "yellow", "ERROR": "bold red"}.get(
            row.diagnostic_level, ""
        )
        distances = f"{_number(row.distance_at_commit)} -> {_number(row.distance_now)}"
        table.add_row(
            Text(f"{name}\n").append(state),
            f"{_xy(row.position)}\n{_xy(row.target)}",
            f"{distances}\n{row.progress_word}",
            f"{solve_time}\n{solve_status}",
            Text(row.diagnostic_level, style=level_style).append(f"\n{fallback}"),
        )
    recent = log_lines(snapshot)
    if not recent:
        return Group(header, table)
    footer = Text("recent log:\n" + "\n".join(recent), no_wrap=True, overflow="ellipsis")
    return Group(header, table, footer)


def plain_lines(snapshot: WatchSnapshot, logs_since: int | None = None) -> list[str]:
    """The same figures as plain lines: `log ...` lines for warnings heard since
    `logs_since` (None: none), then `fleet ...`, then one `robot ...` line each."""
    lines = []
    if logs_since is not None:
        lines = [f"log {line}" for line in log_lines(snapshot, logs_since)]
    lines.append("fleet " + " | ".join(fleet_summary(snapshot)))
    for row in snapshot.rows:
        solve_time, solve_status = _solve(row)
        lines.append(
            f"robot {row.name} {'live' if row.live else 'STALE'} ({_age(row.state_age)}) "
            f"at {_xy(row.position)} target {_xy(row.target)} "
            f"distance commit {_number(row.distance_at_commit)} now "
            f"{_number(row.distance_now)} progress {row.progress_word} "
            f"solve {solve_time} {solve_status or '-'} fallback {row.fallback or '-'} "
            f"diagnostics {row.diagnostic_level} "
            f"armed {'-' if row.armed is None else 'yes' if row.armed else 'NO'}"
        )
    return lines
