"""`coverage-fleet batch`: random initial poses are valid (inside the region with their
footprint, apart by footprints; checked with shapely), and a small batch over the quick
mission prints a table and writes a JSON summary."""

from __future__ import annotations

import json
from itertools import combinations
from pathlib import Path

import numpy as np
import pytest
import shapely

from coverage_fleet.cli.main import main
from coverage_fleet.fleet.batch import random_initial_poses
from coverage_fleet.fleet.mission import load_mission

MISSIONS = Path(__file__).resolve().parents[1] / "config" / "missions"


@pytest.mark.parametrize("mission_file", ["orchard_frost_watch.yaml", "solar_row_quick_check.yaml"])
def test_random_initial_poses_are_valid(mission_file: str) -> None:
    mission = load_mission(MISSIONS / mission_file)
    region = shapely.Polygon(mission.region.vertices)
    radius = {e.name: e.footprint_radius for e in mission.roster}
    for seed in range(30):
        poses = random_initial_poses(mission, np.random.default_rng(seed))
        assert set(poses) == set(mission.robot_names)
        for name, (x, y, heading) in poses.items():
            assert region.contains(shapely.Point(x, y).buffer(radius[name]))
            assert -np.pi <= heading <= np.pi
        for (a, pa), (b, pb) in combinations(poses.items(), 2):
            assert np.hypot(pa[0] - pb[0], pa[1] - pb[1]) >= radius[a] + radius[b]
    again = random_initial_poses(mission, np.random.default_rng(3))
    assert again == random_initial_poses(mission, np.random.default_rng(3))


def test_batch_prints_a_table_and_writes_a_summary(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    summary = tmp_path / "summary.json"
    status = main(["batch", str(MISSIONS / "solar_row_quick_check.yaml"), "--seeds", "2",
                   "--json", str(summary)])
    out = capsys.readouterr().out
    assert status == 0
    lines = out.splitlines()
    assert lines[0].split()[:2] == ["seed", "outcome"]
    assert lines[1].split()[:2] == ["0", "settled"] and lines[2].split()[:2] == ["1", "settled"]
    document = json.loads(summary.read_text())
    assert [run["seed"] for run in document["runs"]] == [0, 1]
    for run in document["runs"]:
        assert run["settled"] and run["solver_failures"] == 0 and run["limit_violations"] == 0
    assert document["summary"]["generations"]["runs"] == 2
    assert not list(tmp_path.glob(".*partial"))


def test_batch_rejects_bad_arguments(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    status = main(["batch", str(MISSIONS / "solar_row_quick_check.yaml"), "--seeds", "0"])
    err = capsys.readouterr().err
    assert status == 2 and "command line: --seeds: must be at least 1, got 0" in err
