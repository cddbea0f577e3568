"""A casadi Function evaluated in place on numpy arrays bound to it once.

Calling a casadi Function from Python converts every numpy argument to a casadi matrix and
every result back, element by element: measured on this project's 2-core machines, about
40 us plus 80 ns per element for each argument. For one real-time iteration of the rover's
MPC (eight vectors of 160 to 230 values in, five out) that was about 0.3 ms, more than the
QP solver's own work. casadi's `Function.buffer()` instead reads the arguments from, and
writes the results into, memory the caller owns; the call itself then costs about 1 us.
"""

from __future__ import annotations

from typing import Any

import casadi as ca
import numpy as np


class BufferedFunction:
    """`function` (dense column inputs and outputs, or empty ones) called on arrays bound
    once.

    Every call must give every input (an input left out would silently keep the last
    call's values). The results are views into the bound arrays, overwritten by the next
    call: copy what is kept."""

    def __init__(self, function: ca.Function) -> None:
        self.name = function.name()
        for side, count, sparsity in (
            ("input", function.n_in(), function.sparsity_in),
            ("output", function.n_out(), function.sparsity_out),
        ):
            for index in range(count):
                pattern = sparsity(index)
                empty = pattern.nnz() == 0 and pattern.numel() == 0
                if not (empty or (pattern.is_dense() and pattern.is_column())):
                    raise ValueError(
                        f"{self.name}: {side} {index} must be a dense column, "
                        f"got {pattern.size1()}x{pattern.size2()} with {pattern.nnz()} nonzeros"
                    )
        self._buffer, self._evaluate = function.buffer()
        self._inputs = {
            name: np.zeros(function.nnz_in(index))
            for index, name in enumerate(function.name_in())
        }
        self._outputs = {
            name: np.zeros(function.nnz_out(index))
            for index, name in enumerate(function.name_out())
        }
        for index, array in enumerate(self._inputs.values()):
            self._buffer.set_arg(index, memoryview(array))
        for index, array in enumerate(self._outputs.values()):
            self._buffer.set_res(index, memoryview(array))

    def __call__(self, **arguments: np.ndarray | float) -> dict[str, np.ndarray]:
        if arguments.keys() != self._inputs.keys():
            missing = sorted(set(self._inputs) - set(arguments))
            unknown = sorted(set(arguments) - set(self._inputs))
            raise TypeError(f"{self.name}: missing inputs {missing}, unknown inputs {unknown}")
        for name, value in arguments.items():
            self._inputs[name][:] = value
        self._evaluate()
        return self._outputs

    def stats(self) -> dict[str, Any]:
        """casadi's statistics of the last call (a solver's success, iterations, ...)."""
        return self._buffer.stats()
