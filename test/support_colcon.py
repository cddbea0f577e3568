"""A colcon install of a copy of this package, for the tests that need the installed layout
(the colcon layout test, the launch files run by the real launch service)."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]
COLCON = Path(sys.executable).with_name("colcon")


def colcon_install(workspace: Path) -> Path:
    """Build a copy of the package in workspace/src with colcon; returns the install prefix
    of coverage_fleet. Skips the test where colcon is missing."""
    if not COLCON.exists():
        pytest.skip("colcon not installed (scripts/setup_env.sh --test installs it)")
    source = workspace / "src" / "coverage_fleet"
    shutil.copytree(
        REPO,
        source,
        ignore=shutil.ignore_patterns(
            ".git", ".venv", "build", "install", "log", "trials", "*.egg-info", "__pycache__"
        ),
    )
    env = dict(os.environ, PATH=f"{COLCON.parent}{os.pathsep}{os.environ['PATH']}")
    result = subprocess.run(
        [str(COLCON), "build", "--base-paths", "src", "--event-handlers", "console_direct-"],
        cwd=workspace,
        env=env,
        capture_output=True,
        text=True,
        timeout=600,
    )
    assert result.returncode == 0, result.stdout[-3000:] + result.stderr[-3000:]
    return workspace / "install" / "coverage_fleet"
