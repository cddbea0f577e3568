"""Built MPC problems shared by the robots of one process.

Building one problem (the expression graph of the optimal control problem, the full
solver, the real-time SQP step and, with `mpc.solver.compile`, their C libraries) takes
0.1-0.4 s (measured on this project's 2-core machines, the four shipped vehicles with
keep-apart rows), and a robot builds one per keep-apart row budget it reaches
(mpc.CELL_ROW_BUDGETS). In an offline fleet the robots of one vehicle file in one region
build the same problems: sixteen robots of four kinds built 64 problems where 16 differ.
A `SharedProblems` keeps each build for every TrackingMpc given it, keyed by everything
the build reads (`problem_key`), so each problem is built once per process.

What is shared is what a solve only reads: the solver strategies (solver_chain.py, each
copying its answer out of its solver's bound arrays before it returns) and the problem's
bounds and row indices (read-only arrays). What stays with each robot: its solver chain's
failure holds, its warm start and multipliers (mpc.TrackingMpc). The robots of one
`SharedProblems` must solve one at a time (one thread): the strategies' bound arrays are
written by every call. Sharing changes no answer: test_control_shared_problems compares a
fleet's logs with and without it bit for bit.
"""

from __future__ import annotations

import pickle
from collections.abc import Callable
from typing import Any, Generic, TypeVar

import numpy as np

from coverage_fleet.control.ingredients import TerminalIngredients
from coverage_fleet.vehicles.base import VehicleModel
from coverage_fleet.vehicles.settings import MpcSettings

Built = TypeVar("Built")


def problem_key(
    model: VehicleModel,
    settings: MpcSettings,
    region: tuple[np.ndarray, np.ndarray],
    terminal: TerminalIngredients,
    options: tuple[Any, ...],
) -> bytes | None:
    """The bytes that identify a build: the model's class and every attribute but its
    `source` (a model is built from its parameters: vehicles/base.py), the settings, the
    region's half-planes, the terminal ingredients and the caller's `options` (row counts,
    when the rescue is built). Pickled, so equal bytes mean equal values (a float's sign
    and last bit included); None when something does not pickle (then nothing is shared)."""
    model_type = type(model)
    model_values = {name: value for name, value in vars(model).items() if name != "source"}
    try:
        return pickle.dumps(
            (
                model_type.__module__,
                model_type.__qualname__,
                model_values,
                settings,
                [np.ascontiguousarray(a, dtype=float) for a in region],
                terminal,
                options,
            ),
            protocol=pickle.HIGHEST_PROTOCOL,
        )
    except (pickle.PicklingError, TypeError, AttributeError):
        return None


class SharedProblems(Generic[Built]):
    """Builds by key, made on first request (one thread at a time: module docstring)."""

    def __init__(self) -> None:
        self._builds: dict[bytes, Built] = {}
        #: How many builds were made (not found): the tests' and benchmarks' count.
        self.builds = 0

    def get(self, key: bytes | None, build: Callable[[], Built]) -> Built:
        """The build for `key`, made by `build()` the first time (every time for None)."""
        if key is None:
            self.builds += 1
            return build()
        found = self._builds.get(key)
        if found is None:
            found = build()
            self.builds += 1
            self._builds[key] = found
        return found

    def __len__(self) -> int:
        return len(self._builds)
