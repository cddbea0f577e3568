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

`thread_builds()` is the one an offline fleet uses by default: kept for the life of the
thread, so the runs of a study (seeds of one mission, fleet sizes and mixes in one region)
build each problem once, not once per run; one per thread, since shared solvers must be
called one at a time (a Dask worker may run tasks on several threads). It keeps the
THREAD_BUILDS_CAPACITY builds used last.
"""

from __future__ import annotations

import pickle
import threading
from collections import OrderedDict
from collections.abc import Callable
from typing import Any, Generic, TypeVar

import numpy as np

from coverage_fleet.control.ingredients import TerminalIngredients
from coverage_fleet.vehicles.base import VehicleModel
from coverage_fleet.vehicles.settings import MpcSettings

Built = TypeVar("Built")

#: Builds `thread_builds()` keeps (the ones used last): a fleet of the four shipped vehicle
#: kinds with keep-apart needs 20 (kinds times row budgets); one build holds 2-4 MB
#: (measured: 51 MB for 20, the full solves not yet built), so at most about 150 MB.
THREAD_BUILDS_CAPACITY = 40


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
    """Builds by key, made on first request (one thread at a time: module docstring);
    with a capacity, the builds used last are kept (a robot keeps its own builds alive)."""

    def __init__(self, capacity: int | None = None) -> None:
        if capacity is not None and capacity < 1:
            raise ValueError(f"capacity must be at least 1, got {capacity}")
        self.capacity = capacity
        self._builds: OrderedDict[bytes, Built] = OrderedDict()
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
            if self.capacity is not None and len(self._builds) > self.capacity:
                self._builds.popitem(last=False)
        else:
            self._builds.move_to_end(key)
        return found

    def __len__(self) -> int:
        return len(self._builds)


_per_thread = threading.local()


def thread_builds() -> SharedProblems:
    """This thread's builds (module docstring), made on first use."""
    builds = getattr(_per_thread, "builds", None)
    if builds is None:
        builds = SharedProblems(THREAD_BUILDS_CAPACITY)
        _per_thread.builds = builds
    return builds
