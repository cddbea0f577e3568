"""The gate in closed loop with a car-like robot that starts facing away from its target and
driving away from it (2 m/s): it must brake before it can come back, so for a while it is
farther than its recorded distance while the other robot is already closer. The monotone-
progress condition (Cortes, Martinez, Karatas & Bullo, IEEE T-RA 20(2), 2004; every robot
no farther, one strictly closer) says the gate stays shut all that time and opens only once
the car is back within its recorded distance (plus the noise tolerance)."""

from __future__ import annotations

import numpy as np
import pytest
import yaml

from coverage_fleet.fleet.mission import load_mission
from coverage_fleet.fleet.simulation import simulate_mission
from coverage_fleet.vehicles.base import OdometryValues

MISSION = {
    "name": "car_turnaround",
    "region": {"vertices": [[0.0, 0.0], [12.0, 0.0], [12.0, 8.0], [0.0, 8.0]]},
    "density": {"kind": "uniform"},
    "roster": [
        {"name": "car", "vehicle": "car_like", "initial_pose": [6.0, 4.0, 0.0]},
        {"name": "rover", "vehicle": "differential_drive", "initial_pose": [10.0, 5.0, 3.14]},
    ],
    "gate": {"noise_tolerance": 0.02, "progress_tolerance": 0.05},
    "settle": {"distance": 0.1},
    "simulation": {"duration": 15.0},
}


@pytest.fixture(scope="module")
def turnaround(tmp_path_factory: pytest.TempPathFactory):
    path = tmp_path_factory.mktemp("car") / "car_turnaround.yaml"
    path.write_text(yaml.safe_dump(MISSION))
    mission = load_mission(path)
    moving_away = OdometryValues(x=6.0, y=4.0, yaw=0.0, body_vx=2.0)
    return mission, simulate_mission(mission, initial_poses={"car": moving_away})


def test_gate_stays_shut_while_the_car_is_farther_and_opens_once_it_is_closer(turnaround):
    mission, log = turnaround
    car, rover = log.robots["car"], log.robots["rover"]
    start = log.openings[0]
    target = start.targets["car"]
    # The car's target lies behind it (west), the car drives east.
    assert target[0] < start.positions["car"][0] - 1.0
    allowed = start.distances["car"] + mission.gate.noise_tolerance
    first_opening = log.openings[1]
    assert first_opening.reason == "progress"
    k_open = car.time.index(first_opening.time)
    times = np.array(car.time[:k_open])
    car_distance = np.linalg.norm(car.positions()[:k_open] - target, axis=1)
    # Before the opening there was a stretch where the car was farther than allowed while
    # the rover had already made progress: only the car kept the gate shut.
    held = (car_distance > allowed) & np.array(rover.closer[:k_open])
    assert held.any(), "scenario did not produce a car farther than its recorded distance"
    assert times[held].max() < first_opening.time
    assert np.all(np.array(car.generation[:k_open]) == 0)
    # At the opening the car is back within its recorded distance.
    distance_at_opening = np.linalg.norm(car.positions()[k_open] - target)
    assert distance_at_opening <= allowed
    # And the fleet goes on to rest, without solver failures.
    assert log.settled_time is not None
    assert car.solver_failures() == 0 and rover.solver_failures() == 0


def test_every_opening_respects_the_condition(turnaround):
    """At each progress opening, no robot was farther than its recorded distance."""
    mission, log = turnaround
    tol = mission.gate.noise_tolerance
    for before, opening in zip(log.openings, log.openings[1:], strict=False):
        for name, robot in log.robots.items():
            k = robot.time.index(opening.time)
            now = float(np.linalg.norm(robot.positions()[k] - before.targets[name]))
            assert now <= before.distances[name] + tol + 1e-9, (opening.generation, name)
