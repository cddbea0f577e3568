"""MPC problems built once per process and shared by robots with the same problem
(control/shared_problems.py).

What is checked, and against what: the reference is always the same robots each building
their own problems (the code path without sharing). An MPC solve is a deterministic
computation of its inputs and of its own robot's history (common practice: why two runs of
a deterministic simulation can be compared exactly), so a shared build must give the same
answers bit for bit, whichever robot called the shared solvers last:
- two MPCs of one vehicle in one region share one build (one build counted, the same
  solver objects) but not their solver chains (failure holds stay per robot);
- robots whose problems differ in any ingredient (vehicle parameters, MPC settings, region,
  terminal ingredients, keep-apart rows) get builds of their own, and so does every robot
  whose real-time step solves its QPs with OSQP (measured: its memory changes answers);
- interleaved solves of two robots on one shared build, with the full solve failing so
  that the IPOPT rescue answers (a real failure: fatrop stopped after one iteration), give
  exactly the answers of the two robots built apart, and each robot keeps its own
  failure hold;
- a mixed fleet with two or more robots of each kind writes the same log files with and
  without sharing, while building fewer problems, and a later run of the same mission in
  the same thread builds none;
- a capacity keeps the builds used last (least recently used dropped first).
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from support_control import ORCHARD_BLOCK, DoubleIntegratorModel, polygon_halfspaces
from support_missions import short_quick_mission

from coverage_fleet.control.mpc import TrackingMpc
from coverage_fleet.control.shared_problems import SharedProblems, thread_builds
from coverage_fleet.control.terminal import compute_terminal_ingredients
from coverage_fleet.fleet.controllers import LocalControllers
from coverage_fleet.fleet.mission import Mission, simulation_step
from coverage_fleet.fleet.simulation import simulate_mission
from coverage_fleet.fleet.trial import log_texts_without_wall_clock
from coverage_fleet.vehicles.settings import MpcSettings

REGION = polygon_halfspaces(ORCHARD_BLOCK)
#: Two or more robots of each kind, spaced wider than two footprints (keep-apart on).
PAIRED_ROSTER = [
    {"name": "rover_a", "vehicle": "differential_drive", "initial_pose": [1.0, 1.0, 0.0]},
    {"name": "rover_b", "vehicle": "differential_drive", "initial_pose": [2.5, 1.0, 1.57]},
    {"name": "rover_c", "vehicle": "differential_drive", "initial_pose": [1.0, 2.5, -1.57]},
    {"name": "drone_d", "vehicle": "multirotor", "initial_pose": [4.5, 1.5, 0.0]},
    {"name": "drone_e", "vehicle": "multirotor", "initial_pose": [4.5, 4.0, 0.0]},
]


def _settings(**changes) -> MpcSettings:
    settings = MpcSettings(
        terminal="ellipsoid", state_weights=(1.0, 1.0, 0.5, 0.5), input_weights=(0.2, 0.2)
    )
    return dataclasses.replace(settings, **changes)


def _mpc(shared: SharedProblems, model=None, settings=None, region=REGION, cell_rows=0):
    model = DoubleIntegratorModel() if model is None else model
    settings = _settings() if settings is None else settings
    terminal = compute_terminal_ingredients(model, settings)
    return TrackingMpc(
        model, settings, region, terminal, cell_rows=cell_rows, prebuild=False, shared=shared
    )


def _strategies(mpc: TrackingMpc, rows: int = 0) -> list:
    return mpc._problems[rows].chain.strategies


def test_same_problem_is_built_once_and_chains_stay_per_robot():
    shared = SharedProblems()
    first, second = _mpc(shared), _mpc(shared)
    assert shared.builds == 1 and len(shared) == 1
    assert all(a is b for a, b in zip(_strategies(first), _strategies(second), strict=True))
    assert first._problems[0].chain is not second._problems[0].chain
    assert first._problems[0].chain.skip_left is not second._problems[0].chain.skip_left
    # The same budgets of a robot with keep-apart rows: each built once for both robots.
    rows_a, rows_b = _mpc(shared, cell_rows=6), _mpc(shared, cell_rows=6)
    assert shared.builds == 2
    for mpc in (rows_a, rows_b):
        mpc._problem(2)
    assert shared.builds == 3
    assert _strategies(rows_a, 2)[0] is _strategies(rows_b, 2)[0]
    # ... and a robot's budgets still share its own failure holds (TrackingMpc._problem).
    assert rows_a._problems[2].chain.skip_left is rows_a._problems[6].chain.skip_left
    assert rows_a._problems[2].chain.skip_left is not rows_b._problems[2].chain.skip_left


@pytest.mark.parametrize(
    "different",
    [
        {"model": DoubleIntegratorModel(max_speed=0.8)},
        {"settings": _settings(offset_weight=50.0)},
        {"settings": _settings(solver={"path": "full"})},
        {"region": (REGION[0], REGION[1] + 0.5)},
        {"cell_rows": 4},
    ],
    ids=["vehicle", "weights", "solver", "region", "rows"],
)
def test_a_different_problem_gets_its_own_build(different):
    shared = SharedProblems()
    reference = _mpc(shared)
    other = _mpc(shared, **different)
    assert shared.builds == 2
    assert _strategies(reference)[0] is not _strategies(other, other.cell_rows)[0]


def test_osqp_real_time_step_is_not_shared():
    """OSQP's memory changes its next answer (solver_chain.QP_PLUGINS_WITH_MEMORY)."""
    shared = SharedProblems()
    settings = _settings(solver={"qp": "osqp"})
    first, second = (_mpc(shared, settings=settings) for _ in range(2))
    assert shared.builds == 2 and len(shared) == 0
    assert _strategies(first)[0] is not _strategies(second)[0]


def test_different_terminal_ingredients_get_their_own_build():
    shared = SharedProblems()
    model, settings = DoubleIntegratorModel(), _settings()
    terminal = compute_terminal_ingredients(model, settings)
    lowered = dataclasses.replace(terminal, alpha=terminal.alpha / 2)
    for ingredients in (terminal, lowered, terminal):
        TrackingMpc(model, settings, REGION, ingredients, prebuild=False, shared=shared)
    assert shared.builds == 2


def test_shared_rescue_answers_two_robots_as_apart():
    """fatrop stopped after one iteration fails every sample, so the IPOPT rescue (built
    at the first failure, then shared) answers all of them; the two robots' solves
    alternate on the shared solvers."""
    settings = _settings(
        solver={"plugin": "fatrop", "path": "full", "options": {"fatrop.max_iter": 1}}
    )
    starts = [np.array([3.0, 3.0, 0.0, 0.0]), np.array([9.0, 6.0, 0.2, -0.1])]
    targets = [np.array([6.0, 4.0]), np.array([2.0, 5.0])]

    def run(mpcs: list[TrackingMpc]) -> list[tuple[bytes, str]]:
        states = [s.copy() for s in starts]
        answers = []
        for _ in range(6):
            for robot, mpc in enumerate(mpcs):
                solution = mpc.solve(states[robot], targets[robot])
                answers.append((solution.predicted_states.tobytes(), solution.status))
                states[robot] = solution.predicted_states[1]
        return answers

    shared = SharedProblems()
    together = run([_mpc(shared, settings=settings) for _ in starts])
    apart = run([_mpc(SharedProblems(), settings=settings) for _ in starts])
    assert shared.builds == 1
    statuses = [status for _, status in together]
    assert all(status.endswith("ipopt: Solve_Succeeded") for status in statuses)
    # Each robot's first sample tries fatrop: the other's failure hold is not its own
    # (then fatrop is skipped for solver_chain.RESCUE_HOLD_SAMPLES samples).
    assert statuses[:2] == ["fatrop: MaxIterExceeded; ipopt: Solve_Succeeded"] * 2
    assert statuses[2:] == ["ipopt: Solve_Succeeded"] * (len(statuses) - 2)
    assert together == apart


@pytest.fixture(scope="module")
def paired_mission(tmp_path_factory: pytest.TempPathFactory) -> Mission:
    return short_quick_mission(PAIRED_ROSTER, tmp_path_factory.mktemp("shared") / "paired.yaml")


def test_fleet_log_is_the_same_with_and_without_shared_builds(paired_mission: Mission):
    assert paired_mission.keep_apart.enabled  # row budgets: several problems per robot
    shared = simulate_mission(paired_mission, stop_at_rest=False)
    apart = simulate_mission(paired_mission, stop_at_rest=False, share_builds=False)
    assert all(np.any(robot.controller_ran) for robot in shared.robots.values())
    assert log_texts_without_wall_clock(shared) == log_texts_without_wall_clock(apart)
    # Two vehicle kinds: two problems built at the start, not one per robot ...
    step = simulation_step(paired_mission.roster, paired_mission.simulation)
    fresh = SharedProblems()
    assert LocalControllers(paired_mission, step, builds=fresh).shared is fresh
    assert fresh.builds == 2
    # ... and none by a later run in this thread (the run above built them).
    made = thread_builds().builds
    assert LocalControllers(paired_mission, step).shared is thread_builds()
    assert thread_builds().builds == made
    assert LocalControllers(paired_mission, step, share_builds=False).shared is None


def test_builds_used_last_are_kept():
    shared = SharedProblems(capacity=2)
    for key in (b"a", b"b", b"a", b"c", b"a", b"b"):
        shared.get(key, lambda key=key: key.decode())
    # a, b built; a found; c built, b dropped (a used later); a found; b built again.
    assert shared.builds == 4 and len(shared) == 2
