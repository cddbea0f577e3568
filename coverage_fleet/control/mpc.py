"""Tracking MPC with an artificial steady state, for any VehicleModel.

Formulation (Limon, Alvarado, Alamo & Camacho, "MPC for tracking piecewise constant
references for constrained linear systems", Automatica 44(9), 2008; Limon, Ferramosca,
Alvarado & Alamo, "Nonlinear MPC for tracking piece-wise constant reference signals",
IEEE TAC 63(11), 2018), direct multiple shooting:

    min   sum_{k<N} |x_k - x_s|_Q^2 + |u_k - u_s|_R^2 + V_f(x_N, x_s)
          + offset_weight * |position(x_s) - target|^2
    over  x_0..x_N, u_0..u_{N-1}, theta           with x_s = Mx theta + x0, u_s = Mu theta + u0
    s.t.  x_0 = measured state,  x_{k+1} = F(x_k, u_k)  (model.discrete_dynamics, RK4)
          u_k in input box and polytope;  x_k (k >= 1) in state box and polytope
          A position(x_k) <= b - r |A_i|           (region shrunk by the footprint radius r)
          steady state: limits scaled by 1 - steady_state_margin towards rest (limits.py),
                        A position(x_s) <= b - (r + e_f) |A_i|  (e_f: terminal-set extent)
          keep-apart (cell_rows > 0): n_m . position(x_k) - sigma_k <= c'_m - pad  (k >= 1,
                        sigma_N = sigma_{N-1}),
                        n_m . position(x_s) - sigma_s <= c_m - e_f + s,
                        A position(x_s) <= b - (r + e_f - min(s, e_f)) |A_i|  (for above),
                        sigma_k >= 0, cost + sum_{1<=k<N} (CELL_PRICE sigma_k
                        + CELL_PENALTY sigma_k^2) + STEADY_CELL_PENALTIES[kind] sigma_s^2
                        (rows n_m . p <= c_m: the robot's buffered cell, parameters of the
                        problem, control/keep_apart.py; pad = v_max * sample_time / 2, how
                        far the centre strays between two samples from the nearer one;
                        c'_m = max(c_m, n_m . p_0 + pad), see below; s >= 0: the steady
                        rows' relaxation, a parameter, see below);
                        n_m . dp/dt(x_0, u_0) <= 0 for held rows (n_m . p_0 + pad >= c_m) when
                        the input sets the velocity (the first move does not head out)
          terminal:     ellipsoid  e_N' P e_N <= alpha   (e_N = steady_frame_error(x_N, x_s)),
                        (real-time path: as e'Pe/alpha <= 1, plus its implied bounding box
                        along the principal axes of P)
                        equality   x_N = x_s

The offset cost keeps the problem feasible for any target: an unreachable target yields the
admissible steady state closest to it (the tracking property of the references above), here
the projection of the target onto the doubly shrunk region (and the buffered cell).

The cell rows are soft: a robot already outside its cell (measurement noise, latency, a
neighbour that came close, packed starts) would make hard rows infeasible. For the
predicted positions every row the robot stands beyond, or within the pad of, is moved
out to its measured position plus the pad (c'_m, a function of the parameters): staying
put is feasible and going farther out is not, so their slacks sigma_k pay only for what
the robot's speed carries it past before it can turn. Their price is an exact penalty:
linear, CELL_PRICE per metre, larger than the rows' multipliers, so whenever the rows can
be held every slack is exactly 0 (Kerrigan &
Maciejowski, "Soft constraints and exact penalty functions in model predictive control",
UKACC Control 2000). A quadratic price alone always buys some violation (the multiplier
over twice the price): measured, a car-like robot packed 9 mm from a rover drove 8 mm of
slack, 7 mm into the rover, at a price of 1e7 per square metre. The solution reports the
largest sigma_k (`cell_violation`, 0 whenever the rows can be held).

Every slack is an input of a stage (z_k holds x_k and theta only): sigma_s of stage 0
(its rows sit there, on theta), sigma_k of stage k, and x_N's rows, written through the
dynamics as rows on F(x_{N-1}, u_{N-1}), take stage N - 1's (stage N has no input; with a
horizon of 1 stage 0 has a second slack for them). Carried from stage to stage like theta
(one slack for all predicted positions, one for the steady state, as the problem first
had them), they made every stage's state two longer, and fatrop's Riccati recursion and
Jacobians cost grows with the state faster than with the inputs: measured with
benchmarks/mpc_benchmark.py --keep-apart --repeat 2 on a quiet machine, the rover's median
full solve with rows went from 1.28x to 1.23x of the one without and takes as many
interior-point iterations as without rows (8, against 9 carried), the multirotor's
real-time path from 1.37x to 1.25x (README, Performance). The problem of row budget 0 (no
row: no neighbour within reach) has no slack at all, so it is the problem without
keep-apart but for the steady region rows' relaxation (TrackingMpc._make); and the
real-time step holds the predicted positions' rows hard (_hard_rows: the exact penalty
makes the two optima one wherever the rows can be held; elsewhere the step fails and the
full solve, with soft rows, answers), which took the multirotor's real-time path with rows
from 1.38x to 1.22x of its time without.

The steady state keeps the rows where they are (so the plan comes back into the cell). A
packed robot's cell may be empty, or conflict with the region's steady-state margin, and
the plan's slack must never pay for that (one slack for both frees every row of the plan
by as much; measured: a multirotor packed against the region's edge and a rover's
footprint, its steady state held 0.2 m off the edge, drove 0.009 m into the rover; a
rover in a pack paid 0.095 m of slack at every sample and crept on). So before each solve
TrackingMpc.steady_relaxation finds, by a three-variable linear program, the least s by
which the steady state's cell rows must move out (and its region rows with them, by at
most e_f: no farther than the plan's own region rows) to leave room for a disc of
STEADY_SET_MIN_RADIUS; s = 0 in any cell a robot can rest in, and the problem gets it as a
parameter. Whatever s leaves (the offset cost pulling a steady state held at its rows,
a steady set out of the plan's reach) is the steady state's own slack sigma_s's (priced
by terminal kind, STEADY_CELL_PENALTIES). The solution reports how far its steady position
lies beyond its cell rows as given (`steady_cell_violation`). Measured before s existed
(4a949f5: sigma_s alone, shared with the region rows, at a hundredth of the path's
quadratic price): the offset cost pulled the multirotor's steady state millimetres to
centimetres out of its cell, and fatrop, with the steady state held at a cell corner,
then stalled at its iteration cap on two thirds of the samples of
benchmarks/mpc_benchmark.py --keep-apart (IPOPT answered: 2.2x the median solve time
without rows, 1.05x now).

The problem is built for `cell_rows` rows and for the smaller row budgets CELL_ROW_BUDGETS;
a solve leaves out the padding rows it was given (normal 0: they cannot bind) and takes the
smallest problem that holds the rest, so a robot pays for the neighbours within its reach,
not for the fleet's worst case (`MpcSolution.row_budget` says which answered). Offline, a
budget's problem may be rented before it is bought (`rented_samples`, RENTED_SAMPLES):
until the robot has needed it that many times, the problem built for `cell_rows` answers,
filled up with padding rows.

Headings stay continuous (frames.py); the steady heading is a free parameter.

Who solves it: solver_chain.py (with `path: real_time` a real-time SQP step, rti.py, then
the full solve when its iterate is rejected; the cold start, the stall restarts and a
stalled real-time answer are solved to convergence, since only converged answers can be
compared by cost: solver_chain.py's module docstring). For the real-time path the
formulation also hands over its cost as least-squares terms, the ellipsoid row as a convex
quadratic row and the stage layout of its rows; a row added here must keep that layout
(dynamics first in each stage).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import casadi as ca
import numpy as np
import scipy.optimize

from coverage_fleet.control.frames import heading_index, steady_frame_error
from coverage_fleet.control.ingredients import TerminalIngredients
from coverage_fleet.control.limits import input_limits, state_limits, steady_limits
from coverage_fleet.control.rti import LeastSquaresTerm, QuadraticRow
from coverage_fleet.control.shared_problems import SharedProblems, problem_key
from coverage_fleet.control.solver_chain import (
    RESCUE_HOLD_SAMPLES,
    ChainResult,
    FastProblem,
    NlpInstance,
    NlpsolStrategy,
    SolverChain,
    SolveStrategy,
    VariableSubset,
    build_strategies,
    configured_path,
    configured_plugin,
    shareable,
    terminal_equality_width,
)
from coverage_fleet.control.stage_cost import stage_weights
from coverage_fleet.control.stage_qp import StageLayout
from coverage_fleet.control.terminal import compute_terminal_ingredients
from coverage_fleet.vehicles.base import VehicleModel
from coverage_fleet.vehicles.settings import SOLVER_PLUGINS, MpcSettings, not_stabilisable_reason

#: A plan whose positions and steady state stay within this of the robot counts as "not
#: moving" (metres); see TrackingMpc._stalled.
STALL_DISTANCE = 0.01
#: ... while the steady state is farther than this from the target (metres).
STALL_OFFSET = 0.02
#: How far the second-start guess drives towards the target (metres).
ESCAPE_DISTANCE = 1.0
#: Largest terminal-set extent (metres) with keep-apart rows: the terminal level is lowered
#: to it (TerminalIngredients.within_extent), so the steady state may come this close to
#: its cell's edge; our choice, about the pad of the faster vehicles.
KEEP_APART_TERMINAL_EXTENT = 0.2
#: Quadratic price of the keep-apart slack of the predicted positions (cost units per
#: square metre): what a violation that cannot be avoided costs beyond CELL_PRICE.
CELL_PENALTY = 1e7
#: Linear price of that slack (cost units per metre; the exact penalty, module docstring):
#: above the rows' multipliers, largest measured 1.7e5 (a packed car-like robot, the
#: orchard mission), so a plan that can hold its rows holds them exactly. Written as
#: CELL_PENALTY (sigma_k + CELL_PRICE / (2 CELL_PENALTY))^2 with sigma_k >= 0, the same
#: up to a constant, so that the cost stays a sum of squares (the real-time path).
CELL_PRICE = 1e6
#: The path slack's unit in the decision vector (metres per unit): in millimetres its price
#: is 1e3 per unit, not 1e6, and the bound's multiplier stays near the others. Interior-
#: point solvers scale their stopping test by the largest multipliers, so in metres the
#: solves came out loose (two solves of one problem 6e-3 apart, in millimetres 1e-8).
PATH_SLACK_UNIT = 1e-3
#: Keep-apart row counts the problem is also built for, besides `cell_rows` itself: a solve
#: takes the smallest that holds the rows it was given (padding rows left out, see
#: TrackingMpc._cell_instance). Why: every row of the problem costs solve time at every
#: stage, padding or not (function evaluations and the dense stage blocks of fatrop and
#: HPIPM), while most solves honour a few rows: two per neighbour within reach, one per
#: snapshot in the window. Measured (benchmarks/mpc_benchmark.py --keep-apart, the rover,
#: 2 real rows of 12): 12 rows cost about 1.35x the median solve time without rows, 2 rows
#: about 1.15x. Infinite bounds on the padding rows instead do not help: casadi's HPIPM
#: interface clips them to 1e8 (the rows stay), and fatrop, given rows free on both sides,
#: failed 8 times in 120 samples against 2 (its rescue then answered most samples). Each
#: budget is one more problem to build (and to compile with `mpc.solver.compile`). A budget
#: of 0 (no row at all, for a robot with no neighbour within reach) saved little on the full
#: solve but much on the real-time path: in the orchard fleet's own loop (mpc_benchmark
#: --keep-apart --fleet, 900 rover solves, median 0 real rows) the rover's median went from
#: 1.46x to 1.23x its time without keep-apart, and to 1.16x with budget 0's slacks left out
#: (TrackingMpc._make).
CELL_ROW_BUDGETS = (0, 2, 4, 8)
#: How many times an offline robot (fleet/controllers.py) needs a budget's problem before
#: it builds it (rents before it buys, TrackingMpc's rented_samples); until then the problem
#: built for cell_rows answers, filled up with padding rows (the same optimum:
#: _cell_instance). The deterministic rent-or-buy rule: rent until the rent paid would buy
#: (Karlin, Manasse, Rudolph & Sleator, "Competitive snoopy caching", Algorithmica 3, 1988:
#: at most twice the cost of the best choice made knowing the future). Rent: the larger
#: QP, about 0.1-0.3 ms more per real-time sample (12 rows against 2: 1.35x against 1.15x
#: the rover's time without rows, above); price: a build of 40-150 ms (the surface vessel
#: the most), and its full solver's 45-150 ms on first use: about 400 samples either way
#: (measured, the four shipped vehicles). In the 16-robot fleet run of
#: benchmarks/fleet_sim_benchmark.py (20 s), 10 of 15 builds were of budgets a robot needed
#: 3-75 times; a robot counts its own needs, so its answers do not depend on which other
#: robots share its process (fleet/controller_pool.py).
RENTED_SAMPLES = 400
#: Offset given to the padding rows a budget's problem is filled up with (metres above the
#: pad: 0 . p - sigma <= offset - pad never binds, see TrackingMpc._cell_instance).
PADDING_ROW_OFFSET = 1.0
#: Bound on a row's outward speed for the first move when the row is not held (m/s): any
#: vehicle's speed is below it, so the row does not bind.
OPEN_HEADING_BOUND = 1e3
#: Price of the steady state's keep-apart slack (cost units per square metre), by terminal
#: kind. It pays only for what the steady rows' relaxation leaves
#: (TrackingMpc.steady_relaxation): the offset cost pulling a steady state held at its rows
#: (offset_weight times the distance over this price) or a steady set the plan cannot
#: reach. With the terminal equality the plan ends on the steady state (x_N = x_s), so a
#: steady set out of reach is paid for by one slack or the other: a hundredth of the path's
#: quadratic price keeps it the steady state's (at the path's price a car-like robot pinned
#: between two held rows bought 8.5 mm of path slack instead: test_control_keep_apart).
#: With an ellipsoid the plan may end anywhere in the terminal set around it, and the
#: path's quadratic price keeps the pull at tens of micrometres: at a hundredth it reached
#: centimetres and fatrop, the steady state held at a cell corner, stalled (module
#: docstring). Measured with the multirotor's benchmark loop, every sample tried by fatrop
#: first (4a949f5's path slack): 79 of 119 failures at 1e5, 44 at 1e6, 32 at 1e7, 30 at
#: 1e8, and 32 before the second slack existed (4c83b80).
STEADY_CELL_PENALTIES = {"equality": CELL_PENALTY / 100, "ellipsoid": CELL_PENALTY}
#: Room the steady state's cell rows always leave inside the region's steady-state rows
#: (metres): where they leave less, or none, they move out until a disc of this radius fits
#: (TrackingMpc.steady_relaxation). A steady set of one point or one line, e.g. a row
#: against the region's margin, would leave the solver rows active in opposite directions.
STEADY_SET_MIN_RADIUS = 1e-3


@dataclass(frozen=True)
class SteadyStatePoint:
    state: np.ndarray
    input: np.ndarray
    parameter: np.ndarray
    position: np.ndarray


@dataclass(frozen=True)
class _SharedBuild:
    """What building the problem for one keep-apart row count makes, the same for every
    robot with the same problem (control/shared_problems.py): the solver strategies and
    the read-only arrays a solve reads."""

    rows: int
    strategies: tuple[SolveStrategy, ...]
    lbg: np.ndarray
    ubg: np.ndarray
    cell_index: np.ndarray
    other_index: np.ndarray
    #: Bounds of this build's own decision vector (budget 0's has no slacks: _make).
    lbw: np.ndarray
    ubw: np.ndarray
    #: The model's discrete dynamics at the sample time (the manoeuvre guesses).
    dynamics: ca.Function


@dataclass(frozen=True)
class _BuiltProblem:
    """The problem built for one keep-apart row count (`rows`, one of the budgets): a
    shared build with this robot's own solver chain (its failure holds)."""

    rows: int
    chain: SolverChain
    lbg: np.ndarray
    ubg: np.ndarray
    #: (row groups, rows): the index in g of cell row m of each group (one group per stage
    #: k >= 1, then the steady state).
    cell_index: np.ndarray
    #: Every other row of g, in order (the same rows, in the same order, in every budget).
    other_index: np.ndarray


@dataclass(frozen=True)
class MpcSolution:
    first_input: np.ndarray
    #: (N + 1, nx), row 0 is the measured state.
    predicted_states: np.ndarray
    #: (N, nu)
    predicted_inputs: np.ndarray
    steady_state: SteadyStatePoint
    status: str
    success: bool
    iterations: int
    solve_time: float
    #: The keep-apart slack of the predicted positions (metres; 0 without cell rows).
    cell_violation: float = 0.0
    #: How far the steady position lies beyond its cell rows as given (metres; 0 where the
    #: robot can rest in its cell, see the module docstring).
    steady_cell_violation: float = 0.0
    #: Keep-apart rows of the problem that answered: the smallest row budget holding the
    #: rows that can bind (padding fills the rest; 0 without cell rows).
    row_budget: int = 0


def _region_offsets(A: np.ndarray, b: np.ndarray, distance: float) -> np.ndarray:
    return b - distance * np.linalg.norm(A, axis=1)


def _require_checked(
    model: VehicleModel, settings: MpcSettings, terminal: TerminalIngredients | None
) -> None:
    """The settings are checked where they are read (vehicles.loader reports every problem
    of a vehicle file); the MPC only refuses what would make it build a wrong problem, with
    an explicit check (not `assert`, which python -O strips)."""
    faults = []
    if settings.horizon < 1 or settings.sample_time <= 0 or settings.substeps < 1:
        faults.append("horizon, sample_time and substeps must be positive")
    if configured_plugin(settings) not in SOLVER_PLUGINS:
        faults.append(f"solver plugin must be one of {list(SOLVER_PLUGINS)}")
    if settings.terminal == "ellipsoid" and not model.stabilisable_at_rest:
        faults.append(f"terminal 'ellipsoid': {not_stabilisable_reason(model.kind)}")
    if terminal is not None and terminal.kind != settings.terminal:
        faults.append(
            f"settings ask for terminal '{settings.terminal}' but the ingredients given are "
            f"'{terminal.kind}' ({terminal.reason})"
        )
    if faults:
        raise ValueError(
            f"{model.source}: MPC settings not usable: {'; '.join(faults)} (vehicle files are "
            f"checked by vehicles.loader; settings built in code must obey the same rules)"
        )


def _kept_inputs(
    horizon: int, nz: int, nv: int, kept_inputs: Sequence[int]
) -> np.ndarray:
    """Where the variables of a problem whose stage k keeps the first kept_inputs[k] of
    the nv stage inputs sit in the decision vector [z_0 v_0 ... z_{N-1} v_{N-1} z_N]."""
    stage = nz + nv
    return np.concatenate(
        [k * stage + np.arange(nz + kept_inputs[k]) for k in range(horizon)]
        + [horizon * stage + np.arange(nz)]
    )


def _hard_rows(
    fast: FastProblem,
    nlp: dict[str, ca.SX],
    slack_inputs: Sequence[int],
    price_terms: Sequence[LeastSquaresTerm],
) -> FastProblem:
    """The real-time step's problem with the keep-apart rows of the predicted positions
    hard: their slacks (per stage k the last slack_inputs[k] stage inputs; the steady
    state's slack, the first at stage 0, stays) fixed at 0 and left out, with their prices
    (`price_terms`, constants then). Why it answers the same: the slacks' price is an exact
    penalty (module docstring), so wherever the rows can be held the soft problem's optimum
    has every path slack at 0 and is the hard problem's optimum; where they cannot, the
    hard QP is infeasible, the step fails, and the full solve (soft rows) answers the
    sample. Why: the slack was one more input at every stage for HPIPM's Riccati recursion
    (README, Performance: the multirotor's real-time step cost 1.38x with 4 rows, over the
    30 % keep-apart budget)."""
    layout = fast.layout
    kept_inputs = tuple(n - s for n, s in zip(layout.nu, slack_inputs, strict=True))
    kept = _kept_inputs(layout.horizon, layout.nz, max(layout.nu), kept_inputs)
    w = nlp["x"]
    dropped_entries = np.setdiff1d(np.arange(w.shape[0]), kept)
    dropped = w[dropped_entries.tolist()]
    f, g = ca.substitute([nlp["f"], nlp["g"]], [dropped], [ca.DM.zeros(dropped.shape[0])])
    priced = {id(term) for term in price_terms}
    return FastProblem(
        [term for term in fast.terms if id(term) not in priced],
        fast.quadratic_rows,
        StageLayout(layout.horizon, layout.nz, kept_inputs, layout.path_rows),
        fast.dynamics_increments,
        nlp={"x": w[kept.tolist()], "p": nlp["p"], "f": f, "g": g},
        kept=kept,
    )


class TrackingMpc:
    """One robot's tracking MPC. Build once per robot; solve() once per sample."""

    def __init__(
        self,
        model: VehicleModel,
        settings: MpcSettings,
        region_halfspaces: tuple[np.ndarray, np.ndarray],
        terminal: TerminalIngredients | None = None,
        cell_rows: int = 0,
        row_budgets: Sequence[int] | None = None,
        prebuild: bool = True,
        shared: SharedProblems[_SharedBuild] | None = None,
        rented_samples: int = 0,
    ) -> None:
        """cell_rows: how many keep-apart rows each solve takes (0: none, the problem is
        exactly the one without keep-apart). row_budgets: the smaller row counts the
        problem is also built for (None: CELL_ROW_BUDGETS; () builds only cell_rows).
        prebuild: build every budget's problem now (a robot's solves then never wait for
        a build); False builds each on its first use (offline runs, where start-up time
        counts and a solve's wall time does not: a build takes 0.1-1 s, a first compile
        with `mpc.solver.compile` tens of seconds), and each problem's full solve and IPOPT
        rescue on the first sample that needs them (solver_chain.build_strategies).
        shared: builds shared with the other TrackingMpcs given the same
        (control/shared_problems.py: robots of one process that solve one at a time);
        None builds this MPC's own. rented_samples: with prebuild False, a smaller budget's
        problem is built only at the rented_samples-th solve that needs it; the solves
        before are answered by the problem for cell_rows (RENTED_SAMPLES; 0: built at the
        first)."""
        _require_checked(model, settings, terminal)
        if rented_samples < 0:
            raise ValueError(f"rented_samples must be >= 0, got {rented_samples}")
        self._prebuild = prebuild
        self._shared = shared
        self._rented_samples = 0 if prebuild else int(rented_samples)
        #: Solves so far that needed each budget whose problem this MPC has not yet got.
        self._budget_needs: dict[int, int] = {}
        if cell_rows < 0:
            raise ValueError(f"cell_rows must be >= 0, got {cell_rows}")
        self.cell_rows = int(cell_rows)
        budgets = CELL_ROW_BUDGETS if row_budgets is None else tuple(row_budgets)
        if any(int(b) != b or b < 0 for b in budgets):
            raise ValueError(f"row budgets must be whole numbers >= 0, got {list(budgets)}")
        #: Row counts built: the budgets below cell_rows, then cell_rows.
        self.row_budgets = tuple(
            sorted({int(b) for b in budgets if b < self.cell_rows} | {self.cell_rows})
        )
        if terminal is None:
            terminal = (
                compute_terminal_ingredients(model, settings)
                if settings.terminal == "ellipsoid"
                else TerminalIngredients.equality("equality asked for in the settings")
            )
        if self.cell_rows:
            # The steady state keeps the terminal set inside the cell: a wide set would hold
            # the robot that far back from every neighbour.
            terminal = terminal.within_extent(KEEP_APART_TERMINAL_EXTENT)
        self.model = model
        self.settings = settings
        self.terminal = terminal
        #: Price of the steady state's keep-apart slack (STEADY_CELL_PENALTIES).
        self.steady_cell_penalty = STEADY_CELL_PENALTIES[terminal.kind]
        self.horizon = settings.horizon
        A, b = (np.asarray(v, dtype=float) for v in region_halfspaces)
        self.region_A = A.reshape(-1, 2)
        self.region_b = b.reshape(-1)
        self.heading = heading_index(model)
        family = model.steady_states()
        self._Mx, self._x0s = np.asarray(family.Mx, float), np.asarray(family.x0, float)
        self._Mu, self._u0s = np.asarray(family.Mu, float), np.asarray(family.u0, float)
        self.Q, self.R = stage_weights(model, settings)
        self.footprint_radius = float(model.footprint_radius)
        #: Offsets of the region every predicted position must keep (shrunk by footprint).
        self.path_region_b = _region_offsets(self.region_A, self.region_b, self.footprint_radius)
        #: Offsets for the steady position (also shrunk by the terminal set's extent).
        self.steady_region_b = _region_offsets(
            self.region_A, self.region_b, self.footprint_radius + terminal.position_extent
        )
        #: The region rows' normal lengths (their offsets over these are metres).
        self._region_norms = np.linalg.norm(self.region_A, axis=1)
        #: The same rows with unit normals (metres), for steady_relaxation.
        self._steady_region_rows = (
            self.region_A / self._region_norms[:, None],
            self.steady_region_b / self._region_norms,
        )
        #: Their offsets less STEADY_SET_MIN_RADIUS (steady_relaxation's quick test).
        self._steady_region_inner = self._steady_region_rows[1] - STEADY_SET_MIN_RADIUS
        #: How far the centre may stray between samples from the nearer sample point.
        self.cell_pad = (
            model.max_planar_speed * settings.sample_time / 2.0 if self.cell_rows else 0.0
        )
        #: A row with normal 0 and at least this offset never binds (_cell_instance).
        self._vacuous_offset = max(self.cell_pad, self.terminal.position_extent)
        self.plugin = configured_plugin(settings)
        #: The decision vector's stage sizes (_unpack): z_k = (x_k, theta), v_k = (u_k,
        #: keep-apart slacks), as in the problem for cell_rows rows (a smaller budget's
        #: problem may leave some out: _BuiltProblem.kept).
        self._n_theta = self._Mx.shape[1]
        self._nz = model.nx + self._n_theta
        self._nv = model.nu + self._slack_count(self.cell_rows)
        self._problems = {self.cell_rows: self._build(self.plugin, self.cell_rows, None)}
        if prebuild:
            for rows in self.row_budgets:
                self._problem(rows)
        self._guess: np.ndarray | None = None
        self._lam_g: np.ndarray | None = None
        self._lam_x: np.ndarray | None = None
        #: (measured state, target) of the last stalled solve no second start improved:
        #: a robot resting there tries them again only once it or its target has moved.
        self._no_escape_at: tuple[np.ndarray, np.ndarray] | None = None
        #: The budget whose problem gave _lam_g (its rows differ from another budget's).
        self._lam_rows = self.cell_rows
        #: The centre of the steady rows found by the last steady_relaxation program.
        self._steady_centre: np.ndarray | None = None
        #: _shift_index's answers by decision-vector size.
        self._shift_indices: dict[int, np.ndarray] = {}

    def build_full_solve(self) -> None:
        """Build now the configured plugin's full solve of the problem for cell_rows, which
        an MPC built with prebuild False builds at the first sample that needs it. Every
        robot's cold start needs it (the real-time step never answers one), so an offline
        fleet builds it with its controllers (fleet/controllers.LocalControllers), and a
        controller pool before it forks its workers, which then all hold it
        (fleet/controller_pool.py)."""
        for strategy in self._problems[self.cell_rows].chain.strategies:
            if isinstance(strategy, NlpsolStrategy) and strategy.name == self.plugin:
                strategy.build()

    # --- construction ------------------------------------------------------------------

    def _build(self, plugin: str, n_cell: int, skip_left: list[int] | None) -> _BuiltProblem:
        """The problem for n_cell keep-apart rows (a budget) with a solver chain of this
        robot's (skip_left: its failure holds, see _problem), the build found in the
        shared builds when another robot made it."""
        if self._shared is None:
            built = self._make(plugin, n_cell)
        else:
            key = None if not shareable(self.settings) else problem_key(
                self.model, self.settings, (self.region_A, self.region_b), self.terminal,
                (plugin, self.cell_rows, n_cell, self._prebuild),
            )
            built = self._shared.get(key, lambda: self._make(plugin, n_cell))
        self._dynamics = built.dynamics
        if n_cell == self.cell_rows:  # the decision vector's own layout (_unpack)
            self._lbw, self._ubw = built.lbw, built.ubw
        chain = SolverChain(list(built.strategies), RESCUE_HOLD_SAMPLES, skip_left)
        return _BuiltProblem(
            built.rows, chain, built.lbg, built.ubg, built.cell_index, built.other_index
        )

    def _slack_count(self, n_cell: int) -> int:
        """Keep-apart slacks per stage input in the problem for n_cell rows (_make)."""
        return (1 if self.horizon > 1 else 2) if n_cell else 0

    def _make(self, plugin: str, n_cell: int) -> _SharedBuild:
        """Stage-wise NLP: stage k holds z_k = (x_k, theta_k) and v_k = (u_k, its keep-apart
        slacks); theta is carried as a constant state (theta_{k+1} = theta_k) so that every
        constraint touches one stage or two neighbouring ones, the block structure
        structure-exploiting solvers need. n_cell: the keep-apart rows of this build (a
        budget). The slacks are there whenever the budget has rows: budget 0 has none for
        them to relax, so its problem is the one without keep-apart but for the steady
        region rows' relaxation (a parameter), and its strategies solve over the MPC's
        variables without the slacks (solver_chain.VariableSubset). Why: each slack is one
        more input at every stage, which the Riccati recursions of HPIPM and fatrop pay for
        at every stage whether a row binds or not (README, Performance: before, a robot
        with no neighbour within reach paid 1.24-1.31x the solve time without keep-apart).
        The real-time step leaves out the path slacks in every budget (_hard_rows)."""
        model, settings, N = self.model, self.settings, self.horizon
        nx, nu = model.nx, model.nu
        F = model.discrete_dynamics(settings.sample_time, settings.substeps)
        # The real-time step's curvature model (rti.dynamics_curvature): one RK4 step.
        F_one_step = model.discrete_dynamics(settings.sample_time, 1)
        n_theta = self._Mx.shape[1]
        # The keep-apart slacks are stage inputs (module docstring): stage 0's is the steady
        # state's, stage k >= 1's relaxes x_k's rows (and stage N - 1's also x_N's); with a
        # horizon of 1, stage 0 has a second one for x_1's rows.
        n_slack = self._slack_count(n_cell)
        nz = nx + n_theta
        nv = nu + n_slack
        Z = [ca.SX.sym(f"z{k}", nz) for k in range(N + 1)]
        V = [ca.SX.sym(f"v{k}", nv) for k in range(N)]
        U = [v[:nu] for v in V]
        S = [v[nu:] for v in V]
        target = ca.SX.sym("target", 2)
        measured = ca.SX.sym("measured", nx)
        cell_normals = ca.SX.sym("cell_normals", n_cell, 2)
        cell_offsets = ca.SX.sym("cell_offsets", n_cell)
        # How far the steady state's cell rows and region rows move out (metres,
        # steady_relaxation; only with keep-apart).
        steady_relax = ca.SX.sym("steady_relax", 2 if self.cell_rows else 0)
        Mx, x0s, Mu, u0s = (ca.DM(v) for v in (self._Mx, self._x0s, self._Mu, self._u0s))
        i, j = model.position_indices
        Q, R = ca.DM(self.Q), ca.DM(self.R)

        x_lim, u_lim = state_limits(model), input_limits(model)
        margin = settings.steady_state_margin
        x_steady = steady_limits(x_lim, self._Mx, self._x0s, margin)
        u_steady = steady_limits(u_lim, self._Mu, self._u0s, margin)
        x_lower, x_upper = (np.asarray(v, float) for v in model.state_bounds())
        u_lower, u_upper = (np.asarray(v, float) for v in model.input_bounds())
        G_x, g_x = model.state_polytope()
        E_u, e_u = model.input_polytope()
        A_r = ca.DM(self.region_A)
        free_theta = np.full(n_theta, np.inf)

        cost = 0
        #: The cost as a sum of r' W r terms (the real-time path's Gauss-Newton Hessian).
        terms: list[LeastSquaresTerm] = []
        quadratic_rows: list[QuadraticRow] = []
        #: Constraint rows already added when each stage starts (StageLayout).
        stage_starts: list[int] = []
        g: list[ca.SX] = []
        lbg: list[np.ndarray] = []
        ubg: list[np.ndarray] = []

        #: Rows of g so far (a running count: summing the blocks each time was quadratic).
        added_rows = [0]

        def add(expr: ca.SX, lower: np.ndarray | float, upper: np.ndarray | float) -> None:
            n = expr.shape[0]
            if n == 0:
                return
            g.append(expr)
            added_rows[0] += n
            lbg.append(np.broadcast_to(np.asarray(lower, float), (n,)).copy())
            ubg.append(np.broadcast_to(np.asarray(upper, float), (n,)).copy())

        #: Where each group of cell rows starts in g.
        cell_starts: list[int] = []

        def cell(position: ca.SX, sigma: ca.SX, offsets: ca.SX, pad: float) -> None:
            if n_cell:
                cell_starts.append(added_rows[0])
                add(ca.mtimes(cell_normals, position) - sigma - offsets + pad, -np.inf, 0.0)

        # Rows the robot stands beyond, or within the pad of, move out to where it stands
        # plus the pad for the predicted positions (held_offsets): staying put is feasible
        # and going farther out is not, so the path slack pays only for what the robot's
        # speed carries it past. The steady state keeps every row where it is. (Padding
        # rows, normal 0, keep their offset: it exceeds the pad.)
        along = ca.mtimes(cell_normals, ca.vertcat(measured[i], measured[j]))
        held_offsets = ca.fmax(cell_offsets, along + self.cell_pad)
        # Where the input sets the velocity (a kinematic model), the first move must not
        # head out across a held row: the path between two samples is an arc tangent to
        # the velocity, so samples inside the row do not keep it inside (a rover turning
        # away while driving off drove 0.3 mm into a neighbour between two samples). An
        # arc of less than half a turn that starts along or inside the row and ends inside
        # it stays inside (the row's component is a sinusoid with one extremum there).
        first_velocity = model.continuous_dynamics(measured, U[0])
        first_velocity = ca.vertcat(first_velocity[i], first_velocity[j])
        heads_out = n_cell and ca.depends_on(first_velocity, U[0])
        if heads_out:
            held = ca.ge(along + self.cell_pad, cell_offsets)
            heading_bound = (1 - held) * OPEN_HEADING_BOUND

        def path(x: ca.SX) -> None:
            if len(g_x):
                add(ca.mtimes(ca.DM(G_x), x), -np.inf, g_x)
            add(ca.mtimes(A_r, ca.vertcat(x[i], x[j])), -np.inf, self.path_region_b)

        def path_cell(x: ca.SX, sigma: ca.SX) -> None:
            if n_cell:
                position = ca.vertcat(x[i], x[j])
                cell(position, sigma * PATH_SLACK_UNIT, held_offsets, self.cell_pad)

        #: The path slacks' prices (the real-time step leaves them out: _hard_rows).
        price_terms: list[LeastSquaresTerm] = []

        def path_price(sigma: ca.SX) -> ca.SX:
            # CELL_PRICE sigma + CELL_PENALTY sigma^2 (metres), as one square (rti.py).
            shifted = sigma * PATH_SLACK_UNIT + CELL_PRICE / (2.0 * CELL_PENALTY)
            price_terms.append(LeastSquaresTerm(shifted, np.array([[CELL_PENALTY]])))
            terms.append(price_terms[-1])
            return CELL_PENALTY * shifted**2

        #: Per dynamics row group, the one-step increment F_one_step(x_k, u_k) - x_k (theta's
        #: rows: 0), for the real-time step's curvature.
        increments: list[ca.SX] = []
        w: list[ca.SX] = []
        lbw: list[np.ndarray] = []
        ubw: list[np.ndarray] = []
        for k in range(N + 1):
            # Constraint order per stage (what fatrop's structure detection reads): the
            # dynamics to the next stage first, then this stage's path constraints.
            x, theta = Z[k][:nx], Z[k][nx:]
            x_s = ca.mtimes(Mx, theta) + x0s
            stage_starts.append(added_rows[0])
            w.append(Z[k])
            if k == 0:
                lbw.append(np.concatenate([np.full(nx, -np.inf), -free_theta]))
                ubw.append(np.concatenate([np.full(nx, np.inf), free_theta]))
            else:
                lbw.append(np.concatenate([x_lower, -free_theta]))
                ubw.append(np.concatenate([x_upper, free_theta]))
            if k == N:
                path(x)  # x_N's cell rows sit at stage N - 1 (below)
                break
            u_s = ca.mtimes(Mu, theta) + u0s
            w.append(V[k])
            # The path slacks are >= 0 for the linear price; the steady state's needs no
            # bound: a negative one only tightens its rows and costs.
            slack_lower = np.zeros(n_slack)
            if k == 0:
                slack_lower[:1] = -np.inf
            lbw.append(np.concatenate([u_lower, slack_lower]))
            ubw.append(np.concatenate([u_upper, np.full(n_slack, np.inf)]))
            dx, du = x - x_s, U[k] - u_s
            cost += ca.bilin(Q, dx, dx) + ca.bilin(R, du, du)
            terms += [LeastSquaresTerm(dx, self.Q), LeastSquaresTerm(du, self.R)]
            x_next = F(x, U[k])
            add(Z[k + 1] - ca.vertcat(x_next, theta), 0.0, 0.0)
            increments.append(ca.vertcat(F_one_step(x, U[k]) - x, ca.SX(n_theta, 1)))
            if k == 0:
                add(x - measured, 0.0, 0.0)
                if heads_out:
                    cell_starts.append(added_rows[0])  # a group of cell rows
                    add(ca.mtimes(cell_normals, first_velocity) - heading_bound, -np.inf, 0.0)
                if n_slack:
                    # The steady state's cell rows sit here, beside their slack (theta is
                    # the same at every stage); they move out by steady_relax[0].
                    sigma_s = S[0][0]
                    cell(
                        ca.vertcat(x_s[i], x_s[j]),
                        sigma_s,
                        cell_offsets + steady_relax[0],
                        self.terminal.position_extent,
                    )
                    cost += self.steady_cell_penalty * sigma_s**2
                    terms.append(
                        LeastSquaresTerm(sigma_s, np.array([[self.steady_cell_penalty]]))
                    )
            else:
                path(x)
                if n_slack:
                    path_cell(x, S[k][0])
                    cost += path_price(S[k][0])
            if n_slack and k == N - 1:
                # x_N's rows, written through the dynamics (x_N = F(x_{N-1}, u_{N-1})) so
                # that they have a stage input for their slack: stage N has none. (The same
                # expression as the dynamics row's, so it is evaluated once.)
                sigma_n = S[k][-1]
                path_cell(x_next, sigma_n)
                if N == 1:
                    cost += path_price(sigma_n)
            if len(e_u):
                add(ca.mtimes(ca.DM(E_u), U[k]), -np.inf, e_u)

        # Terminal stage: steady state admissible, terminal ingredients, offset cost.
        x_N, theta = Z[N][:nx], Z[N][nx:]
        x_s = ca.mtimes(Mx, theta) + x0s
        u_s = ca.mtimes(Mu, theta) + u0s
        p_s = ca.vertcat(x_s[i], x_s[j])
        if len(x_steady.g_dep):
            add(ca.mtimes(ca.DM(x_steady.G_dep), x_s), -np.inf, x_steady.g_dep)
        if len(u_steady.g_dep):
            add(ca.mtimes(ca.DM(u_steady.G_dep), u_s), -np.inf, u_steady.g_dep)
        if self.cell_rows:
            # A packed robot's cell may be empty, or lie beyond the region's steady-state
            # margin: the steady state's rows move out by the parameters steady_relax (0
            # where the robot can rest), and any rest is its own slack's, so such a
            # conflict never frees the predicted positions' rows (module docstring).
            add(
                ca.mtimes(A_r, p_s) - steady_relax[1] * ca.DM(self._region_norms),
                -np.inf,
                self.steady_region_b,
            )
        else:
            add(ca.mtimes(A_r, p_s), -np.inf, self.steady_region_b)
        if self.terminal.kind == "equality":
            width = terminal_equality_width(plugin)
            add(x_N - x_s, -width, width)
        else:
            error = steady_frame_error(x_N, x_s, model.position_indices, self.heading)
            P = ca.DM(self.terminal.P)
            cost += ca.bilin(P, error, error)
            terms.append(LeastSquaresTerm(error, self.terminal.P))
            if configured_path(settings) == "real_time":
                # Scaled to e'Pe / alpha <= 1, so its violation reads as a fraction of the
                # level (the acceptance test compares every row to one tolerance).
                level = LeastSquaresTerm(error, self.terminal.P / self.terminal.alpha)
                quadratic_rows.append(QuadraticRow(added_rows[0], level))
                add(ca.bilin(P, error, error) / self.terminal.alpha, -np.inf, 1.0)
                # The ellipsoid's bounding box along its principal axes, |v_i' e| <=
                # sqrt(alpha / lambda_i) (P = V diag(lambda) V'): implied by the ellipsoid
                # (the optimum is unchanged), but linear in e, so a linearised problem (the
                # QP) cannot step far outside the set from an interior point, where the
                # ellipsoid's own linearisation is nearly flat (on the box e'Pe <= nx alpha).
                eigenvalues, axes = np.linalg.eigh(self.terminal.P)
                extent = np.sqrt(self.terminal.alpha / eigenvalues)
                add(ca.mtimes(ca.DM(axes.T), error), -extent, extent)
            else:
                # The full path keeps its problem exactly as it was before the real-time
                # path existed (the closed-loop behaviour the fleet tests pin down).
                add(ca.bilin(P, error, error), -np.inf, self.terminal.alpha)
        cost += settings.offset_weight * ca.sumsqr(p_s - target)
        terms.append(LeastSquaresTerm(p_s - target, settings.offset_weight * np.eye(2)))
        stage_starts.append(added_rows[0])
        path_rows = tuple(
            stage_starts[k + 1] - stage_starts[k] - (nz if k < N else 0) for k in range(N + 1)
        )

        nlp = {
            "x": ca.vertcat(*w),
            "p": ca.vertcat(measured, target, ca.vec(cell_normals), cell_offsets, steady_relax),
            "f": cost,
            "g": ca.vertcat(*g),
        }
        lbg_all, ubg_all = np.concatenate(lbg), np.concatenate(ubg)
        cell_index = np.array(
            [np.arange(start, start + n_cell) for start in cell_starts], dtype=int
        ).reshape(len(cell_starts), n_cell)
        other = np.ones(len(lbg_all), dtype=bool)
        other[cell_index.reshape(-1)] = False
        fast = FastProblem(
            terms, quadratic_rows, StageLayout(N, nz, (nv,) * N, path_rows),
            ca.vertcat(*increments),
        )
        if n_slack and configured_path(settings) == "real_time":
            # Every slack but stage 0's first (the steady state's) is a path slack.
            slack_inputs = [n_slack - 1] + [n_slack] * (N - 1)
            fast = _hard_rows(fast, nlp, slack_inputs, price_terms)
        strategies = build_strategies(
            nlp,
            settings,
            [bool(v) for v in lbg_all == ubg_all],
            fast,
            full_solves_on_first_use=not self._prebuild,
        )
        if nv != self._nv:
            kept = _kept_inputs(N, nz, self._nv, (nv,) * N)
            size = N * (nz + self._nv) + nz
            strategies = [VariableSubset(s, kept, size) for s in strategies]
        arrays = [
            lbg_all, ubg_all, cell_index, np.nonzero(other)[0],
            np.concatenate(lbw), np.concatenate(ubw),
        ]
        for array in arrays:
            array.flags.writeable = False  # read by every robot that shares the build
        return _SharedBuild(n_cell, tuple(strategies), *arrays, F)

    def _problem(self, rows: int) -> _BuiltProblem:
        """The problem built for `rows` keep-apart rows (a budget), built now if not yet;
        every budget's chain shares the full problem's failure holds."""
        if rows not in self._problems:
            shared = self._problems[self.cell_rows].chain.skip_left
            self._problems[rows] = self._build(self.plugin, rows, shared)
        return self._problems[rows]

    # --- solving -----------------------------------------------------------------------

    def reset(self) -> None:
        """Forget the warm start (next solve starts cold)."""
        self._guess = self._lam_g = self._lam_x = None
        self._no_escape_at = None

    def _unpack(self, w: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """(states (N+1, nx), inputs (N, nu), theta, slacks (N, n_slack)): entry [0, 0] is
        the steady state's slack (metres), every other the predicted positions' (in
        PATH_SLACK_UNIT); no columns without keep-apart rows."""
        nx, nu, N, nz, nv = self.model.nx, self.model.nu, self.horizon, self._nz, self._nv
        body = w[: N * (nz + nv)].reshape(N, nz + nv)
        last = w[N * (nz + nv) :]
        states = np.vstack([body[:, :nx], last[:nx]])
        inputs = body[:, nz : nz + nu]
        return states, inputs, last[nx:].copy(), body[:, nz + nu :].copy()

    def _theta(self, w: np.ndarray) -> np.ndarray:
        """The steady-state parameters, the last entries of w (_unpack), as a view."""
        return w[len(w) - self._n_theta :]

    def _pack(
        self,
        states: np.ndarray,
        inputs: np.ndarray,
        theta: np.ndarray,
        slacks: np.ndarray | None = None,
    ) -> np.ndarray:
        """The decision vector; slacks None: all 0 (a guess that keeps its rows)."""
        N = self.horizon
        if slacks is None:
            slacks = np.zeros((N, self._nv - self.model.nu))
        body = np.hstack([states[:-1], np.tile(theta, (N, 1)), inputs, slacks]).reshape(-1)
        return np.concatenate([body, states[-1], theta])

    def _cold_guess(self, x0: np.ndarray) -> np.ndarray:
        theta, *_ = np.linalg.lstsq(self._Mx, x0 - self._x0s, rcond=None)
        u_s = self._Mu @ theta + self._u0s
        states = np.tile(x0, (self.horizon + 1, 1))
        inputs = np.tile(u_s, (self.horizon, 1))
        return self._pack(states, inputs, theta)

    def _shifted(self, w: np.ndarray) -> np.ndarray:
        """The previous solution one sample later: the warm start (the steady state's
        slack stays at stage 0, the predicted positions' shift with them). The appended
        stage keeps the last state; its input is u_s at the terminal equality, where that
        state is the resting state x_s: the candidate of Rawlings, Mayne & Diehl, "Model
        Predictive Control", 2nd ed., 2017, sec. 2.4.2 (u_f = u_s keeps x_s), so the shifted
        plan has no dynamics defect. Repeating the last input instead drove the rover on by
        a sample's travel there (8.5 cm at 0.85 m/s), and its real-time yaw-rate commands
        flipped sign from sample to sample (total variation 2.6x the full solve's over
        benchmarks/mpc_benchmark.py's loop, 1.5x with u_s). With the terminal ellipsoid the
        last input is repeated (appending the LQR law u_s + K e instead was measured to
        halve the vessel's accepted real-time steps, cause not investigated)."""
        shifted = w[self._shift_index(len(w))]
        if self.terminal.kind == "equality":
            theta = self._theta(shifted)
            last_input = (self.horizon - 1) * (self._nz + self._nv) + self._nz
            shifted[last_input : last_input + self.model.nu] = self._Mu @ theta + self._u0s
        return shifted

    def _shift_index(self, size: int) -> np.ndarray:
        """Where each entry of the shifted decision vector comes from (a gather: the same
        for every solve of this problem size, so it is worked out once)."""
        cached = self._shift_indices.get(size)
        if cached is None:
            states, inputs, theta, slacks = self._unpack(np.arange(size, dtype=float))
            states = np.vstack([states[1:], states[-1:]])
            inputs = np.vstack([inputs[1:], inputs[-1:]])
            if self.horizon > 1:
                slacks = np.vstack([slacks[:1], slacks[2:], slacks[-1:]])
            cached = self._pack(states, inputs, theta, slacks).astype(int)
            self._shift_indices[size] = cached
        return cached

    def _align_angles(self, w: np.ndarray, x0: np.ndarray) -> np.ndarray:
        """Shift the guess by whole turns so its angles match the measured ones."""
        # The first state is w[:nx] (_unpack): most samples need no turn and no unpacking
        # (plain floats: numpy's per-call overhead on two entries was most of this).
        if all(round((x0[i] - w[i]) / (2 * math.pi)) == 0 for i in self.model.angle_indices):
            return w
        states, inputs, theta, slacks = self._unpack(w)
        changed = False
        for index in self.model.angle_indices:
            turns = np.round((x0[index] - states[0, index]) / (2 * np.pi))
            if turns == 0:
                continue
            changed = True
            states[:, index] += 2 * np.pi * turns
            column = np.nonzero(np.abs(self._Mx[index]) > 0)[0]
            if len(column) == 1:
                theta[column[0]] += 2 * np.pi * turns / self._Mx[index, column[0]]
        return self._pack(states, inputs, theta, slacks) if changed else w

    def _tried_here(self, x0: np.ndarray, target: np.ndarray) -> bool:
        """The second starts already failed from this state towards this target."""
        if self._no_escape_at is None:
            return False
        state, tried_target = self._no_escape_at
        return (
            np.abs(x0 - state).max() < STALL_DISTANCE
            and np.abs(target - tried_target).max() < STALL_DISTANCE
        )

    def _escape_guesses(self, x0: np.ndarray, target: np.ndarray) -> list[np.ndarray]:
        """Second starts for a stalled solve: the straight drive towards the target, then the
        vehicle's manoeuvres (VehicleModel.manoeuvre_inputs) rolled out from x0, each
        ending at rest on the steady state where it stops. A car whose target lies beside
        it needs a shunt: no straight guess leads the solver there (measured: a car-like
        robot resting 0.26 m beside its target stayed there from the straight guess; a
        shunt guess brought its steady state 0.13 m closer in one solve)."""
        guesses = []
        straight = self._escape_guess(x0, target)
        if straight is not None:
            guesses.append(straight)
        for inputs in self.model.manoeuvre_inputs(self.horizon, self.settings.sample_time):
            states = [x0]
            for u in inputs:
                states.append(np.asarray(self._dynamics(states[-1], u), float).reshape(-1))
            states_array = np.array(states)
            theta, *_ = np.linalg.lstsq(self._Mx, states_array[-1] - self._x0s, rcond=None)
            states_array[-1] = self._Mx @ theta + self._x0s
            guesses.append(self._pack(states_array, np.asarray(inputs, float), theta))
        return guesses

    def _escape_guess(self, x0: np.ndarray, target: np.ndarray) -> np.ndarray | None:
        """A guess that drives ESCAPE_DISTANCE towards the target (heading along the way),
        or None when that steady position would not be admissible."""
        p0 = self.model.position(x0)
        offset = target - p0
        distance = float(np.linalg.norm(offset))
        goal = p0 + offset * min(1.0, ESCAPE_DISTANCE / distance)
        if np.any(self.region_A @ goal > self.steady_region_b):
            return None
        i, j = self.model.position_indices
        fractions = np.linspace(0.0, 1.0, self.horizon + 1)
        states = np.tile(x0, (self.horizon + 1, 1))
        states[:, i] = p0[0] + fractions * (goal[0] - p0[0])
        states[:, j] = p0[1] + fractions * (goal[1] - p0[1])
        x_goal = states[-1].copy()
        if self.heading is not None:
            along = np.arctan2(offset[1], offset[0])
            along = x0[self.heading] + (along - x0[self.heading] + np.pi) % (2 * np.pi) - np.pi
            states[1:, self.heading] = along
            x_goal[self.heading] = along
        theta, *_ = np.linalg.lstsq(self._Mx, x_goal - self._x0s, rcond=None)
        states[-1] = self._Mx @ theta + self._x0s
        inputs = np.tile(self._Mu @ theta + self._u0s, (self.horizon, 1))
        return self._pack(states, inputs, theta)

    def _parameters(
        self,
        x0: np.ndarray,
        target: np.ndarray,
        cell: tuple[np.ndarray, np.ndarray] | None,
    ) -> tuple[np.ndarray, _BuiltProblem, tuple[np.ndarray, np.ndarray] | None]:
        """The parameter vector (measured state, target, then the cell rows: normals column
        by column, as casadi's vec stacks them, then offsets, then the steady rows'
        relaxation), the problem it is for, and the steady position's cell rows as given,
        (normals, offsets - terminal extent) (None without keep-apart)."""
        if not self.cell_rows:
            if cell is not None:
                raise ValueError("this MPC was built without keep-apart rows (cell_rows=0)")
            return np.concatenate([x0, target]), self._problems[0], None
        if cell is None:
            raise ValueError(
                f"this MPC takes {self.cell_rows} keep-apart rows at every solve; a robot "
                "without its cell must brake instead of solving"
            )
        normals = np.asarray(cell[0], dtype=float)
        offsets = np.asarray(cell[1], dtype=float)
        if normals.shape != (self.cell_rows, 2) or offsets.shape != (self.cell_rows,):
            raise ValueError(
                f"keep-apart rows must have shapes ({self.cell_rows}, 2) and "
                f"({self.cell_rows},), got {normals.shape} and {offsets.shape}"
            )
        if not (np.isfinite(normals).all() and np.isfinite(offsets).all()):
            raise ValueError("keep-apart rows must be finite")
        normals, offsets = self._cell_instance(normals, offsets)
        problem = self._problem(len(offsets))
        steady_rows = (normals, offsets - self.terminal.position_extent)
        relax = self.steady_relaxation(normals, offsets, self.model.position(x0))
        return (
            np.concatenate([x0, target, normals.reshape(-1, order="F"), offsets, relax]),
            problem,
            steady_rows,
        )

    def steady_relaxation(
        self, normals: np.ndarray, offsets: np.ndarray, position: np.ndarray
    ) -> np.ndarray:
        """How far the steady state's rows move out (metres): (s, min(s, e_f)) for its
        cell rows normals @ p_s <= offsets - e_f and its region rows (cell rows as given:
        normals (m, 2) unit or zero, offsets (m,); e_f: the terminal extent; the region
        rows go no farther out than the plan's, beyond which no plan could end near the
        steady state), with s the least relaxation that leaves room for a disc of radius
        STEADY_SET_MIN_RADIUS, 0 when the rows as given do. The linear program: min s over
        (p, s) s.t. normals @ p - s <= offsets - e_f - radius, region rows at p - s <= their
        offsets - radius, and <= the plan's region offsets - radius (a Chebyshev centre
        with every row moved out by the same s: Boyd & Vandenberghe, "Convex
        Optimization", 2004, section 8.5.1). A point that keeps every row with the radius
        to spare (the last program's centre, or `position`, the robot's) shows s = 0
        without solving it."""
        radius = STEADY_SET_MIN_RADIUS
        extent = self.terminal.position_extent
        bounds = np.asarray(offsets, dtype=float) - extent
        region_rows, region_bounds = self._steady_region_rows
        inner_bounds = bounds - radius
        for point in (self._steady_centre, position):
            if (
                point is not None
                and (normals @ point <= inner_bounds).all()
                and (region_rows @ point <= self._steady_region_inner).all()
            ):
                return np.zeros(2)
        n_cell, n_region = len(bounds), len(region_bounds)
        result = scipy.optimize.linprog(
            c=[0.0, 0.0, 1.0],
            A_ub=np.block([
                [normals, -np.ones((n_cell, 1))],
                [region_rows, -np.ones((n_region, 1))],
                [region_rows, np.zeros((n_region, 1))],
            ]),
            b_ub=np.concatenate([bounds, region_bounds, region_bounds + extent]) - radius,
            bounds=[(None, None)] * 3,
            method="highs",
        )
        if result.status == 0:
            self._steady_centre = np.asarray(result.x[:2], dtype=float)
            relax = max(0.0, float(result.x[2]))
        else:
            # Only a region too small for the footprint has no such point; the steady
            # state's slack then takes what the robot's own position leaves.
            relax = max(0.0, float(np.max(normals @ position - bounds, initial=0.0)) + radius)
        return np.array([relax, min(relax, extent)])

    def _cell_instance(
        self, normals: np.ndarray, offsets: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray]:
        """The rows that can bind, in the order given, filled up with padding rows to the
        smallest budget that holds them (to cell_rows while that budget is rented:
        _rent_or_buy). A row with normal (0, 0) and offset c reads
        sigma >= pad - c (pad: the cell pad on the path, the terminal extent at the steady
        state); for c >= both pads it never binds, because the optimal sigma is >= 0 (a
        negative sigma only tightens rows and adds cost), so leaving it out changes no
        solution. Every other row is kept (a zero normal with a smaller offset would force
        sigma > 0: an empty cell, honoured as given)."""
        # Elementwise operations, not reductions or np.full: on a dozen rows numpy's
        # per-call costs are the whole cost (README, Performance: keep-apart rows).
        vacuous_offset = self._vacuous_offset
        kept = (normals[:, 0] != 0.0) | (normals[:, 1] != 0.0) | (offsets < vacuous_offset)
        count = int(np.count_nonzero(kept))
        budget = self._rent_or_buy(next(b for b in self.row_budgets if b >= count))
        out_normals = np.zeros((budget, 2))
        out_offsets = np.empty(budget)
        out_offsets.fill(vacuous_offset + PADDING_ROW_OFFSET)
        out_normals[:count] = normals[kept]
        out_offsets[:count] = offsets[kept]
        return out_normals, out_offsets

    def _rent_or_buy(self, budget: int) -> int:
        """The budget whose problem answers a solve that needs `budget`: its own once this
        MPC has it or has needed it rented_samples times, else cell_rows' (RENTED_SAMPLES)."""
        if budget in self._problems or not self._rented_samples:
            return budget
        needs = self._budget_needs.get(budget, 0) + 1
        self._budget_needs[budget] = needs
        return budget if needs >= self._rented_samples else self.cell_rows

    def _multipliers_for(self, problem: _BuiltProblem) -> np.ndarray | None:
        """The last solve's constraint multipliers in `problem`'s row layout: the rows
        outside the cell as they were, cell row m of each group from the same slot (slots
        the last problem did not have start at 0)."""
        if self._lam_g is None or self._lam_rows == problem.rows:
            return self._lam_g
        last = self._problems[self._lam_rows]
        lam = np.zeros(len(problem.lbg))
        lam[problem.other_index] = self._lam_g[last.other_index]
        shared = min(last.rows, problem.rows)
        if shared:
            lam[problem.cell_index[:, :shared]] = self._lam_g[last.cell_index[:, :shared]]
        return lam

    def _run(
        self,
        guess: np.ndarray,
        parameters: np.ndarray,
        problem: _BuiltProblem,
        *,
        warm_duals: bool,
        shifted_plan: bool,
    ) -> ChainResult:
        """shifted_plan: the guess is the last plan shifted (False: a cold or constructed
        guess, or an answer that must be converged: no real-time iteration,
        solver_chain.py)."""
        warm = warm_duals and self._lam_g is not None
        return problem.chain.solve(
            NlpInstance(
                guess=guess,
                parameters=parameters,
                lbx=self._lbw,
                ubx=self._ubw,
                lbg=problem.lbg,
                ubg=problem.ubg,
                lam_x0=self._lam_x if warm else None,
                lam_g0=self._multipliers_for(problem) if warm else None,
                shifted_plan=shifted_plan,
            )
        )

    def _stalled(self, w: np.ndarray, x0: np.ndarray, target: np.ndarray) -> bool:
        """Resting on a stationary point short of the target: the plan and the steady state
        stay where the robot is. Happens with nonholonomic models started at rest (at zero
        speed steering has no first-order effect, so "stay" satisfies the optimality
        conditions); a second start from a guess that moves breaks the symmetry."""
        # The cheap tests first (a robot under way fails the first).
        x_s = self._Mx @ self._theta(w) + self._x0s
        i, j = self.model.position_indices
        if math.hypot(x_s[i] - x0[i], x_s[j] - x0[j]) >= STALL_DISTANCE:
            return False
        if math.hypot(x_s[i] - target[0], x_s[j] - target[1]) <= STALL_OFFSET:
            return False
        states = self._unpack(w)[0]
        return float(np.abs(states[:, [i, j]] - x0[[i, j]]).max()) < STALL_DISTANCE

    def solve(
        self,
        x0: np.ndarray,
        target_xy: np.ndarray,
        cell: tuple[np.ndarray, np.ndarray] | None = None,
    ) -> MpcSolution:
        """One solve from the measured state x0 (nx,) towards target_xy (2,), metres.

        cell: the keep-apart rows (normals (cell_rows, 2), offsets (cell_rows,)) with
        normals @ p <= offsets for the robot's centre; required when cell_rows > 0."""
        x0 = np.asarray(x0, dtype=float).reshape(-1)
        target = np.asarray(target_xy, dtype=float).reshape(2)
        if not (np.isfinite(x0).all() and np.isfinite(target).all()):
            # A NaN reaching fatrop from a cold start can keep it iterating for minutes.
            raise ValueError(f"state {x0.tolist()} and target {target.tolist()} must be finite")
        parameters, problem, steady_rows = self._parameters(x0, target, cell)
        # A cold start (no plan yet, or reset) is no shifted plan: the robot held where it
        # is. From it the real-time iteration is left out as for the second starts: for a
        # car at rest, steering has no first-order effect at that guess, so its step drove
        # straight off (measured: 1.3 % more closed-loop cost than the full path towards a
        # target 22 degrees off its heading, test_control_real_time_rest).
        cold = self._guess is None
        guess = self._cold_guess(x0) if cold else self._guess
        guess = self._align_angles(guess, x0).copy()
        guess[: self.model.nx] = x0  # the first state (_unpack)
        run = self._run(guess, parameters, problem, warm_duals=True, shifted_plan=not cold)
        final, status = run.final, run.status
        solve_time, iterations, success = run.elapsed, run.iterations, run.success
        if success and self._stalled(final.x, x0, target) and not self._tried_here(x0, target):
            if not final.converged:
                # The second starts are judged by their cost against this answer's, which
                # needs a converged answer: a real-time iterate (a few steps, not a KKT
                # point) lost to every converged restart that came back to the same rest,
                # so a car-like robot at rest restarted at every sample (177 of 200, 5.5x
                # the full path's solve time). Converge it first (the full solve alone).
                converged = self._run(
                    guess, parameters, problem, warm_duals=True, shifted_plan=False
                )
                solve_time += converged.elapsed
                iterations += converged.iterations
                if converged.success:
                    final, status = converged.final, converged.status
            if self._stalled(final.x, x0, target):
                improved = False
                for escape in self._escape_guesses(x0, target):
                    retry = self._run(
                        escape, parameters, problem, warm_duals=False, shifted_plan=False
                    )
                    solve_time += retry.elapsed
                    iterations += retry.iterations
                    if retry.success and retry.final.cost < final.cost - 1e-9:
                        final, status, improved = retry.final, retry.status, True
                self._no_escape_at = None if improved else (x0.copy(), target.copy())
        if success:
            self._guess = self._shifted(final.x)
            self._lam_g, self._lam_x = final.lam_g, final.lam_x
            self._lam_rows = problem.rows
        else:
            self._guess = self._shifted(guess)
            self._lam_g = self._lam_x = None
        states, inputs, theta, slacks = self._unpack(final.x)
        x_s = self._Mx @ theta + self._x0s
        u_s = self._Mu @ theta + self._u0s
        steady = SteadyStatePoint(x_s, u_s, theta, self.model.position(x_s))
        steady_violation = 0.0
        if steady_rows is not None:
            rows, bounds = steady_rows
            gaps = rows @ steady.position - bounds  # no rows in budget 0
            steady_violation = max(0.0, float(np.max(gaps, initial=0.0)))
        return MpcSolution(
            first_input=inputs[0].copy(),
            predicted_states=states,
            predicted_inputs=inputs,
            steady_state=steady,
            status=status,
            success=success,
            iterations=iterations,
            solve_time=solve_time,
            cell_violation=float(slacks.reshape(-1)[1:].max(initial=0.0)) * PATH_SLACK_UNIT,
            steady_cell_violation=steady_violation,
            row_budget=problem.rows,
        )
