"""`coverage-fleet simulate` end to end on the quick demo mission (with some noise): the
trial directory has the documented layout, the report is readable and its numbers agree
with the log, and the same mission with the same seed gives the same log."""

from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np
import pytest
import yaml
from matplotlib import image
from scipy.spatial.distance import pdist

from coverage_fleet.cli.main import main
from coverage_fleet.report import FIGURES

QUICK = Path(__file__).resolve().parents[1] / "config" / "missions" / "solar_row_quick_check.yaml"


@pytest.fixture(scope="module")
def noisy_mission(tmp_path_factory: pytest.TempPathFactory) -> Path:
    raw = yaml.safe_load(QUICK.read_text())
    raw["simulation"].update(measurement_noise_std=0.004, process_noise_std=0.002)
    # The controllers chase the noise: a few times (4 + 2 mm) / 0.1 s (fleet/settling.py).
    raw["settle"]["speed"] = 0.2
    path = tmp_path_factory.mktemp("mission") / "noisy_quick.yaml"
    path.write_text(yaml.safe_dump(raw, sort_keys=False))
    return path


@pytest.fixture(scope="module")
def trials(noisy_mission: Path, tmp_path_factory: pytest.TempPathFactory):
    """Three runs: seed 5 twice, seed 6 once; (directory, stdout, stderr) each."""
    root = tmp_path_factory.mktemp("trials")
    runs = {}
    capture = pytest.MonkeyPatch()
    for label, seed in (("a", 5), ("b", 5), ("c", 6)):
        import io
        import sys

        out, err = io.StringIO(), io.StringIO()
        capture.setattr(sys, "stdout", out)
        capture.setattr(sys, "stderr", err)
        try:
            status = main(["simulate", str(noisy_mission), "--out", str(root / label),
                           "--seed", str(seed)])
        finally:
            capture.undo()
        assert status == 0, err.getvalue()
        runs[label] = (root / label, out.getvalue(), err.getvalue())
    return runs


def read_rows(path: Path) -> list[dict[str, str]]:
    with path.open(newline="") as handle:
        return list(csv.DictReader(handle))


def log_without_timings(directory: Path) -> dict[str, list[dict[str, str]]]:
    """Every CSV of the trial, minus the wall-clock solve times (which vary run to run)."""
    tables = {}
    for path in sorted(directory.rglob("*.csv")):
        rows = read_rows(path)
        for row in rows:
            row.pop("solve_time", None)
        tables[str(path.relative_to(directory))] = rows
    return tables


def test_trial_directory_layout(trials) -> None:
    directory, stdout, stderr = trials["a"]
    names = sorted(str(p.relative_to(directory)) for p in directory.rglob("*") if p.is_file())
    robots = ["rover_a", "rover_b", "rover_c"]
    expected = sorted(
        ["mission.yaml", "fleet.csv", "gate_openings.csv", "violations.csv", "plant_clearance.csv",
         "report/metrics.json", *(f"report/{f}" for f in FIGURES),
         *(f"robots/{r}.csv" for r in robots), *(f"vehicles/{r}.yaml" for r in robots)]
    )
    assert names == expected
    assert not [p for p in directory.parent.iterdir() if p.name.startswith(".")]
    assert f"report: {directory / 'report'}" in stdout
    assert "simulate [" in stderr and "generation" in stderr


def test_mission_as_run_records_seed_and_resolved_paths(trials) -> None:
    directory, _, _ = trials["a"]
    as_run = yaml.safe_load((directory / "mission.yaml").read_text())
    assert as_run["simulation"]["seed"] == 5
    # Self-contained: each robot runs from the trial's own copy of its vehicle file.
    for robot in as_run["roster"]:
        assert robot["vehicle"] == f"vehicles/{robot['name']}.yaml"
        assert (directory / robot["vehicle"]).is_file()


def test_log_has_every_step(trials) -> None:
    directory, _, _ = trials["a"]
    fleet = read_rows(directory / "fleet.csv")
    rover = read_rows(directory / "robots" / "rover_a.csv")
    assert len(fleet) == len(rover) > 10
    assert {"x", "y", "yaw", "forward_speed", "yaw_rate", "target_x", "distance", "closer",
            "solve_time", "status"} <= set(rover[0])
    times = [float(r["time"]) for r in fleet]
    assert np.allclose(np.diff(times), 0.1)


def test_same_seed_same_log_other_seed_other_log(trials) -> None:
    first = log_without_timings(trials["a"][0])
    assert first == log_without_timings(trials["b"][0])
    assert first != log_without_timings(trials["c"][0])


def test_report_numbers_agree_with_the_log(trials) -> None:
    directory, _, _ = trials["a"]
    metrics = json.loads((directory / "report" / "metrics.json").read_text())
    openings = read_rows(directory / "gate_openings.csv")
    assert metrics["generations"] == len({r["generation"] for r in openings})
    assert metrics["limit_violations"] == len(read_rows(directory / "violations.csv"))
    failures = sum(
        r["controller_ran"] == "1" and r["solver_ok"] == "0"
        for path in (directory / "robots").glob("*.csv") for r in read_rows(path)
    )
    assert metrics["solver_failures"] == failures == 0
    assert metrics["settled"] and metrics["settled_time_s"] < 60.0
    # Final cost against a brute-force midpoint-rule evaluation of
    # H = sum_i int_{W_i} ||q - p_i||^2 dq (uniform density 1) at the logged final positions.
    final = np.array([[float(read_rows(p)[-1]["x"]), float(read_rows(p)[-1]["y"])]
                      for p in sorted((directory / "robots").glob("*.csv"))])
    h = 0.02
    xs, ys = np.meshgrid(np.arange(h / 2, 12, h), np.arange(h / 2, 8, h))
    grid = np.column_stack([xs.ravel(), ys.ravel()])
    nearest = ((grid[:, None, :] - final[None, :, :]) ** 2).sum(axis=2).min(axis=1)
    assert metrics["final_cost"] == pytest.approx(nearest.sum() * h * h, rel=1e-3)
    # Closest approach of any two rovers (footprint radius 0.35 m each) with scipy's pdist.
    tracks = [np.array([[float(r["x"]), float(r["y"])] for r in read_rows(p)])
              for p in sorted((directory / "robots").glob("*.csv"))]
    closest = min(pdist(np.array([t[k] for t in tracks])).min() for k in range(len(tracks[0])))
    assert metrics["closest_approach_m"] == pytest.approx(closest, abs=1e-12)
    # The plant's substeps between the ticks are the finer record: the smallest clearance is
    # the least of both, never more than the states' own.
    fine = min(float(r["clearance"]) for r in read_rows(directory / "plant_clearance.csv"))
    assert fine <= closest - 0.7 + 1e-12
    assert metrics["smallest_clearance_m"] == pytest.approx(fine, abs=1e-12)
    assert metrics["clearance_measured_on"] == "plant substeps"
    assert metrics["footprints_overlap"] is (fine < 0)


def test_figures_are_real_images(trials) -> None:
    directory, _, _ = trials["a"]
    for name in FIGURES:
        pixels = image.imread(directory / "report" / name)
        assert pixels.shape[0] > 300 and pixels.shape[1] > 600, name
        assert pixels[..., :3].std() > 0.05, name  # not a blank canvas


def test_ctrl_c_leaves_no_trial_behind(tmp_path: Path) -> None:
    """SIGINT (Ctrl-C) in the middle of a run: status 130 (128 + SIGINT, common practice for
    shells) and no trial directory, complete or partial."""
    import os
    import signal
    import subprocess
    import sys

    script = Path(sys.executable).with_name("coverage-fleet")
    mission = QUICK.parent / "orchard_frost_watch.yaml"
    process = subprocess.Popen(
        [str(script), "simulate", str(mission), "--out", str(tmp_path / "trial")],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
        env={**os.environ, "PYTHONUNBUFFERED": "1"},
    )
    assert process.stderr is not None
    for line in process.stderr:  # wait until the simulation is under way
        if "generation" in line:
            break
    process.send_signal(signal.SIGINT)
    _, err = process.communicate(timeout=120)
    assert process.returncode == 130, err
    assert "interrupted" in err and "Traceback" not in err
    assert list(tmp_path.iterdir()) == []
