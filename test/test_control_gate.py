"""The reference gate on its own: generations, stale reports, the monotone-progress condition,
a shut gate right after a commit, and roster changes.

The design claim checked at the end: with the partition held fixed, the coverage cost is
H = sum_i [J_i(c_i) + M_i ||p_i - c_i||^2] (parallel-axis theorem; Cortes, Martinez, Karatas
& Bullo, "Coverage control for mobile sensing networks", IEEE T-RA 20(2), 2004, section
II-C), so whenever the gate's condition holds (no robot farther, one closer) the cost at the
new positions is lower. The check computes cells and H by brute-force nearest-robot
assignment on a grid, independent of the project's geometry code.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from coverage_fleet.control.gate import GateSettings, ProgressReport, ReferenceGate

SETTINGS = GateSettings(noise_tolerance=0.02, progress_tolerance=0.05)


def committed_gate(distances: dict[str, float]) -> ReferenceGate:
    """A gate at generation 0 whose robots sit `distance` east of a target at the origin."""
    gate = ReferenceGate(SETTINGS)
    for name in distances:
        gate.add_robot(name)
    targets = {name: np.zeros(2) for name in distances}
    positions = {name: np.array([d, 0.0]) for name, d in distances.items()}
    opening = gate.offer(targets, positions, cost=10.0, time=0.0)
    assert opening is not None and opening.reason == "start"
    return gate


def report_all(gate: ReferenceGate, distances: dict[str, float]) -> None:
    for name, d in distances.items():
        assert gate.report(ProgressReport(name, gate.generation, d))


def offer_same(gate: ReferenceGate, cost: float = 9.0, time: float = 1.0):
    names = gate.robots
    return gate.offer(
        {n: np.ones(2) for n in names}, {n: np.zeros(2) for n in names}, cost=cost, time=time
    )


def test_first_offer_commits_generation_zero_and_records_distances() -> None:
    gate = committed_gate({"a": 3.0, "b": 4.0})
    assert gate.generation == 0
    assert gate.openings[0].distances == {"a": 3.0, "b": 4.0}
    assert gate.openings[0].cost == 10.0


def test_opens_when_nobody_is_farther_and_one_is_closer() -> None:
    gate = committed_gate({"a": 3.0, "b": 4.0})
    report_all(gate, {"a": 3.0, "b": 3.9})
    assert gate.ready_to_open()
    opening = offer_same(gate)
    assert opening is not None and opening.generation == 1 and opening.reason == "progress"
    # New distances are recorded from the positions of the new commit.
    assert opening.distances == pytest.approx({"a": np.sqrt(2), "b": np.sqrt(2)})


def test_stays_shut_while_any_robot_is_farther() -> None:
    gate = committed_gate({"a": 3.0, "b": 4.0})
    report_all(gate, {"a": 1.0, "b": 4.05})  # a much closer, b farther beyond noise
    assert not gate.ready_to_open()
    assert offer_same(gate) is None
    assert gate.generation == 0


def test_noise_tolerance_and_progress_tolerance() -> None:
    gate = committed_gate({"a": 3.0, "b": 4.0})
    report_all(gate, {"a": 2.96, "b": 4.01})  # a closer by less than progress_tolerance
    assert not gate.ready_to_open()
    report_all(gate, {"a": 2.95, "b": 4.01})  # b farther only within noise_tolerance
    assert gate.ready_to_open()


def test_report_about_an_older_generation_is_ignored() -> None:
    gate = committed_gate({"a": 3.0, "b": 4.0})
    report_all(gate, {"a": 2.0, "b": 3.0})
    assert offer_same(gate) is not None
    assert not gate.report(ProgressReport("a", 0, 0.0))  # stale
    assert not gate.report(ProgressReport("ghost", 1, 0.0))  # unknown robot
    assert gate.progress()["a"].distance_now is None


def test_a_robot_that_has_not_reported_blocks_the_gate() -> None:
    gate = committed_gate({"a": 3.0, "b": 4.0})
    assert gate.report(ProgressReport("a", 0, 0.5))
    assert not gate.ready_to_open()
    assert gate.report(ProgressReport("b", 0, 4.0))
    assert gate.ready_to_open()


def test_the_gate_is_shut_right_after_a_commit_before_anyone_moved() -> None:
    # Why a shut gate alone must not count as settled (fleet/settling.py judges that): at
    # the commit nobody is closer yet, whatever the distances.
    gate = committed_gate({"a": 0.08, "b": 3.0})
    report_all(gate, {"a": 0.08, "b": 3.0})
    assert not gate.ready_to_open()
    # Nobody can get closer by the progress tolerance from 0.04 m: shut for good there.
    gate = committed_gate({"a": 0.04, "b": 0.04})
    report_all(gate, {"a": 0.0, "b": 0.0})
    assert not gate.ready_to_open()


def test_roster_changes_force_a_commit_and_are_marked() -> None:
    gate = committed_gate({"a": 3.0, "b": 4.0})
    gate.add_robot("c")
    assert gate.ready_to_open()
    opening = offer_same(gate)
    assert opening is not None and opening.reason == "roster"
    assert set(opening.targets) == {"a", "b", "c"}
    gate.remove_robot("a")
    opening = offer_same(gate)
    assert opening is not None and opening.reason == "roster"
    assert set(opening.targets) == {"b", "c"}
    with pytest.raises(ValueError, match="already"):
        gate.add_robot("b")


def test_offer_must_cover_the_roster() -> None:
    gate = ReferenceGate(SETTINGS)
    gate.add_robot("a")
    gate.add_robot("b")
    with pytest.raises(ValueError, match="exactly the robots"):
        gate.offer({"a": np.zeros(2)}, {"a": np.zeros(2)}, cost=1.0, time=0.0)


# --- the design claim, against a brute-force grid computation ------------------------------

GRID = (np.stack(np.meshgrid(np.linspace(0.0025, 0.9975, 200), np.linspace(0.0025, 0.9975, 200)),
                 axis=-1).reshape(-1, 2))


def grid_cells(positions: np.ndarray) -> np.ndarray:
    """Index of the nearest robot for every grid point (Voronoi cells of the unit square)."""
    return np.argmin(((GRID[:, None, :] - positions[None, :, :]) ** 2).sum(axis=2), axis=1)


def grid_cost(positions: np.ndarray, owner: np.ndarray) -> float:
    """H = sum_i integral_{W_i} ||q - p_i||^2 dq with uniform density (midpoint rule)."""
    return float(np.sum(((GRID - positions[owner]) ** 2).sum(axis=1)) * (1.0 / len(GRID)))


@settings(max_examples=40, deadline=None)
@given(
    seed=st.integers(0, 10_000),
    robots=st.integers(2, 6),
)
def test_gate_condition_lowers_the_cost_at_fixed_cells(seed: int, robots: int) -> None:
    rng = np.random.default_rng(seed)
    positions = rng.uniform(0.05, 0.95, (robots, 2))
    owner = grid_cells(positions)
    centroids = np.array(
        [GRID[owner == i].mean(axis=0) if np.any(owner == i) else positions[i]
         for i in range(robots)]
    )
    names = [f"r{i}" for i in range(robots)]
    gate = ReferenceGate(GateSettings(noise_tolerance=0.0, progress_tolerance=1e-3))
    for name in names:
        gate.add_robot(name)
    gate.offer(dict(zip(names, centroids, strict=True)), dict(zip(names, positions, strict=True)),
               cost=grid_cost(positions, owner), time=0.0)
    # Each robot moves a random fraction of the way to its target (some do not move at all).
    fractions = rng.choice([0.0, 0.3, 1.0], size=robots)
    moved = positions + fractions[:, None] * (centroids - positions)
    for name, p, c in zip(names, moved, centroids, strict=True):
        gate.report(ProgressReport(name, 0, float(np.linalg.norm(p - c))))
    if gate.ready_to_open():
        assert grid_cost(moved, owner) < grid_cost(positions, owner)
    else:
        # Shut only when no robot got closer by the progress tolerance.
        start = np.linalg.norm(positions - centroids, axis=1)
        assert np.all(start * (1 - fractions) > start - 1e-3)
