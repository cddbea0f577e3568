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


def _rover(name: str, times, xs, ys, yaws) -> RobotLog:
    robot = RobotLog(name, "differential_drive", ("x", "y", "yaw"), ("v", "w"), (0, 1))
    for t, x, y, yaw in zip(times, xs, ys, yaws, strict=True):
        robot.time.append(float(t))
        robot.state.append(np.array([x, y, yaw]))
    return robot


def test_speed_and_heading_show_a_rover_driving_backwards(tmp_path: Path) -> None:
    """Worked example: a rover facing east (yaw 0) drives forwards at 0.5 m/s for 2 s, then
    backwards at 0.3 m/s for 2 s; another faces west (yaw pi) and drives west at 0.4 m/s.
    On straight stretches the finite difference of the logged positions is the speed
    exactly (x = x0 + v t; common practice); signed along the heading it is +0.5 then -0.3
    for the first rover and +0.4 (forwards) for the second, headings 0 and 180 degrees."""
    from coverage_fleet.report.figures import plot_motion

    t = np.arange(0.0, 4.01, 0.1)
    x = np.where(t <= 2.0, 0.5 * t, 1.0 - 0.3 * (t - 2.0))
    mover = _rover("mover", t, x, np.zeros_like(t), np.zeros_like(t))
    west = _rover("west", t, 5.0 - 0.4 * t, np.ones_like(t), np.full_like(t, np.pi))
    drone = RobotLog("drone", "multirotor", ("x", "y", "vx", "vy"), ("ax", "ay"), (0, 1))
    for k in t:
        drone.time.append(float(k))
        drone.state.append(np.array([2.0, 0.2 * k, 0.0, 0.2]))
    log = TrialLog("reverse_check", seed=0, step=0.1, duration=4.0)
    log.robots = {"mover": mover, "west": west, "drone": drone}
    series = plot_motion(tmp_path / "motion.png", log)
    assert (tmp_path / "motion.png").stat().st_size > 1000

    forwards, backwards = (t > 0.05) & (t < 1.95), (t > 2.05) & (t < 3.95)
    # The plotted speed is the finite difference of the logged x along the heading.
    differences = np.gradient(x, t)
    assert np.allclose(series["mover"].speed, differences)
    assert np.allclose(series["mover"].speed[forwards], 0.5)
    assert np.allclose(series["mover"].speed[backwards], -0.3)
    assert np.allclose(series["mover"].heading_deg, 0.0)
    assert np.allclose(series["west"].speed, 0.4)
    assert np.allclose(np.abs(series["west"].heading_deg), 180.0)
    # No yaw state: the planar speed (never negative) and the direction of travel (north).
    assert not series["drone"].has_yaw
    assert np.allclose(series["drone"].speed, 0.2)
    assert np.allclose(series["drone"].heading_deg, 90.0)


def test_clearance_against_time_for_robots_logged_at_different_times(tmp_path: Path) -> None:
    """The worked example above as a curve: gap(t) = 10 - 2 t, footprints 0.4 + 0.6 m, so
    clearance(t) = 9 - 2 t while both robots are logged (up to 4 s), none after; a third
    robot far away never decides it. Its smallest value is the metric's."""
    from coverage_fleet.report.figures import plot_clearance
    from coverage_fleet.report.metrics import closest_approach

    left = _rover("left", np.arange(0.0, 4.01, 0.5), np.arange(0.0, 4.01, 0.5),
                  np.zeros(9), np.zeros(9))
    t_right = np.arange(0.0, 6.01, 0.3)
    right = _rover("right", t_right, 10.0 - t_right, np.zeros_like(t_right),
                   np.full_like(t_right, np.pi))
    far = _rover("far", [0.0, 6.0], [0.0, 0.0], [50.0, 50.0], [0.0, 0.0])
    log = TrialLog("crossing_check", seed=0, step=0.1, duration=6.0)
    log.robots = {"left": left, "right": right, "far": far}
    footprints = {"left": 0.4, "right": 0.6, "far": 0.5}
    times, clearance = plot_clearance(tmp_path / "clearance.png", log, footprints)
    assert (tmp_path / "clearance.png").stat().st_size > 1000
    both = times <= 4.0
    assert set(left.time) | {t for t in right.time if t <= 4.0} <= set(times[both])
    assert np.allclose(clearance[both], 9.0 - 2.0 * times[both])
    # After 4 s only "right" and "far" are logged together: far away, ~50 m.
    assert np.all(clearance[~both] > 45.0)
    assert np.nanmin(clearance) == pytest.approx(
        closest_approach(log, footprints)["smallest_clearance_m"]
    )
