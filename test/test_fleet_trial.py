"""Trial directories: the CSV log reads back (with the standard csv module) to the values
logged, and writing is atomic: an error or Ctrl-C while writing leaves nothing behind."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import yaml

from coverage_fleet.control.gate import GateOpening
from coverage_fleet.fleet.trial import LimitViolation, RobotLog, TrialLog, read_csv, write_trial


def small_log() -> TrialLog:
    log = TrialLog(mission_name="unit", seed=3, step=0.1, duration=0.2)
    robot = RobotLog("rover_a", "differential_drive", ("x", "y", "yaw"),
                     ("forward_speed", "yaw_rate"), (0, 1))
    for k in range(3):
        t = 0.1 * k
        robot.time.append(t)
        robot.generation.append(0)
        robot.state.append(np.array([1.0 + k, 2.0, 0.5]))
        robot.input.append(np.array([0.25, -0.125]))
        robot.target.append(np.array([4.0, 2.0]))
        robot.distance.append(3.0 - k)
        robot.no_farther.append(True)
        robot.closer.append(k > 0)
        robot.controller_ran.append(k % 2 == 0)
        robot.solve_time.append(0.004 if k % 2 == 0 else float("nan"))
        robot.status.append("Solve_Succeeded" if k % 2 == 0 else "")
        robot.solver_ok.append(True)
        log.time.append(t)
        log.generation.append(0)
        log.cost.append(10.0 - k)
        log.largest_distance.append(3.0 - k)
    log.robots = {"rover_a": robot}
    log.openings = [GateOpening(0.0, 0, "start", 10.0, {"rover_a": np.array([1.0, 2.0])},
                                {"rover_a": np.array([4.0, 2.0])}, {"rover_a": 3.0})]
    log.violations = [LimitViolation(0.1, "rover_a", "forward_speed <= 1", 1.01, 1.0)]
    return log


def test_log_reads_back(tmp_path: Path) -> None:
    path = write_trial(tmp_path / "trial", {"name": "unit", "simulation": {"seed": 3}},
                       small_log())
    assert yaml.safe_load((path / "mission.yaml").read_text())["simulation"]["seed"] == 3
    rows = read_csv(path / "robots" / "rover_a.csv")
    assert [float(r["x"]) for r in rows] == [1.0, 2.0, 3.0]
    assert rows[0]["status"] == "Solve_Succeeded" and rows[1]["solve_time"] == "nan"
    assert [r["closer"] for r in rows] == ["0", "1", "1"]
    fleet = read_csv(path / "fleet.csv")
    assert [float(r["cost"]) for r in fleet] == [10.0, 9.0, 8.0]
    opening = read_csv(path / "gate_openings.csv")[0]
    assert opening["reason"] == "start" and float(opening["target_x"]) == 4.0
    assert read_csv(path / "violations.csv")[0]["limit"] == "forward_speed <= 1"


@pytest.mark.parametrize("fault", [RuntimeError("disk full"), KeyboardInterrupt()])
def test_failure_while_writing_leaves_nothing(tmp_path: Path, fault: BaseException) -> None:
    def failing_report(directory: Path) -> None:
        (directory / "metrics.json").write_text("{}")
        raise fault

    with pytest.raises(type(fault)):
        write_trial(tmp_path / "trial", {"name": "unit"}, small_log(), report=failing_report)
    assert list(tmp_path.iterdir()) == []


def test_never_overwrites(tmp_path: Path) -> None:
    (tmp_path / "trial").mkdir()
    with pytest.raises(FileExistsError):
        write_trial(tmp_path / "trial", {"name": "unit"}, small_log())
    assert list((tmp_path / "trial").iterdir()) == []
