"""The settle monitor on its own (fleet/settling.py): dwell, stuck, roster changes, and the
refusal of tolerances that can never settle.

The rule under test: a fleet is settled only when every robot sits within the settle
distance of the centroid of its current cell and is still, with the gate shut, for the
dwell time. A centroidal Voronoi configuration is one where every generator is the mass
centroid of its own cell (Du, Faber & Gunzburger, "Centroidal Voronoi tessellations:
applications and algorithms", SIAM Review 41(4), 1999, sec. 1), so "near its current
centroid" is the definition of a CVT within a tolerance; "still" and "dwell" are common
practice for declaring a closed loop settled.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import yaml

from coverage_fleet.errors import ConfigError
from coverage_fleet.fleet.mission import load_mission
from coverage_fleet.fleet.settling import SettleMonitor, SettleSettings, settle_problems

SETTINGS = SettleSettings(distance=0.1, speed=0.02, dwell=1.0, stuck_timeout=3.0)
MISSIONS = Path(__file__).resolve().parents[1] / "config" / "missions"
ORIGIN = np.zeros(2)


def feed(monitor: SettleMonitor, times, distance: float, speed: float, shut: bool = True):
    """Two robots, both `distance` east of their centroids at `speed`; the statuses."""
    statuses = []
    for t in times:
        positions = {"a": np.array([distance, 0.0]), "b": np.array([5.0 + distance, 0.0])}
        centroids = {"a": ORIGIN, "b": np.array([5.0, 0.0])}
        statuses.append(
            monitor.update(t, positions, {"a": speed, "b": 0.0}, centroids, gate_shut=shut)
        )
    return statuses


def ticks(start: float, stop: float, step: float = 0.1) -> np.ndarray:
    return np.round(np.arange(start, stop + 1e-9, step), 9)


def test_settled_only_after_the_dwell() -> None:
    monitor = SettleMonitor(SETTINGS)
    statuses = feed(monitor, ticks(0.0, 1.0), distance=0.05, speed=0.0)
    assert statuses[:-1] == ["moving"] * 10  # 0.0 .. 0.9 s: the dwell has not passed
    assert statuses[-1] == "settled"  # held from 0.0 to 1.0 s


def test_an_opening_or_a_fast_robot_restarts_the_dwell() -> None:
    monitor = SettleMonitor(SETTINGS)
    feed(monitor, ticks(0.0, 0.8), distance=0.05, speed=0.0)
    assert feed(monitor, [0.9], distance=0.05, speed=0.0, shut=False) == ["moving"]
    assert feed(monitor, ticks(1.0, 1.9), distance=0.05, speed=0.0)[-1] == "moving"
    assert feed(monitor, [2.0], distance=0.05, speed=0.0)[-1] == "settled"
    # One robot faster than the speed tolerance is not settled, whatever its distance.
    assert feed(monitor, [2.1], distance=0.05, speed=0.021) == ["moving"]
    assert feed(monitor, ticks(2.2, 3.1), distance=0.05, speed=0.02)[-1] == "moving"
    assert feed(monitor, [3.2], distance=0.05, speed=0.02) == ["settled"]  # at the tolerance


def test_near_the_targets_but_far_from_the_centroids_is_stuck_not_settled() -> None:
    monitor = SettleMonitor(SETTINGS)
    statuses = feed(monitor, ticks(0.0, 3.0), distance=0.3, speed=0.0)
    assert "settled" not in statuses
    assert statuses[-2] == "moving" and statuses[-1] == "stuck"  # after stuck_timeout
    # Moving again (or the gate opening) ends "stuck".
    assert feed(monitor, [3.1], distance=0.3, speed=0.5) == ["moving"]


def test_a_moving_fleet_is_never_stuck() -> None:
    monitor = SettleMonitor(SETTINGS)
    assert set(feed(monitor, ticks(0.0, 10.0), distance=0.3, speed=0.5)) == {"moving"}
    assert set(feed(monitor, ticks(10.1, 20.0), distance=0.3, speed=0.0, shut=False)) == {
        "moving"
    }


def test_a_roster_change_restarts_the_clocks() -> None:
    monitor = SettleMonitor(SETTINGS)
    feed(monitor, ticks(0.0, 0.9), distance=0.05, speed=0.0)
    one = {"a": np.array([0.05, 0.0])}
    assert monitor.update(1.0, one, {"a": 0.0}, {"a": ORIGIN}, True) == "moving"
    assert monitor.update(2.0, one, {"a": 0.0}, {"a": ORIGIN}, True) == "settled"
    with pytest.raises(ValueError, match="same robots"):
        monitor.update(2.1, one, {"b": 0.0}, {"a": ORIGIN}, True)


def test_with_a_roster_robot_absent_the_rest_is_stuck_never_settled() -> None:
    """Issue 9: with one controller stopped the others were declared at rest. A robot the
    partition left out is not near its centroid, so the fleet cannot be a CVT (Du, Faber &
    Gunzburger 1999, sec. 1: every generator at its cell's centroid)."""
    monitor = SettleMonitor(SETTINGS)
    one = {"a": np.array([0.05, 0.0])}
    statuses = [
        monitor.update(t, one, {"a": 0.0}, {"a": ORIGIN}, True, absent=["b"])
        for t in ticks(0.0, 3.0)
    ]
    assert "settled" not in statuses
    assert statuses[-1] == "stuck"  # the rest still for stuck_timeout
    # Positive control: the same robot with nobody absent settles after the dwell.
    monitor = SettleMonitor(SETTINGS)
    statuses = [monitor.update(t, one, {"a": 0.0}, {"a": ORIGIN}, True) for t in ticks(0.0, 1.0)]
    assert statuses[-1] == "settled"


def test_tolerances_that_can_never_settle_are_refused() -> None:
    # The gate may stay shut with a robot up to progress + noise tolerance from its centroid.
    assert settle_problems(SETTINGS, noise_tolerance=0.02, progress_tolerance=0.05) == []
    tight = SettleSettings(distance=0.06, speed=0.02, dwell=1.0, stuck_timeout=3.0)
    (key, message), = settle_problems(tight, noise_tolerance=0.02, progress_tolerance=0.05)
    assert key == "distance" and "use at least 0.07 m" in message
    # Measurement noise widens what the monitor sees: 4 standard deviations.
    brisk = SettleSettings(distance=0.1, speed=0.5, dwell=1.0, stuck_timeout=3.0)
    (key, message), = settle_problems(brisk, 0.02, 0.05, measurement_noise_std=0.01)
    assert key == "distance" and "use at least 0.11 m" in message
    # Controllers chase noise at about (measurement + process) / sample time.
    wide = SettleSettings(distance=0.5, speed=0.02, dwell=1.0, stuck_timeout=3.0)
    (key, message), = settle_problems(wide, 0.02, 0.05, 0.004, 0.002, sample_time=0.1)
    assert key == "speed" and "0.06 m/s" in message
    early = SettleSettings(distance=0.1, speed=0.02, dwell=5.0, stuck_timeout=3.0)
    assert [k for k, _ in settle_problems(early, 0.02, 0.05)] == ["stuck_timeout"]


def test_a_mission_that_can_never_settle_is_refused_with_file_and_key(tmp_path: Path) -> None:
    raw = yaml.safe_load((MISSIONS / "solar_row_quick_check.yaml").read_text())
    raw["settle"]["distance"] = 0.05
    path = tmp_path / "tight.yaml"
    path.write_text(yaml.safe_dump(raw))
    with pytest.raises(ConfigError) as caught:
        load_mission(path)
    assert f"{path}: settle.distance: 0.05 m can never be reached for sure" in str(caught.value)

