"""Where a trial came from: the package's version and git commit, the versions of the
libraries that shape its numbers (Python, casadi, numpy, scipy, shapely) and the command
line. Recorded in every trial's metrics.json and in the metadata of a ROS recording (which
adds the ROS distribution and middleware, see coverage_fleet.ros.recorder_node), so two
trials that disagree can be told apart by what ran them."""

from __future__ import annotations

import platform
import shlex
import subprocess
import sys
from functools import cache
from importlib import metadata
from pathlib import Path

import coverage_fleet

#: Libraries whose version is recorded (distribution names on the package index).
LIBRARIES = ("casadi", "numpy", "scipy", "shapely")


@cache
def git_commit() -> str:
    """The commit of the package's source checkout ("+dirty" with uncommitted changes), or
    "unknown" for an installed copy without git."""
    folder = Path(coverage_fleet.__file__).resolve().parent
    try:
        commit = subprocess.run(
            ["git", "-C", str(folder), "rev-parse", "HEAD"],
            capture_output=True, text=True, timeout=10, check=True,
        ).stdout.strip()
        dirty = subprocess.run(
            ["git", "-C", str(folder), "status", "--porcelain", "--untracked-files=no"],
            capture_output=True, text=True, timeout=10, check=True,
        ).stdout.strip()
    except (OSError, subprocess.SubprocessError):
        return "unknown"
    return f"{commit}+dirty" if dirty else commit


def library_version(name: str) -> str:
    try:
        return metadata.version(name)
    except metadata.PackageNotFoundError:
        return "not installed"


def provenance(command_line: list[str] | None = None) -> dict[str, str]:
    """Flat string mapping (MCAP metadata records hold strings only)."""
    found = {
        "package": "coverage_fleet",
        "package_version": coverage_fleet.__version__,
        "git_commit": git_commit(),
        "python": platform.python_version(),
        "platform": platform.platform(),
    }
    for name in LIBRARIES:
        found[name] = library_version(name)
    found["command_line"] = shlex.join(command_line or _own_command_line())
    return found


def _own_command_line() -> list[str]:
    """This process's command line, with the package's command under its installed name
    (`python -m coverage_fleet.cli.main simulate ...` -> `coverage-fleet simulate ...`)."""
    argv = list(sys.argv)
    if argv and Path(argv[0]).as_posix().endswith(("coverage_fleet/cli/main.py",
                                                   "coverage-fleet")):
        argv[0] = "coverage-fleet"
    return argv
