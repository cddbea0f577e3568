"""How one MPC sample's nonlinear program gets solved: an ordered chain of strategies.

The formulation (mpc.py) hands over one `NlpInstance` per solve: starting guess, parameters
(measured state, target), bounds and warm-start multipliers. A strategy turns it into an
`Attempt`. The chain tries its strategies in order until one succeeds; a strategy that has
just failed is skipped for the next `hold_samples` calls, because failures come in
stretches (a hard manoeuvre) and a failed attempt costs its whole iteration budget. The last
strategy is never skipped.

The real-time chain (`mpc.solver.path: real_time`, the default; see vehicles/settings.py):
one real-time SQP iteration from the shifted plan (rti.py), which reports failure when its
iterate fails the acceptance test and is tried again at the next sample (hold 0); then the
full solve by the configured plugin (fatrop by default, its budget capped at
FAST_ITERATION_CAP when a rescue stands behind it; a start that is no shifted plan may run
it again from where the cap stopped it); then IPOPT from the same warm start
with RESCUE_ITERATION_FACTOR times the budget (slower but more forgiving far from the
previous solution). `path: full` drops the first strategy.

The real-time iteration is left out (`needs_shifted_plan`) when the instance's guess is not
the last plan shifted (`NlpInstance.shifted_plan` False): its premise is a guess already
near the optimum, so that one to MAX_STEPS Newton-type steps leave an error second order in
a small step (Diehl, Bock & Schloeder, SIAM J. Control Optim. 43(5), 2005, sec. 4), and its
iterate is neither converged nor exactly feasible (rti.VIOLATION_TOLERANCE per row;
`Attempt.converged` False). mpc.py passes False for the cold start, for the stall restarts
(guesses built from a straight drive or a shunt) and for converging a stalled real-time
answer before the restarts are compared with it by cost. Measured before: a car-like robot
resting 0.17 m beside its target took a restart's iterate, two steps from a shunt guess,
at cost 1.74 against 2.95 for the converged plan to stay (its dynamics defects bought the
sideways move), reversed at -0.6 m/s^2 and crept back, every 15 samples, never still; the
orchard demo's two car-like robots never settled (test_control_real_time_rest.py).

Every casadi call runs inside `interrupts.sigint_held()`: casadi turns a Ctrl-C that lands
inside a solver callback into a failed solve, which the controller would treat as a solver
fault and carry on, losing the operator's Ctrl-C.
"""

from __future__ import annotations

import dataclasses
import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Protocol

import casadi as ca
import numpy as np

from coverage_fleet.control.attempts import Attempt, NlpInstance
from coverage_fleet.control.buffered_call import BufferedFunction
from coverage_fleet.control.codegen import compiled_library
from coverage_fleet.control.rti import (
    LeastSquaresTerm,
    QuadraticRow,
    RealTimeIterationStrategy,
)
from coverage_fleet.control.stage_qp import StageLayout
from coverage_fleet.interrupts import sigint_held
from coverage_fleet.vehicles.settings import (
    QP_PLUGINS,
    SOLVER_PATHS,
    SOLVER_PLUGINS,
    MpcSettings,
)

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
SOLVER_KEYS: tuple[str, ...] = ("plugin", "max_iter", "options", "compile", "path", "qp")
#: What `path` and `qp` default to (vehicles.settings documents both).
DEFAULT_PATH = "real_time"
DEFAULT_QP = QP_PLUGINS[0]
if DEFAULT_PATH not in SOLVER_PATHS:
    raise ImportError("DEFAULT_PATH must be one of vehicles.settings.SOLVER_PATHS")
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
#: Iteration cap of the configured plugin when a rescue stands behind it (fatrop from the
#: shifted plan needs 5 to 20; a sample that needs more is cheaper to hand over). fatrop is
#: warm-started in the primal only: casadi's interface passes it no multipliers (measured:
#: the same iterations with the last solve's, none or random ones).
FAST_ITERATION_CAP = 40
# A start that is no shifted plan gets max_iter // FAST_ITERATION_CAP runs of the capped
# plugin, each from the last one's iterate (NlpsolStrategy's unshifted_runs; the vehicle
# file's budget still bounds it). Why: the cap above is what a sample from the
# shifted plan needs, and a cold start from rest, far from its target and packed among
# neighbours, needs more. Measured (benchmarks/fleet_sim_benchmark.py, 16 mixed robots,
# one process): three of the sixteen cold starts (two surface vessels and a car-like robot)
# stopped at 40 fatrop iterations and went to IPOPT, 77-255 ms each with IPOPT's two
# builds; a second fatrop run from the first's last iterate converged in 12-16 more
# iterations (6-11 ms), and the run's full solves took 0.74 s against 1.37 s. Samples from
# a shifted plan keep one run: there a failure is handed over at the cap, which bounds
# what a failing sample spends before the rescue (the real-time controller's deadline).
#: QP solvers whose memory carries something from one call into the next that changes
#: the answer: measured, two robots alternating on one OSQP real-time step got other
#: answers than the same robots with a step each (with HPIPM bit for bit the same; the
#: cause, presumably OSQP's adaptive step size kept in its workspace, not looked into).
#: Their strategies are not shared between robots (`shareable`).
QP_PLUGINS_WITH_MEMORY = ("osqp",)


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


@dataclass(frozen=True)
class FastProblem:
    """What the real-time path needs beyond the NLP: the cost as r' W r terms, where
    each stage's rows sit, and the dynamics' curvature model (rti.dynamics_curvature)."""

    terms: Sequence[LeastSquaresTerm]
    quadratic_rows: Sequence[QuadraticRow]
    layout: StageLayout
    #: One entry per dynamics row, in their order: the state's increment over one sample
    #: by one RK4 step, F_1(x_k, u_k) - x_k (0 for rows of constant states).
    dynamics_increments: ca.SX
    #: The real-time step's own NLP (same parameters and rows), over the variables `kept`
    #: of the full solve's (the others are 0 in its answers); None: the full solve's NLP.
    nlp: dict[str, ca.SX] | None = None
    kept: np.ndarray | None = None


class SolveStrategy(Protocol):
    name: str
    #: Calls to skip after a failure (None: the chain's hold_samples).
    hold_samples: int | None
    #: Only for a guess that is the last plan shifted (module docstring).
    needs_shifted_plan: bool

    def attempt(self, instance: NlpInstance) -> Attempt: ...


#: fatrop's return flags, in the order of its enum IpSolverReturnFlag (fatrop 1.1.8,
#: include/fatrop/ip_algorithm/ip_algorithm.hpp, shipped with casadi). casadi gives the
#: number as stats()["fatrop"]["return_flag"]; its stats()["return_status"] for fatrop is
#: the C driver's 0 for Success and 1 for every other flag (measured with casadi 3.8.2: a
#: stop at an acceptable point reads return_status 1, return_flag 2).
FATROP_RETURN_FLAGS = (
    "Success",
    "MaxIterExceeded",
    "StopAtAcceptablePoint",
    "LocalInfeasibility",
    "LineSearchFailed",
    "ErrorInStepComputation",
    "Unknown",
)


def plugin_status(plugin: str, stats: Mapping[str, Any]) -> str:
    """The solver's own word for how a solve ended, from casadi's stats: IPOPT's return
    status ("Solve_Succeeded"), fatrop's flag by its name ("MaxIterExceeded"; a number this
    table does not know stays a number, "fatrop flag 9"), "failed" when there is none."""
    if plugin == "fatrop":
        flag = stats.get("fatrop", {}).get("return_flag")
        if isinstance(flag, int | np.integer):
            code = int(flag)
            known = 0 <= code < len(FATROP_RETURN_FLAGS)
            return FATROP_RETURN_FLAGS[code] if known else f"fatrop flag {code}"
    status = stats.get("return_status")
    return "failed" if status is None else str(status)


class NlpsolStrategy:
    """A full solve by one casadi nlpsol plugin."""

    hold_samples: int | None = None
    needs_shifted_plan = False

    def __init__(
        self,
        name: str,
        solver: ca.Function | Callable[[], ca.Function],
        iteration_cap: int | None = None,
        unshifted_runs: int = 1,
    ) -> None:
        """solver: the nlpsol, or a function that builds it at the first attempt (offline:
        the rescue answers few samples, e.g. 25 of 2816 in a 16-robot fleet run, and
        building it was about 30 % of building an MPC problem; on the real-time path many
        problems never need their full solve either: build_strategies).

        iteration_cap, unshifted_runs: a start that is no shifted plan (a cold start, the
        stall restarts: NlpInstance.shifted_plan) whose run stops at iteration_cap runs
        again from that run's last iterate, up to unshifted_runs runs in all (a shifted
        plan always gets one run): FAST_ITERATION_CAP's comment."""
        if unshifted_runs < 1 or (unshifted_runs > 1 and iteration_cap is None):
            raise ValueError("unshifted_runs must be at least 1, and above 1 needs the cap")
        self.name = name
        self._build = None if isinstance(solver, ca.Function) else solver
        self._solver = BufferedFunction(solver) if self._build is None else None
        self._iteration_cap = iteration_cap
        self._unshifted_runs = unshifted_runs

    @property
    def solver(self) -> BufferedFunction:
        if self._solver is None:
            self._solver = BufferedFunction(self._build())
        return self._solver

    def build(self) -> None:
        """Build the solver now when it is built at the first attempt (a no-op once built)."""
        _ = self.solver

    def attempt(self, instance: NlpInstance) -> Attempt:
        answer = self._run(instance)
        runs = 1
        while (
            not instance.shifted_plan
            and not answer.success
            and runs < self._unshifted_runs
            and answer.iterations >= self._iteration_cap
            and np.all(np.isfinite(answer.x))
        ):
            again = self._run(dataclasses.replace(
                instance, guess=answer.x, lam_x0=answer.lam_x, lam_g0=answer.lam_g
            ))
            runs += 1
            answer = dataclasses.replace(
                again,
                status=f"{again.status} after {runs} runs",
                iterations=answer.iterations + again.iterations,
                elapsed=answer.elapsed + again.elapsed,
            )
        return answer

    def _run(self, instance: NlpInstance) -> Attempt:
        n_w, n_g = len(instance.guess), len(instance.lbg)
        cold = instance.lam_g0 is None
        started = time.perf_counter()
        with sigint_held():
            result = self.solver(
                x0=instance.guess,
                p=instance.parameters,
                lbx=instance.lbx,
                ubx=instance.ubx,
                lbg=instance.lbg,
                ubg=instance.ubg,
                # casadi's own default for multipliers left out is 0.
                lam_x0=np.zeros(n_w) if cold else instance.lam_x0,
                lam_g0=np.zeros(n_g) if cold else instance.lam_g0,
            )
        elapsed = time.perf_counter() - started
        stats = self.solver.stats()
        return Attempt(
            strategy=self.name,
            success=bool(stats.get("success", False)),
            status=plugin_status(self.name, stats),
            iterations=int(stats.get("iter_count", 0)),
            elapsed=elapsed,
            x=result["x"].copy(),
            cost=float(result["f"][0]),
            lam_x=result["lam_x"].copy(),
            lam_g=result["lam_g"].copy(),
        )


class VariableSubset:
    """A strategy whose problem has only the variables `kept` (indices) of the instance's
    decision vector (of `size` entries), the others fixed at 0: it is given their part of
    the guess, bounds and multipliers, and its answer has 0 for the others and for their
    bounds' multipliers. For variables that are 0 at the optimum anyway, such as keep-apart
    slacks with no row to relax (mpc.py)."""

    def __init__(self, strategy: SolveStrategy, kept: np.ndarray, size: int) -> None:
        self.strategy = strategy
        self.kept = kept
        self.size = size
        self.name = strategy.name
        self.hold_samples = strategy.hold_samples
        self.needs_shifted_plan = strategy.needs_shifted_plan
        #: The last variable bounds given and their kept part: a problem's bounds are the
        #: same arrays at every sample (mpc.py), so they are cut once.
        self._last_bounds: tuple[np.ndarray, ...] | None = None

    def attempt(self, instance: NlpInstance) -> Attempt:
        kept = self.kept
        last = self._last_bounds
        if last is None or last[0] is not instance.lbx or last[1] is not instance.ubx:
            last = (instance.lbx, instance.ubx, instance.lbx[kept], instance.ubx[kept])
            self._last_bounds = last
        # The records built directly: dataclasses.replace costs more than this whole call
        # on the real-time path (keep-apart solves, README's Performance).
        answer = self.strategy.attempt(NlpInstance(
            guess=instance.guess[kept],
            parameters=instance.parameters,
            lbx=last[2],
            ubx=last[3],
            lbg=instance.lbg,
            ubg=instance.ubg,
            lam_x0=None if instance.lam_x0 is None else instance.lam_x0[kept],
            lam_g0=instance.lam_g0,
            shifted_plan=instance.shifted_plan,
        ))
        x, lam_x = np.zeros(self.size), np.zeros(self.size)
        x[kept], lam_x[kept] = answer.x, answer.lam_x
        return Attempt(
            strategy=answer.strategy,
            success=answer.success,
            status=answer.status,
            iterations=answer.iterations,
            elapsed=answer.elapsed,
            x=x,
            cost=answer.cost,
            lam_x=lam_x,
            lam_g=answer.lam_g,
            converged=answer.converged,
        )


class SolverChain:
    """Strategies tried in order; see the module docstring for the policy."""

    def __init__(
        self,
        strategies: Sequence[SolveStrategy],
        hold_samples: int,
        skip_left: list[int] | None = None,
    ) -> None:
        """skip_left: the calls each strategy is still skipped for, shared with chains
        that stand in for this one (the same problem built for fewer keep-apart rows,
        mpc.py): a failure says the sample is hard, whichever size solved it."""
        if not strategies:
            raise ValueError("a solver chain needs at least one strategy")
        self.strategies = list(strategies)
        self.hold_samples = hold_samples
        if skip_left is None:
            skip_left = [0] * len(self.strategies)
        if len(skip_left) != len(self.strategies):
            raise ValueError("skip_left needs one count per strategy")
        self._skip_left = skip_left

    @property
    def skip_left(self) -> list[int]:
        """The skip counts themselves (not a copy): what a chain standing in for this one
        is built with."""
        return self._skip_left

    def solve(self, instance: NlpInstance) -> ChainResult:
        attempts: list[Attempt] = []
        last = len(self.strategies) - 1
        for index, strategy in enumerate(self.strategies):
            if index < last and strategy.needs_shifted_plan and not instance.shifted_plan:
                continue
            if index < last and self._skip_left[index] > 0:
                self._skip_left[index] -= 1
                continue
            attempt = strategy.attempt(instance)
            attempts.append(attempt)
            if attempt.success:
                break
            if index < last:
                hold = strategy.hold_samples
                self._skip_left[index] = self.hold_samples if hold is None else hold
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


def configured_path(settings: MpcSettings) -> str:
    return str(settings.solver.get("path", DEFAULT_PATH))


def compiles(settings: MpcSettings) -> bool:
    """Whether the problem functions are generated as C and compiled (`compile`, default
    false: a library is built per problem shape, and the region's half-planes are
    constants of the problem, so every new region costs a compile of tens of seconds)."""
    return bool(settings.solver.get("compile", False))


def describe_path(settings: MpcSettings) -> str:
    """One line naming the solver path a chain built from these settings runs (the
    controller says it once at start-up)."""
    plugin = configured_plugin(settings)
    code = "compiled problem functions" if compiles(settings) else "problem functions not compiled"
    if configured_path(settings) == "real_time":
        qp = settings.solver.get("qp", DEFAULT_QP)
        head = f"real-time SQP iteration ({qp} QP), full {plugin} solve when rejected"
    else:
        head = f"full {plugin} solve every sample"
    rescue = f", {RESCUE_PLUGIN} rescue" if plugin != RESCUE_PLUGIN else ""
    return f"MPC solver path: {head}{rescue}; {code}"


def shareable(settings: MpcSettings) -> bool:
    """Whether the strategies `build_strategies` makes for these settings may serve several
    robots (control/shared_problems.py): not with a QP solver that remembers its last
    call (QP_PLUGINS_WITH_MEMORY) on the real-time path."""
    qp = settings.solver.get("qp", DEFAULT_QP)
    return not (configured_path(settings) == "real_time" and qp in QP_PLUGINS_WITH_MEMORY)


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


def build_strategies(
    nlp: dict[str, ca.SX],
    settings: MpcSettings,
    equality: Sequence[bool],
    fast: FastProblem | None = None,
    full_solves_on_first_use: bool = False,
) -> list[SolveStrategy]:
    """The strategies of an NLP's chain, in order; `equality` flags the rows of g that are
    equalities (fatrop's structure detection needs them); `fast` enables the real-time
    path when the settings ask for it; `full_solves_on_first_use`: build the full solve
    and the IPOPT rescue when a sample first needs them (offline runs; a real-time
    controller must not wait 30-130 ms for one at a failure). On the real-time path most
    problems never need their full solve: in benchmarks/fleet_sim_benchmark.py's 16-robot
    run (20 s) 5 of 15 problems (vehicle kinds times keep-apart row budgets) called it,
    and building fatrop's solver is over half of building a problem.

    The strategies hold no state of the robot they solve for (that is the chain's failure
    holds and the formulation's warm start), so the chains of several robots with the same
    problem may share them, one call at a time (control/shared_problems.py): each
    `attempt` copies what it returns out of its solver's bound arrays before it returns,
    and the solvers' memories carry nothing from one call into the next that changes an
    answer (test_control_shared_problems checks a fleet's logs bit for bit)."""
    plugin = configured_plugin(settings)
    budget = int(settings.solver.get("max_iter", DEFAULT_MAX_ITER))
    rescued = plugin != RESCUE_PLUGIN
    extra = settings.solver.get("options", {})
    run_cap = min(budget, FAST_ITERATION_CAP) if rescued else budget
    options = _plugin_options(plugin, run_cap, equality, extra)
    # More runs for a start that is no shifted plan only under the cap set here (a vehicle
    # file that sets the plugin's own max_iter option has chosen its run's budget).
    unshifted_runs = (
        max(1, budget // run_cap) if rescued and f"{plugin}.max_iter" not in extra else 1
    )
    name = f"tracking_mpc_{plugin}"
    compiled = compiles(settings)

    def build_primary() -> ca.Function:
        primary = ca.nlpsol(name, plugin, nlp, options)
        if compiled:
            primary = ca.nlpsol(name, plugin, str(compiled_library(primary)), options)
        return primary

    strategies: list[SolveStrategy] = [
        NlpsolStrategy(
            plugin,
            build_primary if full_solves_on_first_use else build_primary(),
            iteration_cap=run_cap,
            unshifted_runs=unshifted_runs,
        )
    ]
    if configured_path(settings) == "real_time":
        if fast is None:
            raise ValueError("the real-time path needs the cost terms and the stage layout")
        qp = str(settings.solver.get("qp", DEFAULT_QP))
        real_time: SolveStrategy = RealTimeIterationStrategy(
            nlp if fast.nlp is None else fast.nlp, fast.terms, fast.quadratic_rows,
            fast.layout, fast.dynamics_increments, qp, compiled,
        )
        if fast.kept is not None:
            real_time = VariableSubset(real_time, fast.kept, nlp["x"].shape[0])
        strategies.insert(0, real_time)
    if rescued:
        rescue_options = _plugin_options(
            RESCUE_PLUGIN, budget * RESCUE_ITERATION_FACTOR, equality, {}
        )
        def build_rescue() -> ca.Function:
            return ca.nlpsol(f"tracking_mpc_{RESCUE_PLUGIN}", RESCUE_PLUGIN, nlp, rescue_options)

        strategies.append(NlpsolStrategy(
            RESCUE_PLUGIN, build_rescue if full_solves_on_first_use else build_rescue()
        ))
    return strategies
