"""The solve-time figure is drawn even for a robot whose controller never ran (a real
robot whose controller was down, a log cut short): no crash on an empty sample."""

from __future__ import annotations

from pathlib import Path

import numpy as np

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
