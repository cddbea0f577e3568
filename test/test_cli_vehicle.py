"""`coverage-fleet vehicle` reports good files and lists every problem of a bad one."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]


def run_cli(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-m", "coverage_fleet.cli.main", *args],
        capture_output=True,
        text=True,
        cwd=REPO,
        timeout=120,
    )


def test_every_sample_vehicle_file_checks_out() -> None:
    files = sorted(str(p) for p in (REPO / "config/vehicles").glob("*.yaml"))
    assert len(files) == 4
    result = run_cli("vehicle", *files)
    assert result.returncode == 0, result.stderr
    for name in ("differential_drive", "car_like", "multirotor", "surface_vessel"):
        assert name in result.stdout


def test_bad_vehicle_file_exits_2_naming_file_and_key(tmp_path: Path) -> None:
    bad = tmp_path / "bad_rover.yaml"
    text = (REPO / "config/vehicles/differential_drive.yaml").read_text()
    bad.write_text(text.replace("max_speed: 1.0", "max_speed: -1.0"))
    assert "max_speed: -1.0" in bad.read_text()
    result = run_cli("vehicle", str(bad))
    assert result.returncode == 2
    assert str(bad) in result.stderr
    assert "vehicle.max_speed" in result.stderr
    assert "Traceback" not in result.stderr
