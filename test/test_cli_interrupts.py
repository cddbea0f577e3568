"""Ctrl-C at any moment of an offline run ends it with status 130 (128 + SIGINT, common
practice for shells), the word "interrupted", no traceback and nothing written. SIGINT that
lands inside casadi's C code used to be turned into a solver fault and lost, or to surface
as an unrelated error; several moments are tried so that some land mid-solve."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]
MISSION = REPO / "config/missions/orchard_frost_watch.yaml"
SCRIPT = Path(sys.executable).with_name("coverage-fleet")


def interrupt_after_first_progress(args: list[str], delay: float, marker: str) -> tuple[int, str]:
    process = subprocess.Popen(
        [str(SCRIPT), *args],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, cwd=REPO,
        env={**os.environ, "PYTHONUNBUFFERED": "1"},
    )
    assert process.stderr is not None
    for line in process.stderr:
        if marker in line:
            break
    time.sleep(delay)
    process.send_signal(signal.SIGINT)
    _, err = process.communicate(timeout=180)
    return process.returncode, err


@pytest.mark.parametrize("delay", [0.0, 0.01, 0.03, 0.2])
def test_simulate_stops_on_ctrl_c_whenever_it_comes(tmp_path: Path, delay: float) -> None:
    status, err = interrupt_after_first_progress(
        ["simulate", str(MISSION), "--out", str(tmp_path / "trial")], delay, "generation")
    assert status == 130, err[-2000:]
    assert "interrupted" in err and "Traceback" not in err
    assert list(tmp_path.iterdir()) == []


def test_simulate_with_controller_workers_stops_on_ctrl_c(tmp_path: Path) -> None:
    """The workers run in a session of their own; the command stops them in order."""
    status, err = interrupt_after_first_progress(
        ["simulate", str(MISSION), "--workers", "2", "--out", str(tmp_path / "trial")], 0.1,
        "generation")
    assert status == 130, err[-2000:]
    assert "interrupted" in err and "Traceback" not in err
    assert list(tmp_path.iterdir()) == []


def test_batch_stops_on_ctrl_c(tmp_path: Path) -> None:
    summary = tmp_path / "summary.json"
    process = subprocess.Popen(
        [str(SCRIPT), "batch", str(MISSION), "--seeds", "6", "--json", str(summary)],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, cwd=REPO,
        env={**os.environ, "PYTHONUNBUFFERED": "1"},
    )
    assert process.stdout is not None
    process.stdout.readline()  # the table header
    # The first finished run: the local cluster is up and the other runs are under way.
    process.stdout.readline()
    process.send_signal(signal.SIGINT)
    _, err = process.communicate(timeout=180)
    assert process.returncode == 130, err[-2000:]
    assert "Traceback" not in err
    assert not summary.exists()
