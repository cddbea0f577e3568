"""The live view's core (FleetWatch) and its two renderers, fed plain values with made-up
times: what a person sees for a fleet in a known state.

Outside references: the progress verdict follows the gate's rule as published (Cortes,
Martinez, Karatas & Bullo, IEEE T-RA 20(2), 2004, with the monotone-progress condition of
ARCHITECTURE.md: no farther = d_now <= d_commit + noise tolerance, closer = d_now <=
d_commit - progress tolerance), worked by hand below; the cost trend is the relative change
(c_now - c_before) / c_before over the window (worked example); a robot is stale when its
newest state is older than the limit (common practice for watchdogs); 80 columns is the
classic terminal width (ECMA-48 / VT100 default line length, from memory).
"""

from __future__ import annotations

import math

import pytest
from rich.console import Console

from coverage_fleet.cli.live_render import plain_lines, render
from coverage_fleet.cli.live_state import FleetWatch
from coverage_fleet.control.fallbacks import FALLBACK_KEEP_APART_BRAKE

NOISE, PROGRESS = 0.02, 0.05
STAMP = 7_000_000_000


def fleet_at_ten_seconds() -> FleetWatch:
    """Three robots heard at wall time 100 s (rover_c last at 90 s); graph time 12 s."""
    watch = FleetWatch(stale_after=2.0)
    watch.saw_diagnostic(
        "coverage_fleet/reference_gate", "base_station", 0, "generation 4: moving",
        {"noise_tolerance": repr(NOISE), "progress_tolerance": repr(PROGRESS)},
    )
    # rover_a: 3.20 -> 3.10 m is 0.10 m closer, more than the 0.05 m progress tolerance.
    # drone_b: 2.00 -> 2.01 m is farther, but within the 0.02 m noise tolerance.
    # rover_c: 1.00 -> 1.50 m is farther than 1.00 + 0.02 m.
    for name, heard, distances in (
        ("rover_a", 100.0, (3.2, 3.1)),
        ("drone_b", 100.0, (2.0, 2.01)),
        ("rover_c", 90.0, (1.0, 1.5)),
    ):
        watch.saw_state(name, heard, 12.0, 1.5, -2.25, 0.4)
        watch.saw_target(name, 4.0, 5.5, STAMP)
        watch.saw_progress(name, STAMP, *distances)
        watch.saw_solve(name, 0.0125, "Solve_Succeeded", True, "")
        watch.saw_diagnostic(f"coverage_fleet/{name}/controller", name, 0, "tracking", {})
    watch.saw_solve("drone_b", 0.2, "Maximum_Iterations_Exceeded", False, "previous plan")
    watch.saw_diagnostic("coverage_fleet/drone_b/controller", "drone_b", 1, "solver: ...", {})
    # Cost 80 at t = 2 s and 60 at t = 12 s: (60 - 80) / 80 = -25 % over the 10 s window.
    for t, cost in ((0.0, 100.0), (2.0, 80.0), (7.0, 70.0), (12.0, 60.0)):
        watch.saw_candidates(t, cost)
    watch.saw_opening(4, 9.5, "progress")
    watch.saw_settling("moving")
    return watch


def rows_by_name(watch: FleetWatch, now: float) -> dict:
    return {row.name: row for row in watch.snapshot(now).rows}


def test_progress_verdicts_follow_the_gates_rule() -> None:
    rows = rows_by_name(fleet_at_ten_seconds(), now=100.5)
    assert (rows["rover_a"].no_farther, rows["rover_a"].closer) == (True, True)
    assert (rows["drone_b"].no_farther, rows["drone_b"].closer) == (True, False)
    assert (rows["rover_c"].no_farther, rows["rover_c"].closer) == (False, False)
    assert [rows[n].progress_word for n in ("rover_a", "drone_b", "rover_c")] == [
        "closer", "no farther", "farther",
    ]


def test_a_report_on_an_older_target_is_shown_as_such() -> None:
    watch = fleet_at_ten_seconds()
    watch.saw_target("rover_a", 4.5, 5.0, STAMP + 1)  # a new generation's target
    assert rows_by_name(watch, 100.5)["rover_a"].progress_word == "old report"


def test_fleet_figures_cost_trend_and_time_since_the_opening() -> None:
    snapshot = fleet_at_ten_seconds().snapshot(100.5)
    assert snapshot.cost == 60.0
    assert snapshot.cost_change == pytest.approx(-0.25)
    assert snapshot.trend_word == "falling"
    assert snapshot.generation == 4
    assert snapshot.since_opening == pytest.approx(12.0 - 9.5)


def test_a_robot_whose_state_stops_turns_stale_and_the_others_stay_live() -> None:
    watch = fleet_at_ten_seconds()
    rows = rows_by_name(watch, now=101.0)
    assert rows["rover_c"].live is False and rows["rover_c"].state_age == pytest.approx(11.0)
    assert rows["rover_a"].live and rows["drone_b"].live
    # Two seconds later nothing more was heard from rover_a: stale too (limit 2 s).
    watch.saw_state("drone_b", 102.5, 13.0, 1.5, -2.25, 0.4)
    rows = rows_by_name(watch, now=102.6)
    assert [rows[n].live for n in ("rover_a", "drone_b", "rover_c")] == [False, True, False]


def test_terminal_view_fits_80_columns_and_shows_rows_cost_and_generation() -> None:
    console = Console(record=True, width=80, color_system=None)
    console.print(render(fleet_at_ten_seconds().snapshot(100.5)))
    text = console.export_text()
    lines = text.splitlines()
    assert max(len(line) for line in lines) <= 80
    assert "generation 4 (progress)" in text
    assert "cost 60" in text and "falling -25.0% over 10 s" in text
    assert "since last opening 2.5 s" in text
    for name in ("rover_a", "drone_b", "rover_c"):
        assert sum(line.lstrip().startswith(name) for line in lines) == 1, text
    # rover_c's second line says it is stale; the others say live.
    below = {n: lines[i + 1] for i, line in enumerate(lines) for n in ("rover_a", "rover_c")
             if line.lstrip().startswith(n)}
    assert below["rover_c"].lstrip().startswith("STALE 10s")
    assert below["rover_a"].lstrip().startswith("live")
    assert "FAILED Maximum" in text and "previous plan" in text


def test_plain_lines_carry_the_same_figures() -> None:
    lines = plain_lines(fleet_at_ten_seconds().snapshot(100.5))
    assert lines[0].startswith("fleet ") and "generation 4" in lines[0]
    assert "cost 60" in lines[0]
    by_robot = {line.split()[1]: line for line in lines[1:]}
    assert by_robot["rover_c"].startswith("robot rover_c STALE (10.5 s ago)")
    assert "at 1.50,-2.25 target 4.00,5.50" in by_robot["rover_a"]
    assert "distance commit 3.20 now 3.10 progress closer" in by_robot["rover_a"]
    assert "solve 200.0 ms FAILED" in by_robot["drone_b"]
    assert "diagnostics WARN" in by_robot["drone_b"]


def test_a_keep_apart_brake_reads_as_no_solve_not_as_a_failure() -> None:
    watch = fleet_at_ten_seconds()
    watch.saw_solve("rover_a", 0.0, "keep-apart: no snapshot of the fleet's positions yet; "
                    "braking", False, FALLBACK_KEEP_APART_BRAKE)
    by_robot = {line.split()[1]: line for line in plain_lines(watch.snapshot(100.5))[1:]}
    assert "ms no solve keep-a" in by_robot["rover_a"], by_robot["rover_a"]
    assert "fallback keep-apart brake" in by_robot["rover_a"]
    assert "FAILED" not in by_robot["rover_a"]
    assert "FAILED" in by_robot["drone_b"]  # a real failure still reads as one


def test_odd_values_are_counted_and_never_stop_the_view() -> None:
    watch = fleet_at_ten_seconds()
    watch.saw_state("rover_a", 101.0, 13.0, math.nan, 0.0, 0.0)
    watch.saw_candidates(13.0, math.inf)
    watch.saw_diagnostic("coverage_fleet/partition", "base_station", 9, "?", {})
    snapshot = watch.snapshot(101.0)
    assert snapshot.odd_messages == 3
    assert snapshot.cost == 60.0  # the infinite cost was not taken
    rows = {row.name: row for row in snapshot.rows}
    assert rows["rover_a"].position == (1.5, -2.25)  # the NaN position was not taken
    assert "odd messages ignored: 3" in "\n".join(plain_lines(snapshot))


def test_a_robot_that_appears_later_gets_a_row() -> None:
    watch = fleet_at_ten_seconds()
    watch.saw_state("boat_d", 100.4, 12.1, 7.0, 7.0, 0.0)
    rows = rows_by_name(watch, now=100.5)
    assert rows["boat_d"].live and rows["boat_d"].target is None
    assert rows["boat_d"].progress_word == "-"


def test_a_late_copy_of_an_older_opening_does_not_turn_the_generation_back() -> None:
    watch = fleet_at_ten_seconds()
    watch.saw_opening(2, 3.0, "progress")
    assert watch.snapshot(100.5).generation == 4


def test_warnings_from_the_nodes_logs_are_shown() -> None:
    watch = fleet_at_ten_seconds()
    watch.saw_log("WARN", "reference_gate", "rover_c leaves the gate (left out)")
    console = Console(record=True, width=80, color_system=None)
    console.print(render(watch.snapshot(100.5)))
    assert "WARN reference_gate: rover_c leaves the gate" in console.export_text()


def test_robots_are_found_by_their_topics() -> None:
    pytest.importorskip("rclpy", reason="ROS 2 wheels not installed (scripts/setup_env.sh)")
    from coverage_fleet.ros.live_listener import robots_in_graph

    graph = [
        ("/rover_a/odom", ["nav_msgs/msg/Odometry"]),
        ("/rover_a/coverage/progress", ["geometry_msgs/msg/Vector3Stamped"]),
        ("/fleet/boat_b/odom", ["nav_msgs/msg/Odometry"]),
        ("/fleet/boat_b/coverage/target", ["geometry_msgs/msg/PointStamped"]),
        # Odometry of something that is not one of ours (no coverage topics beside it).
        ("/rover_a/wheels/odom", ["nav_msgs/msg/Odometry"]),
        # A coverage robot's topic with the wrong type for odom.
        ("/ghost/odom", ["std_msgs/msg/String"]),
        ("/ghost/coverage/target", ["geometry_msgs/msg/PointStamped"]),
    ]
    assert robots_in_graph(graph) == ["fleet/boat_b", "rover_a"]


def test_bad_watch_options_are_refused_with_every_problem_and_status_2(capsys) -> None:
    from coverage_fleet.cli.main import main

    status = main(["watch", "--domain-id", "999", "--stale-after", "-1", "--period", "0"])
    assert status == 2
    err = capsys.readouterr().err
    assert "--domain-id: must be at most 232, got 999" in err
    assert "--stale-after: must be at least 0.1, got -1" in err
    assert "--period: must be at least 0.05, got 0" in err
    assert "Traceback" not in err


def test_plain_lines_print_each_warning_once() -> None:
    watch = fleet_at_ten_seconds()
    watch.saw_log("WARN", "reference_gate", "first")
    first = watch.snapshot(100.5)
    assert plain_lines(first, logs_since=0)[0] == "log WARN reference_gate: first"
    watch.saw_log("ERROR", "partition", "second")
    later = plain_lines(watch.snapshot(100.6), logs_since=first.log_count)
    assert [line for line in later if line.startswith("log ")] == [
        "log ERROR partition: second"
    ]
    assert not any(line.startswith("log ") for line in plain_lines(watch.snapshot(100.7)))


def test_a_disarmed_controller_is_shown_disarmed() -> None:
    watch = fleet_at_ten_seconds()
    watch.saw_diagnostic(
        "coverage_fleet/rover_a/controller", "rover_a", 1, "disarmed: no commands until armed",
        {"armed": "0"},
    )
    watch.saw_diagnostic("coverage_fleet/rover_c/controller", "rover_c", 0, "ok", {"armed": "1"})
    lines = plain_lines(watch.snapshot(100.5))
    by_robot = {line.split()[1]: line for line in lines[1:]}
    assert by_robot["rover_a"].endswith("diagnostics WARN armed NO")
    assert by_robot["rover_c"].endswith("armed yes")
    assert by_robot["drone_b"].endswith("armed -")  # its diagnostics did not say
    console = Console(record=True, width=80, color_system=None)
    console.print(render(watch.snapshot(100.5)))
    assert "DISARMED" in console.export_text()
