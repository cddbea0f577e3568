"""What a solve strategy is given (one sample's NLP instance) and what it returns.

Separate from solver_chain.py so that strategies in their own modules (rti.py) and the chain
share the two records without importing each other.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class NlpInstance:
    """One sample's problem: decision-variable guess, parameters, bounds, and the previous
    multipliers (None for a cold start)."""

    guess: np.ndarray
    parameters: np.ndarray
    lbx: np.ndarray
    ubx: np.ndarray
    lbg: np.ndarray
    ubg: np.ndarray
    lam_x0: np.ndarray | None = None
    lam_g0: np.ndarray | None = None


@dataclass(frozen=True)
class Attempt:
    """What one strategy returned."""

    strategy: str
    success: bool
    status: str
    iterations: int
    #: Wall-clock seconds of the solver call itself.
    elapsed: float
    x: np.ndarray
    cost: float
    lam_x: np.ndarray
    lam_g: np.ndarray
