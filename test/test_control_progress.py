"""Progress bookkeeping (control/progress.py) and the sampled controller (control/sampling.py).

The flags are the reference gate's monotone-progress rule (no farther than at the commit,
plus a noise tolerance; closer by the progress tolerance), from the parallel-axis argument
of Cortes, Martinez, Karatas & Bullo, IEEE T-RA 20(2), 2004, sec. II-C, as stated in
control/gate.py. The zero-order hold between solves is common practice for sampled-data
control (Franklin, Powell & Workman, "Digital Control of Dynamic Systems", 3rd ed., 1998,
sec. 4.3).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from coverage_fleet.control.gate import GateSettings, ProgressReport, ReferenceGate
from coverage_fleet.control.progress import ProgressTracker, judge
from coverage_fleet.fleet.controllers import sampled_controller
from coverage_fleet.fleet.mission import load_mission
from coverage_fleet.fleet.plants import initial_state

MISSIONS = Path(__file__).resolve().parents[1] / "config" / "missions"


@pytest.mark.parametrize(
    ("now", "no_farther", "closer"),
    [(1.0, True, False), (1.02, True, False), (1.0201, False, False), (0.95, True, True),
     (0.9501, True, False)],
)
def test_flags_follow_the_gate_rule(now: float, no_farther: bool, closer: bool) -> None:
    standing = judge(1.0, now, noise_tolerance=0.02, progress_tolerance=0.05)
    assert (standing.no_farther, standing.closer) == (no_farther, closer)


def test_the_gate_judges_with_the_same_rule() -> None:
    settings = GateSettings(noise_tolerance=0.02, progress_tolerance=0.05)
    gate = ReferenceGate(settings)
    gate.add_robot("a")
    gate.offer({"a": np.array([1.0, 0.0])}, {"a": np.zeros(2)}, cost=1.0, time=0.0)
    gate.report(ProgressReport("a", 0, 0.93))
    assert gate.progress()["a"] == judge(1.0, 0.93, 0.02, 0.05)


def test_tracker_records_the_first_distance_and_keeps_it_for_the_same_key() -> None:
    tracker = ProgressTracker(0.02, 0.05)
    assert tracker.observe(np.zeros(2)) is None  # no target yet
    tracker.commit("g1", np.array([3.0, 4.0]))
    first = tracker.observe(np.zeros(2))
    assert first.distance_at_commit == 5.0 and first.no_farther and not first.closer
    later = tracker.observe(np.array([3.0, 0.0]))
    assert later.distance_at_commit == 5.0 and later.distance_now == 4.0 and later.closer
    tracker.commit("g1", np.array([3.0, 4.0]))  # the latched target delivered again
    assert tracker.observe(np.array([3.0, 0.0])).distance_at_commit == 5.0
    tracker.commit("g2", np.array([3.0, 1.0]), distance_at_commit=2.0)  # given by the gate
    assert tracker.observe(np.array([3.0, 0.0])).distance_at_commit == 2.0


def test_sampled_controller_solves_when_due_and_holds_in_between() -> None:
    mission = load_mission(MISSIONS / "solar_row_quick_check.yaml")
    entry = mission.roster[0]
    controller = sampled_controller(entry, mission, sample_tolerance=0.01)
    sample = controller.sample_time
    x = initial_state(entry, entry.initial_pose)
    first = controller.answer(x, 0.0)
    assert first.ran and first.progress is None  # before a target the robot holds position
    controller.set_target(0, entry.vehicle.model.position(x) + np.array([1.0, 0.0]))
    held = controller.answer(x, sample / 2)
    assert not held.ran and np.array_equal(held.input, first.input)
    assert held.progress.distance_at_commit == pytest.approx(1.0)
    # Jitter within the tolerance still counts as a full sample.
    due = controller.answer(x, sample - 0.005)
    assert due.ran and controller.solves == 2
