"""How one MPC sample's nonlinear program gets solved: an ordered chain of strategies.

The formulation (mpc.py) hands over one `NlpInstance` per solve: starting guess, parameters
(measured state, target), bounds and warm-start multipliers. A strategy turns it into an
`Attempt`. The chain tries its strategies in order until one succeeds; a strategy that has
just failed is skipped for the next `hold_samples` calls, because failures come in
stretches (a hard manoeuvre) and a failed attempt costs its whole iteration budget. The last
strategy is never skipped.

The shipped chain: the configured plugin (fatrop by default, its budget capped at
FAST_ITERATION_CAP when a rescue stands behind it), then IPOPT from the same warm start with
RESCUE_ITERATION_FACTOR times the budget (IPOPT is slower but more forgiving far from the
previous solution). A faster path, for example one real-time SQP iteration warm-started
from the shifted plan with an acceptance test on its iterate, slots in as one more
`SolveStrategy` at the front: it reports failure when its iterate is not good enough, and
the chain falls back to the full solves behind it.

Every casadi call runs inside `interrupts.sigint_held()`: casadi turns a Ctrl-C that lands
inside a solver callback into a failed solve, which the controller would treat as a solver
fault and carry on, losing the operator's Ctrl-C.
"""

from __future__ import annotations

import time
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Protocol

import casadi as ca
import numpy as np

from coverage_fleet.control.codegen import compiled_library
from coverage_fleet.interrupts import sigint_held
from coverage_fleet.vehicles.settings import SOLVER_PLUGINS, MpcSettings

#: casadi options each plugin starts from; keys under `mpc.solver.options` in the vehicle
#: file are merged over these (for the configured plugin only, not for the rescue).
SOLVER_DEFAULTS: dict[str, dict[str, Any]] = {
    "ipopt": {
        "print_time": False,
        "ipopt.print_level": 0,
        "ipopt.sb": "yes",
        "ipopt.warm_start_init_point": "yes",
        "ipopt.warm_start_bound_push": 1e-6,
        "ipopt.warm_start_mult_bound_push": 1e-6,
        "ipopt.mu_init": 1e-3,
        "ipopt.tol": 1e-8,
        "ipopt.acceptable_tol": 1e-6,
    },
    "fatrop": {
        "print_time": False,
        "structure_detection": "auto",
        "fatrop.print_level": 0,
        "fatrop.mu_init": 1e-3,
        # fatrop's tolerance is absolute (IPOPT's is scaled); the cost is O(1e3) here.
        "fatrop.tol": 1e-5,
    },
}
if set(SOLVER_DEFAULTS) != set(SOLVER_PLUGINS):
    raise ImportError("SOLVER_DEFAULTS must cover vehicles.settings.SOLVER_PLUGINS exactly")
#: What an `mpc.solver` section that leaves a key out gets.
DEFAULT_PLUGIN = "fatrop"
DEFAULT_MAX_ITER = 100
#: The `mpc.solver` keys read here (the loader checks the section against
#: vehicles.settings.SOLVER_KEYS; test_vehicles_loader checks the two agree).
SOLVER_KEYS: tuple[str, ...] = ("plugin", "max_iter", "options", "compile")
#: fatrop (casadi 3.6-3.8 builds) can stall inside an iteration when equality rows at the
#: terminal stage outnumber the inputs near a converged warm start; with fatrop the terminal
#: equality is therefore imposed as |x_N - x_s| <= this (metres / radians / m/s).
FATROP_EQUALITY_TOLERANCE = 1e-6
#: Plugin that re-solves a sample another plugin failed on, with this many times the
#: iteration budget (a cold start far from the target can need over 100 IPOPT iterations,
#: e.g. the surface vessel).
RESCUE_PLUGIN = "ipopt"
RESCUE_ITERATION_FACTOR = 3
#: After a failure of a strategy, this many calls skip it (see the module docstring).
RESCUE_HOLD_SAMPLES = 10
#: Iteration cap of the configured plugin when a rescue stands behind it (warm-started
#: fatrop needs 5 to 20; a sample that needs more is cheaper to hand over).
FAST_ITERATION_CAP = 40


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


@dataclass(frozen=True)
class ChainResult:
    """The attempt the chain settled on, with the totals over every attempt it made."""

    final: Attempt
    #: The plain status when the first strategy answered alone; otherwise
    #: "name: status; name: status" for every attempt, in order.
    status: str
    iterations: int
    elapsed: float

    @property
    def success(self) -> bool:
        return self.final.success


class SolveStrategy(Protocol):
    name: str

    def attempt(self, instance: NlpInstance) -> Attempt: ...


class NlpsolStrategy:
    """A full solve by one casadi nlpsol plugin."""

    def __init__(self, name: str, solver: ca.Function) -> None:
        self.name = name
        self.solver = solver

    def attempt(self, instance: NlpInstance) -> Attempt:
        arguments: dict[str, Any] = {
            "x0": instance.guess,
            "p": instance.parameters,
            "lbx": instance.lbx,
            "ubx": instance.ubx,
            "lbg": instance.lbg,
            "ubg": instance.ubg,
        }
        if instance.lam_g0 is not None:
            arguments["lam_g0"] = instance.lam_g0
            arguments["lam_x0"] = instance.lam_x0
        started = time.perf_counter()
        with sigint_held():
            result = self.solver(**arguments)
        elapsed = time.perf_counter() - started
        stats = self.solver.stats()
        return Attempt(
            strategy=self.name,
            success=bool(stats.get("success", False)),
            status=str(stats.get("return_status", "failed")),
            iterations=int(stats.get("iter_count", 0)),
            elapsed=elapsed,
            x=np.asarray(result["x"], dtype=float).reshape(-1),
            cost=float(result["f"]),
            lam_x=np.asarray(result["lam_x"], dtype=float).reshape(-1),
            lam_g=np.asarray(result["lam_g"], dtype=float).reshape(-1),
        )


class SolverChain:
    """Strategies tried in order; see the module docstring for the policy."""

    def __init__(self, strategies: Sequence[SolveStrategy], hold_samples: int) -> None:
        if not strategies:
            raise ValueError("a solver chain needs at least one strategy")
        self.strategies = list(strategies)
        self.hold_samples = hold_samples
        self._skip_left = [0] * len(self.strategies)

    def solve(self, instance: NlpInstance) -> ChainResult:
        attempts: list[Attempt] = []
        last = len(self.strategies) - 1
        for index, strategy in enumerate(self.strategies):
            if index < last and self._skip_left[index] > 0:
                self._skip_left[index] -= 1
                continue
            attempt = strategy.attempt(instance)
            attempts.append(attempt)
            if attempt.success:
                break
            if index < last:
                self._skip_left[index] = self.hold_samples
        if len(attempts) == 1 and attempts[0].strategy == self.strategies[0].name:
            status = attempts[0].status
        else:
            status = "; ".join(f"{a.strategy}: {a.status}" for a in attempts)
        return ChainResult(
            final=attempts[-1],
            status=status,
            iterations=sum(a.iterations for a in attempts),
            elapsed=sum(a.elapsed for a in attempts),
        )


def configured_plugin(settings: MpcSettings) -> str:
    return str(settings.solver.get("plugin", DEFAULT_PLUGIN))


def terminal_equality_width(plugin: str) -> float:
    """Half-width of the terminal equality band x_N - x_s in [-w, w] the plugin gets."""
    return FATROP_EQUALITY_TOLERANCE if plugin == "fatrop" else 0.0


def _plugin_options(
    plugin: str, max_iter: int, equality: Sequence[bool], extra: Mapping[str, Any]
) -> dict[str, Any]:
    options = dict(SOLVER_DEFAULTS[plugin])
    options[f"{plugin}.max_iter"] = max_iter
    if plugin == "fatrop":
        options["equality"] = list(equality)
    options.update(extra)
    return options


def build_solver_chain(
    nlp: dict[str, ca.SX], settings: MpcSettings, equality: Sequence[bool]
) -> SolverChain:
    """The chain for an NLP in casadi's {x, p, f, g} form; `equality` flags the rows of g
    that are equalities (fatrop's structure detection needs them)."""
    plugin = configured_plugin(settings)
    budget = int(settings.solver.get("max_iter", DEFAULT_MAX_ITER))
    rescued = plugin != RESCUE_PLUGIN
    options = _plugin_options(
        plugin,
        min(budget, FAST_ITERATION_CAP) if rescued else budget,
        equality,
        settings.solver.get("options", {}),
    )
    name = f"tracking_mpc_{plugin}"
    primary = ca.nlpsol(name, plugin, nlp, options)
    if settings.solver.get("compile", False):
        primary = ca.nlpsol(name, plugin, str(compiled_library(primary)), options)
    strategies: list[SolveStrategy] = [NlpsolStrategy(plugin, primary)]
    if rescued:
        rescue_options = _plugin_options(
            RESCUE_PLUGIN, budget * RESCUE_ITERATION_FACTOR, equality, {}
        )
        rescue = ca.nlpsol(f"tracking_mpc_{RESCUE_PLUGIN}", RESCUE_PLUGIN, nlp, rescue_options)
        strategies.append(NlpsolStrategy(RESCUE_PLUGIN, rescue))
    return SolverChain(strategies, RESCUE_HOLD_SAMPLES)
