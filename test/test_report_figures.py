"""The solve-time figure is drawn even for a robot whose controller never ran (a real
robot whose controller was down, a log cut short): no crash on an empty sample."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from coverage_fleet.fleet.trial import RobotLog, TrialLog
from coverage_fleet.report.figures import plot_solve_times


def _robot(name: str, ran: bool) -> RobotLog:
    robot = RobotLog(name, "differential_drive", ("x", "y", "yaw"), ("v", "w"), (0, 1))
    for k in range(3):
        robot.time.append(0.1 * k)
        robot.state.append(np.array([0.1 * k, 0.0, 0.0]))
        robot.controller_ran.append(ran)
        robot.solve_time.append(0.002 if ran else 0.0)
        robot.solver_ok.append(True)
    return robot


def test_solve_time_figure_without_any_solve(tmp_path: Path) -> None:
    log = TrialLog("empty_check", seed=0, step=0.1, duration=0.3)
    log.robots = {"idle": _robot("idle", ran=False)}
    plot_solve_times(tmp_path / "solve_times.png", log)
    assert (tmp_path / "solve_times.png").stat().st_size > 1000


def test_solve_time_figure_with_one_idle_robot(tmp_path: Path) -> None:
    log = TrialLog("mixed_check", seed=0, step=0.1, duration=0.3)
    log.robots = {"idle": _robot("idle", ran=False), "busy": _robot("busy", ran=True)}
    plot_solve_times(tmp_path / "solve_times.png", log)
    assert (tmp_path / "solve_times.png").stat().st_size > 1000


def test_closest_approach_with_robots_logged_at_different_times() -> None:
    """A recording of the ROS graph logs each robot as its messages arrive, so rows differ
    in number and time. Two robots moving towards each other along x at 1 m/s from 10 m
    apart meet at t = 5 s: the closest approach is found by interpolating between rows
    (worked example: gap(t) = 10 - 2 t)."""
    from coverage_fleet.report.metrics import closest_approach

    left = RobotLog("left", "differential_drive", ("x", "y", "yaw"), ("v", "w"), (0, 1))
    right = RobotLog("right", "differential_drive", ("x", "y", "yaw"), ("v", "w"), (0, 1))
    for t in np.arange(0.0, 4.01, 0.5):  # stops logging at 4 s: gap 2 m
        left.time.append(float(t))
        left.state.append(np.array([t, 0.0, 0.0]))
    for t in np.arange(0.0, 6.01, 0.3):
        right.time.append(float(t))
        right.state.append(np.array([10.0 - t, 0.0, np.pi]))
    log = TrialLog("crossing_check", seed=0, step=0.1, duration=6.0)
    log.robots = {"left": left, "right": right}
    result = closest_approach(log, {"left": 0.4, "right": 0.6})
    assert result["closest_approach_m"] == pytest.approx(2.0, abs=1e-9)
    assert result["smallest_clearance_m"] == pytest.approx(1.0, abs=1e-9)
