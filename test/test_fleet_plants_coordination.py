"""Plant stepping with noise (fleet/plants.py) and the base station's gate keeping
(fleet/coordination.py), the pieces the simulator, partition and gate nodes call.

- A multirotor model is a double integrator in the plane with linear drag k: from rest under
  zero input it stays put; under a constant commanded acceleration a it moves
  x(t) = (a/k) t - (a/k^2)(1 - exp(-k t)) (the solution of the first-order linear ODE
  v' = a - k v from rest, e.g. Kreyszig, "Advanced Engineering Mathematics", 10th ed.,
  2011, sec. 1.5), and a t^2 / 2 when k = 0.
- Measurement noise: the sample standard deviation of many draws falls within the 99.9 %
  interval of the chi-square distribution for the configured value (scipy.stats.chi2).
- The gate keeper only counts a robot that acknowledged the current generation, and a
  robot the partition leaves out leaves the gate (roster change) -- the rules stated in
  control/gate.py after Cortes, Martinez, Karatas & Bullo, IEEE T-RA 20(2), 2004.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import yaml
from scipy import stats

from coverage_fleet.control.gate import GateSettings
from coverage_fleet.fleet.coordination import Candidates, GateKeeper, candidates_at
from coverage_fleet.fleet.mission import load_mission, mission_from_mapping
from coverage_fleet.fleet.plants import FleetPlants, NoiseLevels

MISSIONS = Path(__file__).resolve().parents[1] / "config" / "missions"
QUICK = MISSIONS / "solar_row_quick_check.yaml"


def drone_mission():
    raw = yaml.safe_load(QUICK.read_text())
    for robot in raw["roster"]:
        robot["vehicle"] = "multirotor"
    return mission_from_mapping(raw, QUICK)


def test_a_plant_at_rest_stays_and_a_pushed_one_follows_kinematics() -> None:
    mission = drone_mission()
    plants = FleetPlants(mission.roster, 0.1, 10, NoiseLevels(), seed=0)
    name = mission.roster[0].name
    model = mission.roster[0].vehicle.model
    start = model.position(plants.states[name]).copy()
    u = np.zeros(model.nu)
    names = list(model.input_names)
    plants.advance({n: u for n in plants.names})
    assert np.allclose(model.position(plants.states[name]), start, atol=1e-12)
    push = np.zeros(model.nu)
    push[names.index("ax")] = 0.5
    for _ in range(10):
        plants.advance({name: push, **{n: u for n in plants.names if n != name}})
    moved = model.position(plants.states[name]) - start
    assert abs(plants.time - 1.1) < 1e-12
    # 1 s of 0.5 m/s^2 from rest along map x (the planar multirotor has no heading).
    a, k, t = 0.5, model.drag, 1.0
    along = a * t**2 / 2 if k == 0 else a / k * t - a / k**2 * (1 - np.exp(-k * t))
    assert np.allclose(moved, [along, 0.0], atol=1e-6), (moved, along)


def test_a_robot_without_a_command_brakes() -> None:
    mission = load_mission(QUICK)
    plants = FleetPlants(mission.roster, 0.1, 10, NoiseLevels(), seed=0)
    name = plants.names[0]
    braking = plants.braking_input(name)
    assert np.array_equal(plants.applied_input(name, None), braking)


def test_measurement_noise_has_the_configured_spread_and_repeats_within_a_tick() -> None:
    mission = load_mission(QUICK)
    std = 0.05
    plants = FleetPlants(mission.roster, 0.1, 2, NoiseLevels(0.0, std), seed=3)
    name = plants.names[0]
    model = mission.roster[0].vehicle.model
    truth = model.position(plants.states[name])
    first = plants.measure()[name]
    assert np.array_equal(plants.measure()[name], first)  # a re-publication: same values
    errors = []
    for _ in range(400):
        errors.append(model.position(plants.measure()[name]) - truth)
        plants.advance({n: np.zeros(mission.roster[k].vehicle.model.nu)
                        for k, n in enumerate(plants.names)})
        truth = model.position(plants.states[name])
    errors = np.concatenate(errors)
    dof = len(errors) - 1
    low, high = stats.chi2.ppf([0.0005, 0.9995], dof)
    assert low <= dof * np.var(errors, ddof=1) / std**2 <= high
    # The same seed gives the same noise.
    again = FleetPlants(mission.roster, 0.1, 2, NoiseLevels(0.0, std), seed=3)
    assert np.array_equal(again.measure()[name], first)


def candidates(positions: dict[str, list[float]], time: float) -> Candidates:
    mission = load_mission(QUICK)
    found, _ = candidates_at(
        {n: np.array(p) for n, p in positions.items()}, time, mission.region, mission.density
    )
    return found


def test_the_gate_keeper_counts_only_robots_that_acknowledged_the_generation() -> None:
    keeper = GateKeeper(GateSettings(noise_tolerance=0.0, progress_tolerance=0.05))
    start = keeper.offer(candidates({"a": [2.0, 2.0], "b": [8.0, 2.0]}, 0.0))
    assert start.opening is not None and start.joined == ("a", "b")
    targets = start.opening.targets
    # Both move halfway to their targets, but neither has acknowledged generation 0.
    halfway = {n: (np.array(p) + targets[n]) / 2 for n, p in
               {"a": [2.0, 2.0], "b": [8.0, 2.0]}.items()}
    assert keeper.offer(candidates({n: list(p) for n, p in halfway.items()}, 1.0)).opening is None
    keeper.acknowledge("a", 0)
    keeper.acknowledge("b", None)  # b's report names a generation the gate does not know
    assert keeper.offer(candidates({n: list(p) for n, p in halfway.items()}, 1.1)).opening is None
    keeper.acknowledge("b", 0)
    opened = keeper.offer(candidates({n: list(p) for n, p in halfway.items()}, 1.2))
    assert opened.opening is not None and opened.opening.reason == "progress"
    assert opened.opening.cost < start.opening.cost


def test_a_robot_left_out_by_the_partition_leaves_the_gate_and_rejoins() -> None:
    keeper = GateKeeper(GateSettings())
    keeper.offer(candidates({"a": [2.0, 2.0], "b": [8.0, 2.0]}, 0.0))
    without = keeper.offer(candidates({"a": [2.0, 2.0]}, 1.0))
    assert without.left == ("b",) and without.opening.reason == "roster"
    assert set(without.opening.targets) == {"a"}
    back = keeper.offer(candidates({"a": [2.0, 2.0], "b": [8.0, 2.0]}, 2.0))
    assert back.joined == ("b",) and back.opening.reason == "roster"


def test_a_robot_farther_than_at_the_commit_for_the_stall_timeout_is_benched_and_rejoins() -> None:
    """Issue 9: a robot pushed out of the region kept the gate shut for good (nobody may be
    farther for the gate to open, control/gate.py). After stall_timeout it leaves the
    roster so the others get new targets; back within its distance it rejoins."""
    keeper = GateKeeper(GateSettings(noise_tolerance=0.02, progress_tolerance=0.05), 3.0)
    start = {"a": [2.0, 2.0], "b": [8.0, 2.0]}
    opening = keeper.offer(candidates(start, 0.0)).opening
    keeper.acknowledge("a", 0)
    keeper.acknowledge("b", 0)
    target_b = opening.targets["b"]
    pushed = {"a": [2.0, 2.0], "b": [11.9, 7.9]}  # b driven off, a waiting
    assert np.linalg.norm(np.array(pushed["b"]) - target_b) > opening.distances["b"]
    decisions = [keeper.offer(candidates(pushed, t)) for t in (1.0, 2.0, 3.9)]
    assert all(d.opening is None and not d.stalled for d in decisions)  # within the timeout
    benched = keeper.offer(candidates(pushed, 4.0))
    assert [name for name, _ in benched.stalled] == ["b"]
    assert "farther from its target than at the commit" in benched.stalled[0][1]
    # The rest goes on at once: a roster commit for a alone.
    assert benched.opening is not None and benched.opening.reason == "roster"
    assert set(benched.opening.targets) == {"a"}
    assert keeper.offer(candidates(pushed, 5.0)).rejoined == ()  # still far: stays out
    # b back at its place of generation 0: it rejoins, and the next commit includes it.
    back = keeper.offer(candidates(start, 6.0))
    assert back.rejoined == ("b",) and back.joined == ("b",)
    assert back.opening is not None and set(back.opening.targets) == {"a", "b"}


def test_without_a_stall_timeout_a_farther_robot_keeps_the_gate_shut() -> None:
    """The positive control: the default keeper (no timeout) never benches anyone."""
    keeper = GateKeeper(GateSettings())
    keeper.offer(candidates({"a": [2.0, 2.0], "b": [8.0, 2.0]}, 0.0))
    keeper.acknowledge("a", 0)
    keeper.acknowledge("b", 0)
    pushed = {"a": [2.0, 2.0], "b": [11.9, 7.9]}
    assert all(
        keeper.offer(candidates(pushed, t)).opening is None for t in np.arange(1.0, 100.0, 5.0)
    )
