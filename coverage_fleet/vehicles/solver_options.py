"""Solver options from a vehicle file (`mpc.solver.options`), checked when the file loads.

casadi checks option names and types only when a solver is built, which happens when a
controller starts (a late RuntimeError, after the rest of the run was set up). Here each
option is tried alone on a one-variable problem with the chosen plugin, and the faults
casadi reports for options (an unknown name, a wrong type, an option IPOPT does not know)
become problems of the file. Other complaints about the tiny problem say nothing about the
option and are left to the real problem.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import casadi as ca

from coverage_fleet.interrupts import sigint_held

#: casadi's wording of option faults (casadi 3.8 sources: core/options.cpp,
#: core/generic_type.cpp, interfaces/ipopt/ipopt_interface.cpp; from memory) -> ours.
_OPTION_FAULTS = (
    ("Unknown option", "unknown option for the {plugin} solver"),
    ("No such IPOPT option", "unknown IPOPT option"),
    ("Illegal type", "wrong type for this option ({detail})"),
    ("type mismatch", "wrong type for this option"),
)


def solver_option_problems(plugin: str, options: Mapping[str, Any]) -> list[tuple[str, str]]:
    """(option name, message) for every option the plugin refuses."""
    x = ca.SX.sym("x")
    problem = {"x": x, "f": x * x}
    found = []
    for name, value in options.items():
        try:
            with sigint_held():
                ca.nlpsol("option_check", plugin, problem, {name: value})
        except RuntimeError as error:
            text = str(error)
            for marker, message in _OPTION_FAULTS:
                if marker in text:
                    detail = next((ln.strip() for ln in text.splitlines() if marker in ln), "")
                    found.append((name, message.format(plugin=plugin, detail=detail)))
                    break
    return found
