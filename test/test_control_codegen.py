"""Code generation of the MPC's problem functions: same C source as casadi's own
generate_dependencies, compiled without touching the process's working directory."""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import casadi as ca
import pytest

from coverage_fleet.control.codegen import SOURCE_NAME, write_problem_source

REPO = Path(__file__).resolve().parents[1]
HAS_CC = shutil.which(os.environ.get("CC", "cc")) is not None

#: Builds a compiled MPC in a fresh process whose working directory is a scratch folder,
#: and records every os.chdir through Python's audit hooks (PEP 578: "os.chdir" is a
#: documented audit event), which observe the real calls without replacing anything.
SCRIPT = """
import json, os, sys
sys.path.insert(0, sys.argv[1])
changes = []
sys.addaudithook(lambda event, args: changes.append(str(args[0])) if event == "os.chdir" else None)
import numpy as np
from support_control import DoubleIntegratorModel
from coverage_fleet.control.mpc import TrackingMpc
from coverage_fleet.vehicles.settings import MpcSettings
box = (np.array([[1.0, 0], [-1, 0], [0, 1], [0, -1]]), np.full(4, 50.0))
before = os.getcwd()
settings = MpcSettings(horizon=5, solver={"compile": True})
mpc = TrackingMpc(DoubleIntegratorModel(), settings, box)
solution = mpc.solve(np.array([1.0, 1.0, 0.0, 0.0]), np.array([3.0, 2.0]))
print(json.dumps({"before": before, "after": os.getcwd(), "chdir": changes,
                  "success": bool(solution.success), "left_here": sorted(os.listdir("."))}))
"""


@pytest.mark.skipif(not HAS_CC, reason="no C compiler (set CC or install cc)")
def test_compiling_does_not_change_the_working_directory(tmp_path):
    scratch = tmp_path / "cwd"
    scratch.mkdir()
    cache = tmp_path / "cache"
    done = subprocess.run(
        [sys.executable, "-c", SCRIPT, str(Path(__file__).parent)],
        capture_output=True, text=True, cwd=scratch, timeout=600,
        env={**os.environ, "COVERAGE_FLEET_CACHE": str(cache), "PYTHONPATH": str(REPO)},
    )
    assert done.returncode == 0, done.stderr[-3000:]
    seen = json.loads(done.stdout.strip().splitlines()[-1])
    assert seen["chdir"] == []
    assert seen["before"] == seen["after"] == str(scratch)
    assert seen["left_here"] == []
    assert seen["success"]
    # Compiled here, not found cached: the full solve's problem functions and the
    # real-time step's (the default path, `real_time`).
    assert len(list((cache / "mpc").glob("*.so"))) == 2


def test_generated_source_is_what_casadi_generate_dependencies_writes(tmp_path, monkeypatch):
    """Reference: casadi's Function.generate_dependencies (it writes into the working
    directory, so it runs here in a scratch folder). Same bytes means the cache key of
    compiled libraries is the one earlier versions used."""
    x = ca.SX.sym("x", 3)
    p = ca.SX.sym("p", 1)
    nlp = {"x": x, "p": p, "f": ca.sumsqr(x - p), "g": ca.vertcat(x[0] + x[1], x[2] ** 2)}
    solver = ca.nlpsol("probe", "ipopt", nlp, {"print_time": False, "ipopt.print_level": 0})
    ours = write_problem_source(solver, _made(tmp_path / "ours"))
    reference_folder = _made(tmp_path / "reference")
    monkeypatch.chdir(reference_folder)
    solver.generate_dependencies(f"{SOURCE_NAME}.c")
    assert ours.read_bytes() == (reference_folder / f"{SOURCE_NAME}.c").read_bytes()


def _made(folder: Path) -> Path:
    folder.mkdir()
    return folder
