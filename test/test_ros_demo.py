"""`coverage-fleet demo` runs the main job through the ROS 2 graph: separate node processes
over DDS on loopback (lockstep simulation of the invented orchard mission), recorded into a
trial directory that ends with the report. The cost at the gate's openings must fall
(Cortes, Martinez, Karatas & Bullo, IEEE T-RA 20(2), 2004, with the monotone-progress gate)."""

from __future__ import annotations

import csv
import itertools
import json
import subprocess
import sys
from pathlib import Path

import pytest

pytest.importorskip("rclpy", reason="ROS 2 wheels not installed (scripts/setup_env.sh)")


def test_demo_runs_the_ros_graph_and_ends_with_the_report(tmp_path: Path) -> None:
    out = tmp_path / "demo_trial"
    result = subprocess.run(
        [sys.executable, "-m", "coverage_fleet.cli.main", "demo", "--out", str(out)],
        capture_output=True, text=True, timeout=600,
    )
    output = result.stdout + result.stderr
    assert result.returncode == 0, output[-3000:]
    assert "ROS 2 graph" in output
    assert "Safety:" in output
    assert output.count("/controller ") == 7, output[:3000]
    metrics = json.loads((out / "report" / "metrics.json").read_text())
    assert metrics["settled"], output[-3000:]
    assert metrics["limit_violations"] == 0, output[-3000:]
    assert sorted(p.name for p in (out / "report").glob("*.png"))
    with (out / "gate_openings.csv").open(newline="") as handle:
        costs = {int(r["generation"]): float(r["cost"]) for r in csv.DictReader(handle)}
    ordered = [costs[g] for g in sorted(costs)]
    assert len(ordered) > 10
    assert all(b < a for a, b in itertools.pairwise(ordered))
