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
          terminal:     ellipsoid  e_N' P e_N <= alpha   (e_N = steady_frame_error(x_N, x_s))
                        equality   x_N = x_s

The offset cost keeps the problem feasible for any target: an unreachable target yields the
admissible steady state closest to it (the tracking property of the references above), here
the projection of the target onto the doubly shrunk region.

Headings stay continuous (frames.py); the steady heading is a free parameter.
"""

from __future__ import annotations

import hashlib
import os
import shutil
import signal
import subprocess
import tempfile
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import casadi as ca
import numpy as np

from coverage_fleet.control.cache import cache_root, write_atomically
from coverage_fleet.control.frames import heading_index, steady_frame_error
from coverage_fleet.control.ingredients import TerminalIngredients
from coverage_fleet.control.limits import input_limits, state_limits, steady_limits
from coverage_fleet.errors import ConfigError, Problem
from coverage_fleet.vehicles.base import VehicleModel
from coverage_fleet.vehicles.settings import MpcSettings

#: Solver plugins the MPC is tested with, and the casadi options it starts from. Keys given
#: under `mpc.solver.options` in the vehicle file are merged over these.
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
DEFAULT_PLUGIN = "fatrop"
#: fatrop (casadi 3.6/3.7 builds) can stall inside an iteration when equality rows at the
#: terminal stage outnumber the inputs near a converged warm start; with fatrop the terminal
#: equality is therefore imposed as |x_N - x_s| <= this (metres / radians / m/s).
FATROP_EQUALITY_TOLERANCE = 1e-6
SOLVER_KEYS = ("plugin", "max_iter", "options", "compile")
#: Plugin that re-solves a sample another plugin failed on (from the same warm start),
#: with this many times the iteration budget (a cold start far from the target can need
#: over 100 IPOPT iterations, e.g. the surface vessel).
RESCUE_PLUGIN = "ipopt"
RESCUE_ITERATION_FACTOR = 3
#: After a failure of the fast plugin, this many samples go straight to the rescue plugin
#: (failures come in stretches, and a failed fast solve costs its whole iteration budget).
RESCUE_HOLD_SAMPLES = 10
#: Iteration cap of the fast plugin when a rescue plugin stands behind it (warm-started
#: fatrop needs 5 to 20; a sample that needs more is cheaper to hand over).
FAST_ITERATION_CAP = 40
DEFAULT_MAX_ITER = 100
#: A plan whose positions and steady state stay within this of the robot counts as "not
#: moving" (metres); see TrackingMpc._stalled.
STALL_DISTANCE = 0.01
#: ... while the steady state is farther than this from the target (metres).
STALL_OFFSET = 0.02
#: How far the second-start guess drives towards the target (metres).
ESCAPE_DISTANCE = 1.0


@dataclass(frozen=True)
class SteadyStatePoint:
    state: np.ndarray
    input: np.ndarray
    parameter: np.ndarray
    position: np.ndarray


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


def _region_offsets(A: np.ndarray, b: np.ndarray, distance: float) -> np.ndarray:
    return b - distance * np.linalg.norm(A, axis=1)


def stage_weights(model: VehicleModel, settings: MpcSettings) -> tuple[np.ndarray, np.ndarray]:
    """Q and R (diagonal) from the settings; all ones where the settings leave them empty
    (the vehicle-file loader always fills them)."""
    q = np.asarray(settings.state_weights or np.ones(model.nx), dtype=float)
    r = np.asarray(settings.input_weights or np.ones(model.nu), dtype=float)
    return np.diag(q), np.diag(r)


def settings_problems(model: VehicleModel, settings: MpcSettings) -> list[Problem]:
    """Everything wrong with these MPC settings for this model (empty when usable)."""
    source = model.source
    problems: list[Problem] = []
    if settings.horizon < 1:
        problems.append(Problem(source, "mpc.horizon", "must be at least 1"))
    if settings.sample_time <= 0:
        problems.append(Problem(source, "mpc.sample_time", "must be positive (seconds)"))
    for key, values, n, names in (
        ("mpc.state_weights", settings.state_weights, model.nx, model.state_names),
        ("mpc.input_weights", settings.input_weights, model.nu, model.input_names),
    ):
        if values and len(values) != n:
            problems.append(
                Problem(source, key, f"needs {n} entries ({', '.join(names)}), got {len(values)}")
            )
        if any(v < 0 for v in values):
            problems.append(Problem(source, key, "weights must be non-negative"))
    if settings.input_weights and min(settings.input_weights) <= 0:
        problems.append(Problem(source, "mpc.input_weights", "weights must be positive"))
    if settings.offset_weight <= 0:
        problems.append(Problem(source, "mpc.offset_weight", "must be positive"))
    if settings.terminal_decrease_slack < 0:
        problems.append(Problem(source, "mpc.terminal_decrease_slack", "must be zero or positive"))
    if not 0.0 < settings.terminal_shrink <= 1.0:
        problems.append(Problem(source, "mpc.terminal_shrink", "must be in (0, 1]"))
    if not 0.0 <= settings.steady_state_margin < 1.0:
        problems.append(Problem(source, "mpc.steady_state_margin", "must be in [0, 1)"))
    if settings.terminal not in ("equality", "ellipsoid"):
        problems.append(
            Problem(source, "mpc.terminal", f"'{settings.terminal}': use equality or ellipsoid")
        )
    if settings.terminal == "ellipsoid" and not model.stabilisable_at_rest:
        problems.append(
            Problem(
                source,
                "mpc.terminal",
                f"ellipsoid needs a linearisation at rest that can be stabilised; the "
                f"{model.kind} model's cannot (at rest it cannot move in every direction, "
                f"e.g. sideways), so no terminal ellipsoid exists: use 'equality'",
            )
        )
    heading = heading_index(model)
    if settings.terminal == "ellipsoid" and heading is not None and settings.state_weights:
        i, j = model.position_indices
        if settings.state_weights[i] != settings.state_weights[j]:
            problems.append(
                Problem(
                    source,
                    "mpc.state_weights",
                    "the two position weights must be equal with an ellipsoid terminal set "
                    "on a model with a heading (the set is computed once, at heading 0, and "
                    "rotated; a cost that prefers one map axis would not rotate with it)",
                )
            )
    unknown = sorted(set(settings.solver) - set(SOLVER_KEYS))
    if unknown:
        problems.append(
            Problem(source, "mpc.solver", f"unknown keys {unknown}; known: {list(SOLVER_KEYS)}")
        )
    plugin = settings.solver.get("plugin", DEFAULT_PLUGIN)
    if plugin not in SOLVER_DEFAULTS:
        problems.append(
            Problem(source, "mpc.solver.plugin", f"'{plugin}': use one of {list(SOLVER_DEFAULTS)}")
        )
    max_iter = settings.solver.get("max_iter", DEFAULT_MAX_ITER)
    if isinstance(max_iter, bool) or not isinstance(max_iter, int) or max_iter < 1:
        problems.append(Problem(source, "mpc.solver.max_iter", "must be a positive integer"))
    if not isinstance(settings.solver.get("compile", False), bool):
        problems.append(Problem(source, "mpc.solver.compile", "must be true or false"))
    if not isinstance(settings.solver.get("options", {}), dict):
        problems.append(Problem(source, "mpc.solver.options", "must be a mapping"))
    return problems


_CODEGEN_LOCK = threading.Lock()


@contextmanager
def interrupts_after_solve() -> Iterator[None]:
    """Hold Ctrl-C (SIGINT) until the solver call returns, then deliver it.

    casadi turns an interrupt that arrives inside a solver callback into a failed solve
    (IPOPT: NonIpopt_Exception_Thrown), which the controller would treat as a solver failure
    and carry on, losing the operator's Ctrl-C. Solves take milliseconds, so delivering the
    signal right after is as good as at once. Only the main thread can handle signals;
    elsewhere this does nothing."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    previous = signal.getsignal(signal.SIGINT)
    if not callable(previous):  # SIG_IGN or SIG_DFL set from outside Python: leave them
        yield
        return
    received: list[int] = []
    signal.signal(signal.SIGINT, lambda number, _frame: received.append(number))
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, previous)
        if received:
            previous(signal.SIGINT, None)


def compiled_library(solver: ca.Function) -> Path:
    """The solver's problem functions (cost, constraints, derivatives) as C, compiled into a
    shared library in the cache, keyed by the generated source, so it is compiled once per
    problem shape. casadi then loads it instead of evaluating its expression graphs."""
    compiler = os.environ.get("CC", "cc")
    if shutil.which(compiler) is None:
        raise ConfigError.single(
            "<environment>",
            "mpc.solver.compile",
            f"no C compiler '{compiler}' found (set CC, or compile: false)",
        )
    with tempfile.TemporaryDirectory() as folder:
        # casadi writes generated code to the working directory (it takes no path).
        with _CODEGEN_LOCK:
            here = os.getcwd()
            try:
                os.chdir(folder)
                solver.generate_dependencies("tracking_mpc.c")
            finally:
                os.chdir(here)
        source = Path(folder, "tracking_mpc.c").read_bytes()
        key = hashlib.sha256(source + ca.__version__.encode()).hexdigest()[:24]
        library = cache_root() / "mpc" / f"{key}.so"
        if library.is_file():
            return library
        built = Path(folder, "tracking_mpc.so")
        command = [compiler, "-O1", "-shared", "-fPIC", str(Path(folder, "tracking_mpc.c"))]
        done = subprocess.run([*command, "-o", str(built)], capture_output=True, text=True)
        if done.returncode != 0:
            raise ConfigError.single(
                "<environment>", "mpc.solver.compile", f"compiling failed: {done.stderr[:400]}"
            )
        if not write_atomically(library, built.read_bytes()):
            library = Path(tempfile.mkdtemp()) / f"{key}.so"
            library.write_bytes(built.read_bytes())
    return library


class TrackingMpc:
    """One robot's tracking MPC. Build once per robot; solve() once per sample."""

    def __init__(
        self,
        model: VehicleModel,
        settings: MpcSettings,
        region_halfspaces: tuple[np.ndarray, np.ndarray],
        terminal: TerminalIngredients | None = None,
    ) -> None:
        problems = settings_problems(model, settings)
        if problems:
            raise ConfigError(problems)
        if terminal is None:
            if settings.terminal == "ellipsoid":
                from coverage_fleet.control.terminal import compute_terminal_ingredients

                terminal = compute_terminal_ingredients(model, settings)
            else:
                terminal = TerminalIngredients.equality("equality asked for in the settings")
        if terminal.kind != settings.terminal:
            raise ConfigError.single(
                model.source,
                "mpc.terminal",
                f"settings ask for '{settings.terminal}' but the terminal ingredients given "
                f"are '{terminal.kind}' ({terminal.reason})",
            )
        self.model = model
        self.settings = settings
        self.terminal = terminal
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
        plugin = settings.solver.get("plugin", DEFAULT_PLUGIN)
        self.plugin = plugin
        self._build(plugin)
        self._guess: np.ndarray | None = None
        self._lam_g: np.ndarray | None = None
        self._lam_x: np.ndarray | None = None

    # --- construction ------------------------------------------------------------------

    def _build(self, plugin: str) -> None:
        """Stage-wise NLP: stage k holds z_k = (x_k, theta_k) and u_k; theta is carried as a
        constant state (theta_{k+1} = theta_k) so that every constraint touches one stage
        or two neighbouring ones, the block structure structure-exploiting solvers need."""
        model, settings, N = self.model, self.settings, self.horizon
        nx, nu = model.nx, model.nu
        F = model.discrete_dynamics(settings.sample_time, settings.substeps)
        n_theta = self._Mx.shape[1]
        nz = nx + n_theta
        Z = [ca.SX.sym(f"z{k}", nz) for k in range(N + 1)]
        U = [ca.SX.sym(f"u{k}", nu) for k in range(N)]
        target = ca.SX.sym("target", 2)
        measured = ca.SX.sym("measured", nx)
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
        g: list[ca.SX] = []
        lbg: list[np.ndarray] = []
        ubg: list[np.ndarray] = []

        def add(expr: ca.SX, lower: np.ndarray | float, upper: np.ndarray | float) -> None:
            n = expr.shape[0]
            if n == 0:
                return
            g.append(expr)
            lbg.append(np.broadcast_to(np.asarray(lower, float), (n,)).copy())
            ubg.append(np.broadcast_to(np.asarray(upper, float), (n,)).copy())

        def path(x: ca.SX) -> None:
            if len(g_x):
                add(ca.mtimes(ca.DM(G_x), x), -np.inf, g_x)
            add(ca.mtimes(A_r, ca.vertcat(x[i], x[j])), -np.inf, self.path_region_b)

        w: list[ca.SX] = []
        lbw: list[np.ndarray] = []
        ubw: list[np.ndarray] = []
        for k in range(N + 1):
            # Constraint order per stage (what fatrop's structure detection reads): the
            # dynamics to the next stage first, then this stage's path constraints.
            x, theta = Z[k][:nx], Z[k][nx:]
            x_s = ca.mtimes(Mx, theta) + x0s
            w.append(Z[k])
            if k == 0:
                lbw.append(np.concatenate([np.full(nx, -np.inf), -free_theta]))
                ubw.append(np.concatenate([np.full(nx, np.inf), free_theta]))
            else:
                lbw.append(np.concatenate([x_lower, -free_theta]))
                ubw.append(np.concatenate([x_upper, free_theta]))
            if k == N:
                path(x)
                break
            u_s = ca.mtimes(Mu, theta) + u0s
            w.append(U[k])
            lbw.append(u_lower)
            ubw.append(u_upper)
            dx, du = x - x_s, U[k] - u_s
            cost += ca.bilin(Q, dx, dx) + ca.bilin(R, du, du)
            add(Z[k + 1] - ca.vertcat(F(x, U[k]), theta), 0.0, 0.0)
            if k == 0:
                add(x - measured, 0.0, 0.0)
            else:
                path(x)
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
        add(ca.mtimes(A_r, p_s), -np.inf, self.steady_region_b)
        if self.terminal.kind == "equality":
            width = FATROP_EQUALITY_TOLERANCE if plugin == "fatrop" else 0.0
            add(x_N - x_s, -width, width)
        else:
            error = steady_frame_error(x_N, x_s, model.position_indices, self.heading)
            P = ca.DM(self.terminal.P)
            cost += ca.bilin(P, error, error)
            add(ca.bilin(P, error, error), -np.inf, self.terminal.alpha)
        cost += settings.offset_weight * ca.sumsqr(p_s - target)

        nlp = {
            "x": ca.vertcat(*w),
            "p": ca.vertcat(measured, target),
            "f": cost,
            "g": ca.vertcat(*g),
        }
        self._lbw, self._ubw = np.concatenate(lbw), np.concatenate(ubw)
        self._lbg, self._ubg = np.concatenate(lbg), np.concatenate(ubg)
        self._nz = nz
        self._solver = self._make_solver(plugin, nlp)
        if settings.solver.get("compile", False):
            library = compiled_library(self._solver)
            self._solver = self._make_solver(plugin, str(library))
        #: A more forgiving solver for the samples the fast one fails on.
        self._rescue = self._make_solver(RESCUE_PLUGIN, nlp) if plugin != RESCUE_PLUGIN else None
        self._rescue_samples_left = 0

    def _make_solver(self, plugin: str, nlp: dict[str, ca.SX] | str) -> ca.Function:
        options = dict(SOLVER_DEFAULTS[plugin])
        max_iter = int(self.settings.solver.get("max_iter", DEFAULT_MAX_ITER))
        if plugin != self.plugin:
            max_iter *= RESCUE_ITERATION_FACTOR
        elif plugin != RESCUE_PLUGIN:
            max_iter = min(max_iter, FAST_ITERATION_CAP)
        options[f"{plugin}.max_iter"] = max_iter
        if plugin == "fatrop":
            options["equality"] = [bool(v) for v in self._lbg == self._ubg]
        if plugin == self.plugin:
            options.update(self.settings.solver.get("options", {}))
        return ca.nlpsol(f"tracking_mpc_{plugin}", plugin, nlp, options)

    # --- solving -----------------------------------------------------------------------

    def reset(self) -> None:
        """Forget the warm start (next solve starts cold)."""
        self._guess = self._lam_g = self._lam_x = None

    def _unpack(self, w: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        nx, nu, N, nz = self.model.nx, self.model.nu, self.horizon, self._nz
        body = w[: N * (nz + nu)].reshape(N, nz + nu)
        last = w[N * (nz + nu) :]
        states = np.vstack([body[:, :nx], last[:nx]])
        inputs = body[:, nz:]
        return states, inputs, last[nx:].copy()

    def _pack(self, states: np.ndarray, inputs: np.ndarray, theta: np.ndarray) -> np.ndarray:
        N = self.horizon
        thetas = np.tile(theta, (N, 1))
        body = np.hstack([states[:-1], thetas, inputs]).reshape(-1)
        return np.concatenate([body, states[-1], theta])

    def _cold_guess(self, x0: np.ndarray) -> np.ndarray:
        theta, *_ = np.linalg.lstsq(self._Mx, x0 - self._x0s, rcond=None)
        u_s = self._Mu @ theta + self._u0s
        states = np.tile(x0, (self.horizon + 1, 1))
        inputs = np.tile(u_s, (self.horizon, 1))
        return self._pack(states, inputs, theta)

    def _shifted(self, w: np.ndarray) -> np.ndarray:
        """The previous solution one sample later: the warm start."""
        states, inputs, theta = self._unpack(w)
        states = np.vstack([states[1:], states[-1:]])
        inputs = np.vstack([inputs[1:], inputs[-1:]])
        return self._pack(states, inputs, theta)

    def _align_angles(self, w: np.ndarray, x0: np.ndarray) -> np.ndarray:
        """Shift the guess by whole turns so its angles match the measured ones."""
        states, inputs, theta = self._unpack(w)
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
        return self._pack(states, inputs, theta) if changed else w

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

    def _run(self, guess: np.ndarray, x0: np.ndarray, target: np.ndarray, warm_duals: bool):
        arguments: dict[str, Any] = {
            "x0": guess,
            "p": np.concatenate([x0, target]),
            "lbx": self._lbw,
            "ubx": self._ubw,
            "lbg": self._lbg,
            "ubg": self._ubg,
        }
        if warm_duals and self._lam_g is not None:
            arguments["lam_g0"] = self._lam_g
            arguments["lam_x0"] = self._lam_x
        if self._rescue is not None and self._rescue_samples_left > 0:
            # The fast solver failed recently: the problem is in a hard stretch, skip it.
            self._rescue_samples_left -= 1
            started = time.perf_counter()
            with interrupts_after_solve():
                result = self._rescue(**arguments)
            elapsed = time.perf_counter() - started
            stats = dict(self._rescue.stats())
            stats["return_status"] = f"{RESCUE_PLUGIN}: {stats.get('return_status')}"
            return result, stats, elapsed
        started = time.perf_counter()
        with interrupts_after_solve():
            result = self._solver(**arguments)
        elapsed = time.perf_counter() - started
        stats = dict(self._solver.stats())
        if not stats.get("success") and self._rescue is not None:
            self._rescue_samples_left = RESCUE_HOLD_SAMPLES
            first = f"{self.plugin}: {stats.get('return_status', 'failed')}"
            iterations = int(stats.get("iter_count", 0))
            started = time.perf_counter()
            with interrupts_after_solve():
                result = self._rescue(**arguments)
            elapsed += time.perf_counter() - started
            stats = dict(self._rescue.stats())
            stats["return_status"] = f"{first}; {RESCUE_PLUGIN}: {stats.get('return_status')}"
            stats["iter_count"] = iterations + int(stats.get("iter_count", 0))
        return result, stats, elapsed

    def _stalled(self, w: np.ndarray, x0: np.ndarray, target: np.ndarray) -> bool:
        """Resting on a stationary point short of the target: the plan and the steady state
        stay where the robot is. Happens with nonholonomic models started at rest (at zero
        speed steering has no first-order effect, so "stay" satisfies the optimality
        conditions); a second start from a guess that moves breaks the symmetry."""
        states, _, theta = self._unpack(w)
        p0 = self.model.position(x0)
        p_s = self.model.position(self._Mx @ theta + self._x0s)
        motion = np.abs(states[:, list(self.model.position_indices)] - p0).max()
        return (
            motion < STALL_DISTANCE
            and np.linalg.norm(p_s - p0) < STALL_DISTANCE
            and np.linalg.norm(p_s - target) > STALL_OFFSET
        )

    def solve(self, x0: np.ndarray, target_xy: np.ndarray) -> MpcSolution:
        x0 = np.asarray(x0, dtype=float).reshape(-1)
        target = np.asarray(target_xy, dtype=float).reshape(2)
        guess = self._cold_guess(x0) if self._guess is None else self._guess
        guess = self._align_angles(guess, x0)
        states, inputs, theta = self._unpack(guess)
        states[0] = x0
        guess = self._pack(states, inputs, theta)
        result, stats, solve_time = self._run(guess, x0, target, warm_duals=True)
        iterations = int(stats.get("iter_count", 0))
        success = bool(stats.get("success", False))
        w = np.asarray(result["x"], dtype=float).reshape(-1)
        if success and self._stalled(w, x0, target):
            escape = self._escape_guess(x0, target)
            if escape is not None:
                retry, retry_stats, retry_time = self._run(escape, x0, target, warm_duals=False)
                solve_time += retry_time
                iterations += int(retry_stats.get("iter_count", 0))
                if retry_stats.get("success") and float(retry["f"]) < float(result["f"]) - 1e-9:
                    result, stats = retry, retry_stats
                    w = np.asarray(result["x"], dtype=float).reshape(-1)
        if success:
            self._guess = self._shifted(w)
            self._lam_g = np.asarray(result["lam_g"], dtype=float).reshape(-1)
            self._lam_x = np.asarray(result["lam_x"], dtype=float).reshape(-1)
        else:
            self._guess = self._shifted(guess)
            self._lam_g = self._lam_x = None
        states, inputs, theta = self._unpack(w)
        x_s = self._Mx @ theta + self._x0s
        u_s = self._Mu @ theta + self._u0s
        steady = SteadyStatePoint(x_s, u_s, theta, self.model.position(x_s))
        return MpcSolution(
            first_input=inputs[0].copy(),
            predicted_states=states,
            predicted_inputs=inputs,
            steady_state=steady,
            status=str(stats.get("return_status", "unknown")),
            success=success,
            iterations=iterations,
            solve_time=solve_time,
        )
