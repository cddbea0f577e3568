"""Real-time iteration: one sequential-quadratic-programming step per sample.

Method (Diehl, Bock & Schloeder, "A real-time iteration scheme for nonlinear optimization in
optimal feedback control", SIAM J. Control Optim. 43(5), 2005): the previous sample's plan,
shifted by one step, is already close to the new optimum, so one full Newton-type step from
it tracks the solution as the state moves. Each sample linearises the constraints at the
shifted plan, takes the Gauss-Newton Hessian of the least-squares cost (sum of r' W r terms:
the stage, terminal and offset costs; 2 J_r' W J_r is positive semidefinite, so the QP is
convex even where the exact Hessian of the rotated terminal error is not), adds the
dynamics' own curvature on its diagonal (below), solves that QP with a structure-exploiting
solver and takes the full step.

Why the dynamics' curvature: the Gauss-Newton Hessian knows nothing of it, and the
linearised model of a vehicle that steers lets a heading turn move the position sideways
for free (first order in the turn), while the true motion also loses ground (second order:
the chord of an arc). Far from the target the offset cost pulls hard enough that the QP
turned headings and the steady state by up to 3 rad in one step: on the benchmark loop
(benchmarks/mpc_benchmark.py) 40 of 120 rover samples still had dynamics defects of 0.4-0.6
m after three steps, and they and 32 of 120 car samples went to the full solve. The Hessian
of lam' g over the dynamics rows holds that loss of ground (dynamics_curvature evaluates it
on one RK4 step per sample). Only its diagonal is kept (clipped at zero, so the QP stays
convex and keeps the stage structure), and doubled: with the diagonal alone the iteration
overshot in the coupled heading / yaw-rate direction and oscillated with growing amplitude
(the rover's steady heading 0.56, 0.53, 0.59, 0.50 rad on successive samples, the violation
growing 1.4x per sample until a sample needed a second step); the Gershgorin bound (row
sums of |H|, an upper bound of the curvature) damped the vessel's steps so much that 74 %
of its samples were rejected. With twice the diagonal, 116 of 120 rover and 115 of 120 car
samples pass after one step, and the closed-loop cost matches the full solve's
(mpc_benchmark prints both). The Hessian of a QP step sets its length, not where the
iteration stops (a zero step solves the NLP's KKT conditions whatever the Hessian), so the
real-time path now follows the full solve's own optimum more closely, local ones included
(README: the orchard rover that backs).

Acceptance test on the new iterate w+ (the step is applied only when it passes; otherwise
up to MAX_STEPS - 1 more steps are taken from it, and when none passes the chain's full
solve answers the sample, so the closed loop and the gate see a converged
plan):
- the QP solver reported success and every value of w+ is finite;
- constraint violation: the largest distance of g(w+) and w+ outside their bounds is at
  most VIOLATION_TOLERANCE. Linear rows (inputs, speed polygons, region half-planes) hold
  exactly after the step; what is left is the linearisation error of the nonlinear rows
  (dynamics defects, the terminal ellipsoid), which is second order in the step: small
  while the shifted plan is a good start, large after a new target or a sharp manoeuvre,
  exactly when one step is not enough.
A KKT-residual test was tried too and dropped: the Gauss-Newton step leaves a residual of
the order of the step even on accepted samples whose closed loop matches the full solve
(benchmarks/mpc_benchmark.py prints the closed-loop cost ratio).

The QP solver: HPIPM (Frison & Diehl, "HPIPM: a high-performance quadratic programming
framework for model predictive control", IFAC-PapersOnLine 53(2), 2020), a Riccati-based
interior point method over the stage structure [z_0 u_0 z_1 u_1 ... z_N] the formulation
already has, so it needs no warm start and its cost grows linearly with the horizon. It is
called directly on the stage blocks (stage_qp.StageQp: casadi's own HPIPM interface rebuilt
HPIPM's structures on every call and boxed every state), partially condensed to blocks of
two stages, in HPIPM's absolute formulation (QP_DEFAULTS: why). Measured earlier through
casadi's interface on the multirotor QP (horizon 20, 166 variables, 550 rows, CPU time,
loaded 2-core machine): HPIPM 1.3-1.6 ms (8-10 interior point iterations, about 0.5 ms of
it per-call overhead of the interface); OSQP 1.3-1.8 ms only when warm-started at the
answer and 15-40 ms cold (ADMM needs hundreds of iterations on this conditioning); qrqp
failed ("search direction"); daqp and qpOASES gave wrong or no answers on the equality
rows; fatrop's QP interface failed. OSQP stays selectable (`mpc.solver.qp`), through
casadi's interface (stage_qp.ConicQp).

One step is three calls from Python: the QP data at w (a casadi Function evaluated on bound
arrays, buffered_call.py, returning the nonzeros of H and A), the QP, and the check of the
new iterate (its cost and constraint violation, another buffered Function).

The problem functions (QP data and the acceptance test) are plain casadi Functions of the
decision variables and the parameter vector p; nothing about the target, the measured state
or future parameters (e.g. position half-planes) is hard-wired, so a formulation that grows
its parameter vector needs no change here. With `compile`, they are generated as C and
loaded from the same cache as the full solve's (codegen.py).
"""

from __future__ import annotations

import time
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import casadi as ca
import numpy as np

from coverage_fleet.control.attempts import Attempt, NlpInstance
from coverage_fleet.control.buffered_call import BufferedFunction
from coverage_fleet.control.codegen import compiled_functions
from coverage_fleet.control.stage_qp import ConicQp, StageLayout, StageQp
from coverage_fleet.interrupts import sigint_held
from coverage_fleet.vehicles.settings import QP_PLUGINS

#: Largest constraint violation of an accepted iterate. The rows are in metres (region,
#: dynamics defects of positions), m/s, rad and N (defects of the other states), and the
#: terminal ellipsoid as a fraction of its level (mpc.py scales it to e'Pe/alpha <= 1):
#: 1 cm is far inside the footprint margin the region is shrunk by, and 1 % of the level
#: stays inside the verified terminal set, which is 1/terminal_shrink (about 11 %) larger.
VIOLATION_TOLERANCE = 1e-2
#: SQP steps one sample may take before it hands over to the full solve. One is the
#: real-time iteration proper; a second and third step (each a fresh linearisation at the
#: last iterate, so their linearisation error shrinks quadratically) rescue most samples of
#: the nonlinear models (the surface vessel turning) at a fraction of a full solve's cost.
MAX_STEPS = 3
#: Settings of each QP solver: StageQp's keywords for HPIPM, casadi's conic options for
#: OSQP.
QP_DEFAULTS: dict[str, dict[str, Any]] = {
    # HPIPM's absolute formulation: 20 % less work per interior-point iteration than its
    # default ("speed"), answers within 1.3e-3 (rover) to 1.2e-2 (multirotor) of a QP solved
    # to 1e-9 where "speed" at 1e-6 stays within 1e-4 (80 QPs of mpc_benchmark's loops
    # each). One QP is one Newton step of the NLP, whose linearisation error the acceptance
    # test bounds at VIOLATION_TOLERANCE (1e-2), so the loops did not change: the same
    # share of samples accepted (97-99 %) and closed-loop cost (within 1e-4 of "speed").
    # At 1e-5 the vessel's one step near rest missed the full solve by 3e-3 N
    # (test_control_fast_path allows 1e-3) and two steps on one state differed by 1e-2.
    "hpipm": {"mode": "speed_abs", "tolerance": 1e-6, "iteration_limit": 100},
    "osqp": {
        "print_problem": False,
        "error_on_fail": False,
        "warm_start_primal": True,
        "warm_start_dual": True,
        "osqp": {
            "verbose": False,
            "eps_abs": 1e-7,
            "eps_rel": 1e-7,
            "max_iter": 4000,
            "polish": True,
        },
    },
}


@dataclass(frozen=True)
class LeastSquaresTerm:
    """One cost term r' W r (W symmetric positive semidefinite)."""

    residual: ca.SX
    weight: np.ndarray


@dataclass(frozen=True)
class QuadraticRow:
    """A constraint row g_row = r' W r <= upper (a terminal ellipsoid): its curvature,
    weighted by the row's multiplier, joins the QP Hessian."""

    row: int
    term: LeastSquaresTerm


def gauss_newton_hessian(
    terms: Sequence[tuple[ca.SX, LeastSquaresTerm]], w: ca.SX
) -> ca.SX:
    """2 J' W J with J the Jacobian of all residuals stacked and W block diagonal (each
    term's c W): the Gauss-Newton Hessian of sum c r' W r (c a scalar factor). One
    Jacobian of the stacked residuals, not one per term: a term's Jacobian walks the whole
    expression graph of w (measured: half of building the real-time step of a problem)."""
    if not terms:
        return ca.SX(w.shape[0], w.shape[0])
    jacobian = ca.jacobian(ca.vertcat(*(term.residual for _, term in terms)), w)
    weight = ca.diagcat(*(factor * ca.DM(term.weight) for factor, term in terms))
    return 2 * ca.mtimes([jacobian.T, weight, jacobian])


#: The dynamics' curvature enters the QP Hessian as this multiple of its diagonal (module
#: docstring: 1 oscillated, the Gershgorin bound over-damped; measured, not derived).
CURVATURE_FACTOR = 2.0


def dynamics_curvature(increments: ca.SX, lam_dynamics: ca.SX, w: ca.SX) -> ca.SX:
    """CURVATURE_FACTOR diag(max(0, diag(d^2 (-lam' increments) / dw^2))), a diagonal
    matrix: the convex part of the dynamics rows' curvature, weighted by their multipliers
    `lam_dynamics` (rows z_{k+1} - F(z_k, u_k), with F taken as x_k + increment_k).

    The increments are one RK4 step over the sample, not the substepped map the rows use:
    an approximation of an approximation (the diagonal, doubled), it gave the same
    acceptance on mpc_benchmark's loops for all four models (0-6 of 120 samples needing
    more than one step) at half the evaluation cost of the car's QP data (220 -> 108 us,
    casadi's virtual machine)."""
    lagrangian = -ca.dot(lam_dynamics, increments)
    curvature = ca.diag(ca.hessian(lagrangian, w)[0])
    return ca.diag(CURVATURE_FACTOR * ca.fmax(curvature, 0))


class RealTimeIterationStrategy:
    """A `SolveStrategy` (solver_chain.py): one SQP step, then the acceptance test."""

    name = "rti"
    #: A rejected step is followed by a full solve, whose shifted plan is again a good
    #: start: try the next sample in real time again.
    hold_samples: int | None = 0
    #: Steps from a guess near the optimum only (solver_chain.py's module docstring).
    needs_shifted_plan = True

    def __init__(
        self,
        nlp: dict[str, ca.SX],
        terms: Sequence[LeastSquaresTerm],
        quadratic_rows: Sequence[QuadraticRow],
        layout: StageLayout,
        dynamics_increments: ca.SX,
        qp_plugin: str,
        compile_functions: bool,
    ) -> None:
        if qp_plugin not in QP_PLUGINS:
            raise ValueError(f"QP plugin must be one of {list(QP_PLUGINS)}, got {qp_plugin!r}")
        w, p, f, g = nlp["x"], nlp["p"], nlp["f"], nlp["g"]
        # HPIPM reads the dynamics as A z + B u - z_next: flip the sign of those rows.
        sign = np.where(layout.dynamics_mask(), -1.0, 1.0)
        if len(sign) != g.shape[0]:
            raise ValueError(f"layout has {len(sign)} rows, the problem {g.shape[0]}")
        dynamics_rows = np.nonzero(layout.dynamics_mask())[0]
        if dynamics_increments.shape != (len(dynamics_rows), 1):
            raise ValueError(
                f"{len(dynamics_rows)} dynamics rows, but dynamics increments of shape "
                f"{dynamics_increments.shape}"
            )
        self._sign = sign
        g_qp = ca.DM(sign) * g
        lam_g = ca.SX.sym("lam_g", g.shape[0])
        # Convex rows (r' W r <= upper) add multiplier x their Gauss-Newton curvature: the
        # QP then sees the ellipsoid bend, not only its tangent plane (from an interior
        # point the tangent half-space alone lets one step run far outside). Multipliers of
        # upper bounds are >= 0 in casadi's convention; clipping keeps the Hessian PSD.
        hessian = gauss_newton_hessian(
            [(ca.DM(1.0), t) for t in terms]
            + [(ca.fmax(lam_g[q.row], 0), q.term) for q in quadratic_rows],
            w,
        ) + dynamics_curvature(dynamics_increments, lam_g[dynamics_rows.tolist()], w)
        jacobian = ca.jacobian(g_qp, w)
        # Nonzeros as dense columns: the QP data is evaluated on bound arrays
        # (buffered_call.py) and scattered into the QP solver's own layout.
        qp_data = ca.Function(
            "rti_qp_data",
            [w, p, lam_g],
            [hessian.nz[:], ca.gradient(f, w), g_qp, jacobian.nz[:]],
            ["w", "p", "lam_g"],
            ["h", "grad", "g", "a"],
        )
        check = _check_function(f, g_qp, w, p)
        if compile_functions:
            library = str(compiled_functions([qp_data, check], "tracking_mpc_rti"))
            qp_data = ca.external("rti_qp_data", library)
            check = ca.external("rti_check", library)
        self.qp_plugin = qp_plugin
        if qp_plugin == "hpipm":
            self._qp: StageQp | ConicQp = StageQp(
                layout, hessian.sparsity(), jacobian.sparsity(), **QP_DEFAULTS["hpipm"]
            )
        else:
            self._qp = ConicQp(
                qp_plugin, hessian.sparsity(), jacobian.sparsity(), QP_DEFAULTS[qp_plugin]
            )
        self._qp_data = BufferedFunction(qp_data)
        self._check = BufferedFunction(check)
        self._last_bounds: tuple[np.ndarray, ...] | None = None

    def _bounds_for_qp(self, lower: np.ndarray, upper: np.ndarray) -> tuple[np.ndarray, ...]:
        # A problem's row bounds are the same arrays at every sample (mpc.py): flip them
        # once (the last pair is kept, and holding them keeps their identity meaningful).
        last = self._last_bounds
        if last is not None and last[0] is lower and last[1] is upper:
            return last[2], last[3]
        flipped = self._sign < 0
        lo, hi = lower.copy(), upper.copy()
        lo[flipped], hi[flipped] = -upper[flipped], -lower[flipped]
        self._last_bounds = (lower, upper, lo, hi)
        return lo, hi

    def attempt(self, instance: NlpInstance) -> Attempt:
        w, p = instance.guess, instance.parameters
        lbg, ubg = self._bounds_for_qp(instance.lbg, instance.ubg)
        lam_g = np.zeros(len(self._sign)) if instance.lam_g0 is None else instance.lam_g0
        lam_x = np.zeros(len(w)) if instance.lam_x0 is None else instance.lam_x0
        started = time.perf_counter()
        status, success, steps, cost = "QP failed", False, 0, float("nan")
        with sigint_held():
            while steps < MAX_STEPS:
                steps += 1
                data = self._qp_data(w=w, p=p, lam_g=lam_g)
                g = data["g"]
                solution = self._qp.solve(
                    h=data["h"], grad=data["grad"], a=data["a"], lba=lbg - g, uba=ubg - g,
                    lbx=instance.lbx - w, ubx=instance.ubx - w,
                    lam_a0=self._sign * lam_g, lam_x0=lam_x,
                )
                w = w + solution.step
                lam_g, lam_x = self._sign * solution.lam_a, solution.lam_x
                checked = self._check(
                    w=w, p=p, lbg=lbg, ubg=ubg, lbx=instance.lbx, ubx=instance.ubx
                )
                violation, cost = float(checked["violation"][0]), float(checked["f"][0])
                if not (solution.success and np.all(np.isfinite(w)) and np.isfinite(violation)):
                    status = "QP failed"
                    break
                success = violation <= VIOLATION_TOLERANCE
                if success:
                    status = "real-time iteration accepted" + (
                        f" after {steps} steps" if steps > 1 else ""
                    )
                    break
                status = f"iterate rejected (constraint violation {violation:.1e})"
        return Attempt(
            strategy=self.name,
            success=success,
            status=status,
            iterations=steps,
            elapsed=time.perf_counter() - started,
            x=w,
            cost=cost,
            lam_x=lam_x,
            lam_g=lam_g,
            converged=False,
        )


def _check_function(f: ca.SX, g: ca.SX, w: ca.SX, p: ca.SX) -> ca.Function:
    """The new iterate's cost and constraint violation: the largest distance of g(w) and w
    outside their bounds, 0 when inside. lbg, ubg are the bounds of the sign-flipped rows
    (RealTimeIterationStrategy._bounds_for_qp)."""
    lbg, ubg = (ca.SX.sym(name, g.shape[0]) for name in ("lbg", "ubg"))
    lbx, ubx = (ca.SX.sym(name, w.shape[0]) for name in ("lbx", "ubx"))
    violation = ca.fmax(
        0.0,
        ca.fmax(
            ca.mmax(ca.fmax(lbg - g, g - ubg)),
            ca.mmax(ca.fmax(lbx - w, w - ubx)),
        ),
    )
    return ca.Function(
        "rti_check",
        [w, p, lbg, ubg, lbx, ubx],
        [f, violation],
        ["w", "p", "lbg", "ubg", "lbx", "ubx"],
        ["f", "violation"],
    )
