"""Density updates at run time: a new density makes the gate commit a fresh generation with
reason "density", and the fleet settles at a centroidal Voronoi configuration (CVT) of the
new density.

Outside references: a CVT is a fixed point of Lloyd's iteration (Lloyd, "Least squares
quantization in PCM", IEEE Trans. Inf. Theory 28(2), 1982; Du, Faber & Gunzburger,
"Centroidal Voronoi Tessellations", SIAM Review 41(4), 1999, sections 1 and 5.2), so
Lloyd's iteration (fleet/lloyd.py, checked against those sources in test_fleet_lloyd)
started at the settled positions must barely move them and barely lower the cost; the cost
falls at every opening of one density (Cortes, Martinez, Karatas & Bullo, IEEE T-RA 20(2),
2004, with the gate's monotone-progress condition). The occupancy grid layout (row-major,
row 0 at the origin, -1 unknown, 0..100) is the one nav_msgs/OccupancyGrid documents.
"""

from __future__ import annotations

import itertools
from pathlib import Path

import numpy as np
import pytest

from coverage_fleet.control.gate import GateSettings
from coverage_fleet.errors import ConfigError
from coverage_fleet.fleet.coordination import Candidates, GateKeeper
from coverage_fleet.fleet.density_updates import occupancy_density
from coverage_fleet.fleet.lloyd import lloyd
from coverage_fleet.fleet.mission import mission_from_mapping
from coverage_fleet.fleet.simulation import simulate_mission
from coverage_fleet.geometry.region import ConvexRegion

UPDATE_TIME = 4.0
#: Invented rehearsal (a yard whose risk map is revised at UPDATE_TIME: a spill in the
#: north-east corner).
NEW_DENSITY = {
    "kind": "gaussian_bumps", "background": 0.01,
    "bumps": [{"weight": 4.0, "mean": [9.5, 6.0], "covariance": [[4.0, 0.0], [0.0, 3.0]]}],
}


def rehearsal(updates=None) -> dict:
    return {
        "name": "yard_spill_rehearsal",
        "region": {"vertices": [[0, 0], [12, 0], [12, 8], [0, 8]]},
        "density": {"kind": "uniform"},
        "density_updates": updates if updates is not None else [
            {"time": UPDATE_TIME, "density": NEW_DENSITY}],
        "roster": [
            {"name": "rover_a", "vehicle": "differential_drive", "initial_pose": [2.0, 2.0, 0.0]},
            {"name": "rover_b", "vehicle": "differential_drive", "initial_pose": [4.0, 2.0, 1.57]},
            {"name": "rover_c", "vehicle": "differential_drive", "initial_pose": [2.0, 4.0, 0.0]},
        ],
        "settle": {"distance": 0.1},
        "simulation": {"duration": 70.0, "seed": 1, "plant_substeps": 8},
    }


def test_density_update_starts_a_generation_and_the_fleet_settles_at_the_new_cvt(
    tmp_path: Path,
) -> None:
    mission = mission_from_mapping(rehearsal(), tmp_path / "rehearsal.yaml")
    log = simulate_mission(mission)
    reasons = [o.reason for o in log.openings]
    assert reasons.count("density") == 1
    k = reasons.index("density")
    change = log.openings[k]
    assert UPDATE_TIME <= change.time < UPDATE_TIME + 0.5
    # Monotone decrease holds before the change and again after it (another phi).
    before, after = log.openings[1:k], log.openings[k + 1:]
    assert before and after
    assert all(b.cost < a.cost for a, b in itertools.pairwise(before))
    assert all(b.cost < a.cost for a, b in itertools.pairwise([change, *after]))
    assert log.outcome == "settled" and log.settled_time > change.time

    new_density = mission.density_updates[0].density
    final = np.array([robot.positions()[-1] for robot in log.robots.values()])
    reference = lloyd(final, mission.region, new_density, max_iterations=200, tolerance=1e-6)
    assert reference.converged
    # Lloyd from the settled positions barely moves them: a CVT of the new density. Each
    # robot is within settle.distance (0.1 m) of its cell's centroid; Lloyd's iteration
    # converges slowly along flat directions of the cost (Du, Faber & Gunzburger 1999,
    # section 5.2), so its fixed point may lie a few settle distances away (measured:
    # 0.19 m) while the cost it still finds is tiny (measured: 0.06 %).
    assert np.abs(reference.positions[-1] - final).max() < 3 * mission.settle.distance
    assert reference.costs[-1] > 0.99 * reference.costs[0]
    # ... and not one of the old density (the update was not ignored).
    old = lloyd(final, mission.region, mission.density, max_iterations=200, tolerance=1e-6)
    assert np.abs(old.positions[-1] - final).max() > 1.0


def test_gate_keeper_commits_new_density_version_even_when_nobody_progressed() -> None:
    keeper = GateKeeper(GateSettings())

    def candidates(version: int) -> Candidates:
        at = {"a": np.array([1.0, 1.0]), "b": np.array([3.0, 1.0])}
        return Candidates(0.0, 5.0, at, {n: p + 1.0 for n, p in at.items()},
                          {"a": 1.0, "b": 1.0}, density_version=version)

    assert keeper.offer(candidates(0)).opening.reason == "start"
    for name in ("a", "b"):
        keeper.acknowledge(name, 0)
    assert keeper.offer(candidates(0)).opening is None  # nobody moved: shut
    assert keeper.offer(candidates(1)).opening.reason == "density"
    assert keeper.offer(candidates(1)).opening is None


def test_occupancy_rule_unknown_and_linear() -> None:
    region = ConvexRegion.from_vertices([[0, 0], [4, 0], [4, 2], [0, 2]])
    cells = np.array([[0, 50], [100, -1]], dtype=np.int8)  # row 0 at the origin (south)
    density = occupancy_density(cells, (0.0, 0.0), 1.0, region, unknown_density=0.3)
    got = density.evaluate(np.array([[0.5, 0.5], [1.5, 0.5], [0.5, 1.5], [1.5, 1.5],
                                     [3.0, 1.0]]))
    np.testing.assert_allclose(got, [0.0, 0.5, 1.0, 0.3, 0.3])
    with pytest.raises(ValueError, match=r"outside -1\.\.100"):
        occupancy_density(np.array([[101]]), (0.0, 0.0), 1.0, region)
    with pytest.raises(ValueError, match="no mass"):
        occupancy_density(np.zeros((4, 8)), (0.0, 0.0), 0.5, region, unknown_density=0.0)


@pytest.mark.parametrize(
    ("updates", "key", "fragment"),
    [
        ([{"time": 5.0, "density": NEW_DENSITY}, {"time": 5.0, "density": NEW_DENSITY}],
         "density_updates[1].time", "later than"),
        ([{"time": 500.0, "density": NEW_DENSITY}], "density_updates[0].time", "duration"),
        ([{"time": 5.0}], "density_updates[0].density", "is required"),
        ([{"time": 5.0, "density": {"kind": "plaid"}}], "density_updates[0].density.kind",
         "must be one of"),
        ([{"time": 5.0, "density": NEW_DENSITY, "at": 3}], "density_updates[0].at",
         "unknown key"),
        ([], "density_updates", "non-empty list"),
    ],
)
def test_bad_density_updates_are_refused(tmp_path: Path, updates, key, fragment) -> None:
    with pytest.raises(ConfigError) as info:
        mission_from_mapping(rehearsal(updates), tmp_path / "m.yaml")
    assert any(p.key == key and fragment in p.message for p in info.value.problems), [
        str(p) for p in info.value.problems]
