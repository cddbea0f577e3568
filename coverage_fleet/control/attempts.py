"""What a solve strategy is given (one sample's NLP instance) and what it returns.

Separate from solver_chain.py so that strategies in their own modules (rti.py) and the chain
share the two records without importing each other.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class NlpInstance:
    """One sample's problem: decision-variable guess, parameters, bounds, the previous
    multipliers (None for a cold start), and whether the guess is the last plan shifted
    by one sample (False: a cold start, a stall restart's constructed guess, or an answer
    that must be converged; strategies that rely on a shifted plan,
    `SolveStrategy.needs_shifted_plan`, are then left out: solver_chain.py)."""

    guess: np.ndarray
    parameters: np.ndarray
    lbx: np.ndarray
    ubx: np.ndarray
    lbg: np.ndarray
    ubg: np.ndarray
    lam_x0: np.ndarray | None = None
    lam_g0: np.ndarray | None = None
    shifted_plan: bool = True


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
    #: x is a solution to the solver's tolerance (False: a real-time iterate, a few
    #: Newton-type steps from the guess; its cost is no optimum to compare against).
    converged: bool = True
