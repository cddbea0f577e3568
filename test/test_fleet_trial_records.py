"""The trial writer's input records (fleet/trial_records.py): rows are opened by states,
filled by the messages that answer them in whatever order they arrive, and the progress
flags follow the gate's rule (Cortes, Martinez, Karatas & Bullo, IEEE T-RA 20(2), 2004,
sec. II-C, as stated in control/gate.py). The rest is common practice for logging
asynchronous messages: a repeated state is not a new row."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from coverage_fleet.fleet.mission import load_mission
from coverage_fleet.fleet.trial_records import (
    CandidatesRecord,
    CommandRecord,
    GenerationRecord,
    ProgressRecord,
    SettlingRecord,
    SolveRecord,
    StateRecord,
    TargetRecord,
    TrialAssembler,
)

QUICK = Path(__file__).resolve().parents[1] / "config" / "missions" / "solar_row_quick_check.yaml"


def test_rows_are_assembled_from_records_in_any_order() -> None:
    mission = load_mission(QUICK)
    name = mission.roster[0].name
    model = mission.roster[0].vehicle.model
    x = np.zeros(model.nx)
    assembler = TrialAssembler(mission, seed=4)
    assembler.add(GenerationRecord(0))
    assembler.add(TargetRecord(name, np.array([3.0, 4.0])))
    t0 = 100.0  # a wall-clock stamped run: rows count from the first record
    # The solve outcome and progress report of the first state arrive before the state.
    assembler.add(SolveRecord(name, t0, 0.01, "Solve_Succeeded", True))
    assembler.add(ProgressRecord(name, t0, 5.0, 5.0))
    assembler.add(StateRecord(name, t0, x))
    assembler.add(StateRecord(name, t0, x + 1.0))  # re-published: dropped
    assembler.add(CommandRecord(name, np.full(model.nu, 0.1)))
    assembler.add(StateRecord(name, t0 + 0.1, x))
    assembler.add(ProgressRecord(name, t0 + 0.1, 5.0, 4.9))  # 0.1 closer: progress
    assembler.add(CandidatesRecord(t0 + 0.1, 7.5, {name: np.zeros(2)}))
    assembler.add(SettlingRecord("moving"))
    assembler.add(SettlingRecord("settled"))
    log = assembler.finish()
    robot = log.robots[name]
    assert np.allclose(robot.time, [0.0, 0.1])
    assert robot.controller_ran == [True, False]
    assert robot.solve_time[0] == 0.01 and np.isnan(robot.solve_time[1])
    assert np.array_equal(robot.state[0], x)
    assert np.allclose(robot.input[0], 0.1) and np.all(np.isnan(robot.input[1]))
    assert robot.distance == [5.0, 4.9]
    gate = mission.gate
    assert robot.no_farther == [True, True]
    assert gate.progress_tolerance <= 0.1
    assert robot.closer == [False, True]
    assert np.allclose(robot.target[1], [3.0, 4.0]) and robot.generation == [0, 0]
    assert np.allclose(log.time, [0.1]) and log.largest_distance == [5.0]
    assert np.isclose(log.settled_time, 0.1) and log.stuck_time is None
    # Other robots were never heard: empty rows, still present with their columns.
    assert all(len(log.robots[n].time) == 0 for n in mission.robot_names if n != name)
