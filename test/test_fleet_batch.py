"""`coverage-fleet batch`: random initial poses are valid (inside the region with their
footprint, apart by footprints; checked with shapely), a small batch over the quick
mission prints a table and writes a JSON summary, runs on a local cluster and on an
existing Dask cluster give exactly the serial results, and bad placement options are
reported on the command line's terms."""

from __future__ import annotations

import json
import os
import signal
import socket
import subprocess
import sys
import textwrap
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
                   "--json", str(summary), "--workers", "1"])
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


#: Fields that measure time on the machine rather than the run (common practice: a seeded
#: simulation is a pure function of its inputs; wall-clock figures are not).
TIMING_FIELDS = ("wall_time_s", "solve_time")

PLACEMENT_SCRIPT = textwrap.dedent("""
    import json, sys
    from distributed import LocalCluster
    from coverage_fleet.fleet.batch import run_batch
    from coverage_fleet.fleet.mission import load_mission
    from coverage_fleet.fleet.parallel import Placement

    if __name__ == "__main__":
        mission = load_mission(sys.argv[1])
        seeds, duration = [3, 4], 3.0
        serial = run_batch(mission, seeds, duration, placement=Placement(workers=1))
        local = run_batch(mission, seeds, duration, placement=Placement(workers=2))
        # An existing cluster on loopback, reached by its address like a user's.
        with LocalCluster(n_workers=1, threads_per_worker=1, host="127.0.0.1",
                          dashboard_address=None, silence_logs=50) as cluster:
            existing = run_batch(mission, seeds, duration,
                                 placement=Placement(scheduler=cluster.scheduler_address))
        print(json.dumps({"serial": serial, "local": local, "existing": existing}))
""")


def test_batch_gives_the_serial_results_on_a_local_and_an_existing_cluster() -> None:
    """Two seeds of the quick mission, serially in one process, on a local cluster of two
    worker processes, and on a Dask cluster reached by its tcp://127.0.0.1 address: the
    per-seed results are identical (timing fields aside). BLAS threads are pinned to one
    in every process, as the local cluster does for its workers."""
    env = dict(os.environ, OMP_NUM_THREADS="1", OPENBLAS_NUM_THREADS="1",
               MKL_NUM_THREADS="1")
    done = subprocess.run(
        [sys.executable, "-c", PLACEMENT_SCRIPT, str(MISSIONS / "solar_row_quick_check.yaml")],
        capture_output=True, text=True, env=env, timeout=900, check=False)
    assert done.returncode == 0, done.stderr[-3000:]
    results = json.loads(done.stdout.strip().splitlines()[-1])

    def without_timing(rows: list[dict]) -> list[dict]:
        return [{k: v for k, v in row.items() if k not in TIMING_FIELDS} for row in rows]

    serial = without_timing(results["serial"])
    assert [row["seed"] for row in serial] == [3, 4]
    assert serial[0] != serial[1]  # different seeds, different runs
    assert without_timing(results["local"]) == serial
    assert without_timing(results["existing"]) == serial


def free_loopback_port() -> int:
    """A port on 127.0.0.1 that nothing listens on (bound, then released)."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


@pytest.mark.parametrize(
    ("arguments", "message"),
    [
        (["--workers", "0"], "command line: --workers: must be at least 1, got 0"),
        (["--scheduler", "somewhere"], "command line: --scheduler: must be a scheduler "
                                       "address tcp://HOST:PORT"),
        (["--scheduler", "tcp://127.0.0.1:70000"], "command line: --scheduler: port must "
                                                   "be 1..65535"),
        (["--scheduler", "tcp://127.0.0.1:8786", "--workers", "2"],
         "command line: --workers: cannot be combined with --scheduler"),
        (["--scheduler", "tcp://127.0.0.1:{free}"],
         "command line: --scheduler: cannot reach a Dask scheduler at tcp://127.0.0.1:"),
    ],
)
def test_batch_rejects_bad_placement(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], arguments: list[str], message: str
) -> None:
    arguments = [a.format(free=free_loopback_port()) for a in arguments]
    status = main(["batch", str(MISSIONS / "solar_row_quick_check.yaml"), "--seeds", "1",
                   "--duration", "1", "--json", str(tmp_path / "out.json"), *arguments])
    err = capsys.readouterr().err
    assert status == 2
    assert message in err
    assert "Traceback" not in err
    assert not (tmp_path / "out.json").exists()


@pytest.mark.parametrize("moment", ["cluster starting", "runs under way"])
def test_ctrl_c_in_a_terminal_stops_a_batch_on_a_local_cluster(tmp_path: Path,
                                                               moment: str) -> None:
    """A terminal's Ctrl-C goes to the whole foreground process group: while the local
    cluster starts or once runs are under way, the batch ends with status 130 (128 +
    SIGINT, common practice for shells), the word "interrupted", no traceback from any
    process and no summary."""
    summary = tmp_path / "summary.json"
    process = subprocess.Popen(
        [sys.executable, "-m", "coverage_fleet.cli.main", "batch",
         str(MISSIONS / "solar_row_quick_check.yaml"), "--seeds", "6", "--workers", "2",
         "--json", str(summary)],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, start_new_session=True,
        env={**os.environ, "PYTHONUNBUFFERED": "1"},
    )
    assert process.stderr is not None
    seen = []
    for line in process.stderr:  # the cluster is starting, or a worker finished a run
        seen.append(line)
        if ("runs on" in line) if moment == "cluster starting" else ("done" in line):
            break
    os.killpg(process.pid, signal.SIGINT)
    _, err = process.communicate(timeout=300)
    err = "".join(seen) + err
    assert process.returncode == 130, err[-3000:]
    assert "interrupted" in err and "Traceback" not in err
    assert not summary.exists()
