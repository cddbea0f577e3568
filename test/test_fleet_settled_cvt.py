"""Settled means settled: when an offline run reports the fleet settled (noise-free), the
fleet sits at a centroidal Voronoi configuration (CVT) and nobody is still moving.

Missions: both demo missions and five random convex missions (random regions, Gaussian or
raster densities, mixed vehicle types; seeds fixed; three robots and short durations to keep
the suite quick).

What is checked, and against what:
- the CVT gap is below 1 %: Lloyd's iteration started from the settled positions lowers the
  coverage cost by less than 1 %. A CVT is exactly a fixed point of Lloyd's iteration
  (Lloyd, "Least squares quantization in PCM", IEEE Trans. Inf. Theory 28(2), 1982; Du,
  Faber & Gunzburger, "Centroidal Voronoi tessellations: applications and algorithms",
  SIAM Review 41(4), 1999, sec. 5.2), so the gap is 0 there and grows with the distance
  from one. Checked twice: the figure the report writes (the project's partition), and an
  independent Lloyd's iteration on a grid (cells by brute-force nearest-robot assignment,
  midpoint rule), which must agree with it to 0.2 percentage points;
- at the settled time, and over the dwell before it, every robot is slower than the speed
  tolerance: instantaneous planar speed from the logged states and applied inputs, and net
  displacement over the dwell no more than speed x dwell (from the positions alone);
- the threshold of 1 % is our own acceptance figure (the issue's); the 1e-6 m / 5000
  iteration stopping rule of the gap is the project's.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from scipy.spatial import ConvexHull

from coverage_fleet.fleet.mission import Mission, load_mission, mission_from_mapping
from coverage_fleet.fleet.simulation import simulate_mission
from coverage_fleet.fleet.trial import TrialLog
from coverage_fleet.report.metrics import trial_metrics

MISSIONS = Path(__file__).resolve().parents[1] / "config" / "missions"
DEMOS = ("solar_row_quick_check", "orchard_frost_watch")
RANDOM_SEEDS = (11, 12, 13, 14, 15)
#: Car-like robots are left out here: one whose centroid lies inside its turning circle can
#: stop short of it and the run ends "stuck" (test_control_gate_car_like covers them).
VEHICLES = ("differential_drive", "multirotor", "surface_vessel")
GRID_SPACING = 0.05  # m


def random_mission(seed: int) -> Mission:
    """A random convex region of roughly 8 x 6 m to 12 x 9 m, a Gaussian-bump or raster
    density, and three robots of different vehicle types at random poses inside."""
    rng = np.random.default_rng(seed)
    width, height = rng.uniform(8.0, 12.0), rng.uniform(6.0, 9.0)
    points = rng.uniform([0.0, 0.0], [width, height], size=(12, 2))
    vertices = points[ConvexHull(points).vertices]
    if seed % 2:
        bumps = [
            {
                "weight": float(rng.uniform(1.0, 3.0)),
                "mean": [float(rng.uniform(0.2, 0.8) * width),
                         float(rng.uniform(0.2, 0.8) * height)],
                "covariance": [[float(rng.uniform(2.0, 6.0)), 0.0],
                               [0.0, float(rng.uniform(2.0, 6.0))]],
            }
            for _ in range(2)
        ]
        density = {"kind": "gaussian_bumps", "background": 0.02, "bumps": bumps}
    else:
        values = rng.uniform(0.2, 2.0, size=(5, 6))
        resolution = max(width, height) / 5.0 + 0.5
        density = {"kind": "raster", "values": values.tolist(), "origin": [-0.5, -0.5],
                   "resolution": float(resolution)}
    kinds = rng.choice(VEHICLES, size=3, replace=False)
    roster, placed = [], []
    hull = ConvexHull(vertices)
    while len(roster) < 3:
        xy = rng.uniform([0.0, 0.0], [width, height])
        inside = np.all(hull.equations[:, :2] @ xy + hull.equations[:, 2] <= -1.0)
        if inside and all(np.linalg.norm(xy - other) > 1.5 for other in placed):
            placed.append(xy)
            roster.append({
                "name": f"robot_{len(roster)}",
                "vehicle": str(kinds[len(roster)]),
                "initial_pose": [float(xy[0]), float(xy[1]), float(rng.uniform(-3.0, 3.0))],
            })
    raw = {
        "name": f"random_convex_{seed}",
        "region": {"vertices": vertices.tolist()},
        "density": density,
        "roster": roster,
        # Noise-free: no slack for slipping back; the settle distance is the smallest the
        # gate allows (progress + noise tolerance) with room for the cells' own motion.
        "gate": {"noise_tolerance": 0.0, "progress_tolerance": 0.02},
        "settle": {"distance": 0.05, "speed": 0.02, "dwell": 2.0, "stuck_timeout": 10.0},
        "simulation": {"duration": 60.0, "seed": seed, "plant_substeps": 8},
    }
    return mission_from_mapping(raw, Path(f"random_convex_{seed}.yaml"))


def mission_for(label: str) -> Mission:
    if label in DEMOS:
        return load_mission(MISSIONS / f"{label}.yaml")
    return random_mission(int(label.removeprefix("random_")))


@pytest.fixture(
    scope="module", params=[*DEMOS, *(f"random_{s}" for s in RANDOM_SEEDS)]
)
def settled_run(request: pytest.FixtureRequest) -> tuple[Mission, TrialLog]:
    mission = mission_for(request.param)
    return mission, simulate_mission(mission)


def grid_lloyd_gap(mission: Mission, positions: np.ndarray) -> float:
    """CVT gap by Lloyd's iteration on a grid: cells by nearest robot, centroids and cost
    by the midpoint rule, independent of the project's partition code."""
    x0, y0, x1, y1 = mission.region.bounds
    xs = np.arange(x0 + GRID_SPACING / 2, x1, GRID_SPACING)
    ys = np.arange(y0 + GRID_SPACING / 2, y1, GRID_SPACING)
    grid = np.stack(np.meshgrid(xs, ys), axis=-1).reshape(-1, 2)
    grid = grid[mission.region.contains(grid)]
    weight = mission.density.evaluate(grid) * GRID_SPACING**2

    def cells(p: np.ndarray) -> tuple[np.ndarray, float]:
        squared = ((grid[:, None, :] - p[None, :, :]) ** 2).sum(axis=2)
        owner = np.argmin(squared, axis=1)
        cost = float(np.sum(weight * squared[np.arange(len(grid)), owner]))
        return owner, cost

    p = positions.copy()
    owner, start = cells(p)
    cost = start
    for _ in range(5000):
        centroids = np.array([
            np.average(grid[owner == i], axis=0, weights=weight[owner == i])
            for i in range(len(p))
        ])
        step = np.linalg.norm(centroids - p, axis=1).max()
        p = centroids
        owner, cost = cells(p)
        if step < 1e-6:
            break
    return (start - cost) / start


def test_settled_configuration_has_a_cvt_gap_below_one_percent(settled_run) -> None:
    mission, log = settled_run
    assert log.outcome == "settled", (log.outcome, log.time[-1])
    metrics = trial_metrics(log, mission.region, mission.density)
    assert metrics["lloyd_converged"]
    assert 0.0 <= metrics["cvt_gap"] < 0.01
    final = np.array([robot.positions()[-1] for robot in log.robots.values()])
    independent = grid_lloyd_gap(mission, final)
    assert independent < 0.01
    assert abs(independent - metrics["cvt_gap"]) < 0.002


def test_never_settled_while_a_robot_moves(settled_run) -> None:
    mission, log = settled_run
    settle = mission.settle
    assert log.settled_time is not None
    end = len(log.time) - 1
    assert log.time[end] == pytest.approx(log.settled_time)
    first = int(np.searchsorted(log.time, log.settled_time - settle.dwell - 1e-9))
    for entry in mission.roster:
        robot = log.robots[entry.name]
        model = entry.vehicle.model
        for k in range(max(first, 1), end + 1):
            # The input applied over the tick that ends at k (decided at k - 1).
            odometry = model.odometry_from_state(robot.state[k], robot.input[k - 1])
            assert np.hypot(odometry.body_vx, odometry.body_vy) <= settle.speed + 1e-9
        positions = robot.positions()
        moved = np.linalg.norm(positions[end] - positions[first])
        assert moved <= settle.speed * (log.time[end] - log.time[first]) + 1e-9
