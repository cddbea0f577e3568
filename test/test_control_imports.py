"""The control modules import in any order, and the terminal tools do not depend on the MPC
(layering of DEVELOPERS.md: the MPC uses the terminal ingredients, not the other way round).
Each check runs in a fresh interpreter, so no module is already imported (common practice
for import-order checks)."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]

SCRIPT = """
import importlib, json, sys
loaded = {}
for name in sys.argv[1:]:
    importlib.import_module(name)
    loaded[name] = sorted(m for m in sys.modules if m.startswith("coverage_fleet.control."))
print(json.dumps(loaded))
"""


def _import_in_fresh_process(*modules: str) -> dict[str, list[str]]:
    done = subprocess.run(
        [sys.executable, "-c", SCRIPT, *modules],
        capture_output=True, text=True, cwd=REPO, timeout=300,
    )
    assert done.returncode == 0, done.stderr[-3000:]
    return json.loads(done.stdout)


@pytest.mark.parametrize(
    "order",
    [
        ("coverage_fleet.control.mpc", "coverage_fleet.control.terminal"),
        ("coverage_fleet.control.terminal", "coverage_fleet.control.mpc"),
        ("coverage_fleet.control.controller", "coverage_fleet.control.solver_chain"),
        ("coverage_fleet.control.solver_chain", "coverage_fleet.control.controller"),
    ],
)
def test_control_modules_import_in_either_order(order):
    loaded = _import_in_fresh_process(*order)
    assert list(loaded) == list(order)


def test_terminal_tools_do_not_import_the_mpc():
    loaded = _import_in_fresh_process("coverage_fleet.control.terminal")
    assert "coverage_fleet.control.mpc" not in loaded["coverage_fleet.control.terminal"]
    assert "coverage_fleet.control.solver_chain" not in loaded["coverage_fleet.control.terminal"]
