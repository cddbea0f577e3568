"""Terminal ingredients for the tracking MPC: cost V_f(e) = e' P e, set {e' P e <= alpha}.

Method (quasi-infinite-horizon, Chen & Allgower, "A quasi-infinite horizon nonlinear model
predictive control scheme with guaranteed stability", Automatica 34(10), 1998, in discrete
time):

1. Linearise the discretised dynamics at rest (theta = 0). Position invariance makes the
   result valid at every steady position, so this is done once per vehicle type. A model
   with a heading is linearised at heading 0; at heading psi_s the linearisation is the
   similarity transform T(psi_s) A T(psi_s)^-1 (frames.py), so the same set holds for the
   error expressed in the steady frame (checked numerically here, per model).
2. Test stabilisability (Hautus test on every eigenvalue outside the open unit disc). Not
   stabilisable (unicycle, bicycle at rest): no ellipsoid exists; terminal equality.
3. LQR: P_lqr from the discrete algebraic Riccati equation (scipy.linalg.solve_discrete_are),
   K = -(R + B' P B)^-1 B' P A, local law u = u_s + K e. Terminal weight
   P = (1 + kappa) P_lqr with kappa = terminal_decrease_slack: for the linearisation the
   decrease is then (1 + kappa) l, and the extra kappa l absorbs the nonlinearity.
4. Level alpha: (a) every state and input limit row G_i v <= g_i holds in the set under the
   local law; for a linear row the largest level is s_i^2 / (G_i P^-1 G_i') with s_i the
   slack the row keeps from every admissible steady state (limits.steady_limits), closed
   form (the support function of an ellipsoid). (b) The decrease condition
   V_f(f(x, k(x))) - V_f(x) <= -l(x, k(x)) holds for the nonlinear discretised system:
   checked by dense sampling of the set (boundary and interior) plus local maximisation of
   the decrease margin (scipy.optimize.minimize, SLSQP); alpha is bisected down until it
   holds. Finally alpha = terminal_shrink * (largest verified level).

The region's half-spaces are not part of alpha: the MPC keeps the steady position the
set's position extent further inside the region instead (mpc.py), so one set serves every
region.

Results are cached by vehicle-file content (terminal_for_vehicle).
"""

from __future__ import annotations

import json
from pathlib import Path

import casadi as ca
import numpy as np
import scipy.linalg
import scipy.optimize

from coverage_fleet.control.cache import cache_root, write_atomically
from coverage_fleet.control.frames import heading_index, rotation_transform
from coverage_fleet.control.ingredients import TerminalIngredients
from coverage_fleet.control.limits import LinearLimits, input_limits, state_limits, steady_limits
from coverage_fleet.control.stage_cost import stage_weights
from coverage_fleet.errors import ConfigError
from coverage_fleet.vehicles.base import VehicleModel
from coverage_fleet.vehicles.loader import VehicleSpec
from coverage_fleet.vehicles.settings import MpcSettings, not_stabilisable_reason

#: Bump when the method changes: cached results of an older method are not reused.
METHOD_VERSION = 1
STABILISABILITY_TOLERANCE = 1e-9
EQUIVARIANCE_TOLERANCE = 1e-8
_BOUNDARY_SAMPLES = 3000
_INTERIOR_SAMPLES = 3000
_LOCAL_STARTS = 6
_BISECTIONS = 30
DECREASE_LABEL = "decrease condition"


def linearise_at_rest(
    model: VehicleModel, settings: MpcSettings, heading: float = 0.0
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """(A, B, x_r, u_r): Jacobians of the discretised dynamics at the rest point theta = 0
    (with the heading set to `heading` for models that have one)."""
    family = model.steady_states()
    x_r = np.asarray(family.x0, dtype=float).copy()
    u_r = np.asarray(family.u0, dtype=float).copy()
    h = heading_index(model)
    if h is not None:
        x_r[h] = heading
    F = model.discrete_dynamics(settings.sample_time, settings.substeps)
    x = ca.SX.sym("x", model.nx)
    u = ca.SX.sym("u", model.nu)
    jac = ca.Function("linearisation", [x, u], [ca.jacobian(F(x, u), x), ca.jacobian(F(x, u), u)])
    A, B = (np.array(m, dtype=float) for m in jac(x_r, u_r))
    return A, B, x_r, u_r


def is_stabilisable(A: np.ndarray, B: np.ndarray) -> bool:
    """Hautus test: rank [A - lambda I, B] = n for every eigenvalue with |lambda| >= 1."""
    n = A.shape[0]
    for lam in np.linalg.eigvals(A):
        if abs(lam) >= 1.0 - STABILISABILITY_TOLERANCE:
            pencil = np.hstack([A - lam * np.eye(n), B])
            if np.linalg.matrix_rank(pencil, tol=1e-8 * max(1.0, np.abs(pencil).max())) < n:
                return False
    return True


def check_rotation_equivariance(model: VehicleModel, settings: MpcSettings) -> str | None:
    """None when the linearisation at heading psi is T A_0 T^-1, T B_0; else what differs."""
    if heading_index(model) is None:
        return None
    A0, B0, *_ = linearise_at_rest(model, settings, 0.0)
    for psi in (0.7, -2.1):
        A, B, *_ = linearise_at_rest(model, settings, psi)
        T = rotation_transform(model.nx, model.position_indices, psi)
        error = max(
            np.abs(A - T @ A0 @ np.linalg.inv(T)).max(), np.abs(B - T @ B0).max(initial=0.0)
        )
        if error > EQUIVARIANCE_TOLERANCE * max(1.0, np.abs(A0).max()):
            return (
                f"the linearisation at heading {psi} rad is not the rotated one at heading 0 "
                f"(difference {error:.2e}): rotating the terminal set would be wrong"
            )
    return None


def _level_for_rows(rows: np.ndarray, slack: np.ndarray, P_inv: np.ndarray) -> np.ndarray:
    """Largest alpha with rows @ e <= slack on {e' P e <= alpha}: slack^2 / (r P^-1 r')."""
    spread = np.einsum("ij,jk,ik->i", rows, P_inv, rows)
    with np.errstate(divide="ignore", invalid="ignore"):
        level = np.where(spread > 1e-15, np.maximum(slack, 0.0) ** 2 / spread, np.inf)
    return level


class _DecreaseCheck:
    """d(e) = V_f(f(x_r + e, u_r + K e) - x_r) - V_f(e) + l(e, K e) on the nonlinear model."""

    def __init__(self, model, settings, P, K, Q, R, x_r, u_r) -> None:
        F = model.discrete_dynamics(settings.sample_time, settings.substeps)
        e = ca.SX.sym("e", model.nx)
        v = ca.mtimes(ca.DM(K), e)
        nxt = F(ca.DM(x_r) + e, ca.DM(u_r) + v) - ca.DM(x_r)
        Pd = ca.DM(P)
        d = ca.bilin(Pd, nxt, nxt) - ca.bilin(Pd, e, e) + ca.bilin(ca.DM(Q), e, e)
        d += ca.bilin(ca.DM(R), v, v)
        self.margin = ca.Function("margin", [e], [d])
        self.gradient = ca.Function("gradient", [e], [ca.gradient(d, e)])
        self.P = P
        self.L_inv_T = np.linalg.inv(np.linalg.cholesky(P)).T  # e = sqrt(alpha) L^-T z
        self.nx = model.nx
        rng = np.random.default_rng(19980)
        z = rng.standard_normal((self.nx, _BOUNDARY_SAMPLES + _INTERIOR_SAMPLES))
        z /= np.linalg.norm(z, axis=0)
        radii = np.ones(z.shape[1])
        radii[_BOUNDARY_SAMPLES:] = rng.random(_INTERIOR_SAMPLES) ** (1.0 / self.nx)
        self.unit_points = z * radii
        self.batch = self.margin.map(z.shape[1])

    def sampled(self, alpha: float) -> tuple[float, np.ndarray]:
        """Largest margin over the samples and the sample points in e coordinates."""
        points = np.sqrt(alpha) * (self.L_inv_T @ self.unit_points)
        values = np.array(self.batch(points)).reshape(-1)
        return float(values.max()), points[:, np.argsort(values)[::-1]]

    def relative(self, alpha: float) -> float:
        """Largest d(e) / V_f(e) over the samples: <= 0 is a decrease; -0.05 means at least
        5 % of V_f is shed every step."""
        points = np.sqrt(alpha) * (self.L_inv_T @ self.unit_points)
        values = np.array(self.batch(points)).reshape(-1)
        levels = np.einsum("ij,ik,kj->j", points, self.P, points)
        return float((values / levels).max())

    def local(self, alpha: float, starts: np.ndarray) -> float:
        """Local maximisation of the margin over the set from the given starting points."""
        best = -np.inf
        for e0 in starts.T[:_LOCAL_STARTS]:

            def objective(e: np.ndarray) -> float:
                return -float(self.margin(e))

            def jac(e: np.ndarray) -> np.ndarray:
                return -np.array(self.gradient(e)).reshape(-1)

            inside = {
                "type": "ineq",
                "fun": lambda e: alpha - e @ self.P @ e,
                "jac": lambda e: -2.0 * self.P @ e,
            }
            result = scipy.optimize.minimize(
                objective,
                e0,
                jac=jac,
                constraints=[inside],
                method="SLSQP",
                options={"maxiter": 200, "ftol": 1e-14},
            )
            e = result.x
            if e @ self.P @ e <= alpha * (1 + 1e-9):
                best = max(best, -float(result.fun))
        return best

    def tolerance(self, alpha: float) -> float:
        return 1e-10 * max(1.0, alpha)

    def holds(self, alpha: float) -> bool:
        worst, _ = self.sampled(alpha)
        return worst <= self.tolerance(alpha)


def compute_ellipsoid(
    model: VehicleModel, settings: MpcSettings, content_hash: str = ""
) -> TerminalIngredients:
    """The ellipsoidal terminal ingredients of a stabilisable model (raises ConfigError with
    the reason otherwise)."""
    source = model.source
    if not model.stabilisable_at_rest:
        raise ConfigError.single(
            source,
            "mpc.terminal",
            f"{not_stabilisable_reason(model.kind)}; the MPC uses the terminal equality "
            f"x_N = x_s",
        )
    A, B, x_r, u_r = linearise_at_rest(model, settings)
    if not is_stabilisable(A, B):
        raise ConfigError.single(
            source,
            "vehicle.model",
            f"the {model.kind} model says it is stabilisable at rest but the Hautus test on "
            f"its linearisation fails: use terminal 'equality' and fix the model's flag",
        )
    rotation_fault = check_rotation_equivariance(model, settings)
    if rotation_fault:
        raise ConfigError.single(source, "vehicle.model", rotation_fault)
    Q, R = stage_weights(model, settings)
    try:
        P_lqr = scipy.linalg.solve_discrete_are(A, B, Q, R)
    except (np.linalg.LinAlgError, ValueError) as error:
        raise ConfigError.single(
            source,
            "mpc.state_weights",
            f"the Riccati equation has no stabilising solution with these weights ({error}); "
            f"a state weight of zero can hide an unstable mode",
        ) from None
    K = -np.linalg.solve(R + B.T @ P_lqr @ B, B.T @ P_lqr @ A)
    P = (1.0 + settings.terminal_decrease_slack) * P_lqr
    P = 0.5 * (P + P.T)
    P_inv = np.linalg.inv(P)

    family = model.steady_states()
    margin = settings.steady_state_margin
    levels: dict[str, float] = {}

    def limit_levels(limits: LinearLimits, slack: np.ndarray, rows: np.ndarray) -> None:
        for name, level in zip(limits.names, _level_for_rows(rows, slack, P_inv), strict=True):
            if np.isfinite(level):
                levels[name] = float(level)

    x_lim, u_lim = state_limits(model), input_limits(model)
    x_slack = steady_limits(x_lim, np.asarray(family.Mx), np.asarray(family.x0), margin).slack
    u_slack = steady_limits(u_lim, np.asarray(family.Mu), np.asarray(family.u0), margin).slack
    limit_levels(x_lim, x_slack, x_lim.G)
    limit_levels(u_lim, u_slack, u_lim.G @ K)
    if not levels:
        raise ConfigError.single(source, "vehicle.model", "no finite limit bounds the terminal set")
    alpha_limits = min(levels.values())
    if alpha_limits <= 0:
        raise ConfigError.single(
            source,
            "vehicle.model",
            f"the rest point lies on the limit '{min(levels, key=levels.get)}': no terminal "
            f"ellipsoid fits; use terminal 'equality'",
        )

    check = _DecreaseCheck(model, settings, P, K, Q, R, x_r, u_r)
    alpha_decrease = _largest_decreasing_level(check, alpha_limits)
    if alpha_decrease < alpha_limits:
        levels[DECREASE_LABEL] = alpha_decrease
    active = min(levels, key=levels.get)
    alpha = settings.terminal_shrink * levels[active]
    worst, order = check.sampled(alpha)
    worst = max(worst, check.local(alpha, order))
    relative = check.relative(alpha)
    if worst > check.tolerance(alpha) or relative > 1e-9:
        raise ConfigError.single(
            source,
            "mpc.terminal_decrease_slack",
            f"the decrease condition fails inside the verified level (margin {worst:.3e}); "
            f"raise terminal_decrease_slack or lower terminal_shrink",
        )
    i, j = model.position_indices
    extent = float(np.sqrt(alpha * np.linalg.eigvalsh(P_inv[np.ix_([i, j], [i, j])]).max()))
    return TerminalIngredients(
        kind="ellipsoid",
        P=P,
        alpha=float(alpha),
        K=K,
        P_lqr=P_lqr,
        decrease_margin=relative,
        limit_levels=levels,
        active_limit=active,
        position_extent=extent,
        reason=(f"LQR at rest; alpha = {settings.terminal_shrink:g} x the level set by '{active}'"),
        content_hash=content_hash,
    )


def _largest_decreasing_level(check: _DecreaseCheck, alpha_high: float) -> float:
    """Largest level (up to alpha_high) where the decrease condition holds, by sampling
    and local maximisation; bisection on a log scale."""

    def holds(alpha: float) -> bool:
        if not check.holds(alpha):
            return False
        _, order = check.sampled(alpha)
        return check.local(alpha, order) <= check.tolerance(alpha)

    if holds(alpha_high):
        return alpha_high
    low = alpha_high
    for _ in range(60):
        low *= 0.25
        if holds(low):
            break
    else:
        return 0.0
    high = min(alpha_high, 4 * low)
    for _ in range(_BISECTIONS):
        mid = np.sqrt(low * high)
        if holds(mid):
            low = mid
        else:
            high = mid
        if high / low < 1.01:
            break
    return low


def compute_terminal_ingredients(
    model: VehicleModel, settings: MpcSettings, content_hash: str = ""
) -> TerminalIngredients:
    """What the MPC uses for these settings: the ellipsoid, or the equality with its reason.
    With a content_hash (VehicleSpec.cache_key) the result is read from / written to the
    cache."""
    return _cached(model, settings, content_hash)[0]


def _compute(model: VehicleModel, settings: MpcSettings, content_hash: str) -> TerminalIngredients:
    if settings.terminal == "ellipsoid":
        return compute_ellipsoid(model, settings, content_hash)
    if not model.stabilisable_at_rest:
        reason = f"{not_stabilisable_reason(model.kind)}: terminal equality x_N = x_s"
    else:
        reason = "the vehicle file asks for the terminal equality x_N = x_s"
    return TerminalIngredients.equality(reason, content_hash)


# --- cache --------------------------------------------------------------------------------


def cache_directory() -> Path:
    """$COVERAGE_FLEET_CACHE/terminal, else ~/.cache/coverage_fleet/terminal."""
    return cache_root() / "terminal"


def cache_path(content_hash: str) -> Path:
    return cache_directory() / f"{content_hash}-v{METHOD_VERSION}.json"


def terminal_for_vehicle(
    spec: VehicleSpec, use_cache: bool = True
) -> tuple[TerminalIngredients, bool]:
    """(ingredients, read_from_cache) for a loaded vehicle file, keyed by spec.cache_key
    (file bytes and model code)."""
    if not use_cache:
        ingredients = _compute(spec.model, spec.mpc, spec.cache_key)
        write_atomically(cache_path(spec.cache_key), _encode(ingredients))
        return ingredients, False
    return _cached(spec.model, spec.mpc, spec.cache_key)


def _encode(ingredients: TerminalIngredients) -> bytes:
    return json.dumps(ingredients.to_json(), indent=1).encode()


def _cached(
    model: VehicleModel, settings: MpcSettings, key: str
) -> tuple[TerminalIngredients, bool]:
    if not key:
        return _compute(model, settings, key), False
    path = cache_path(key)
    if path.is_file():
        try:
            cached = TerminalIngredients.from_json(json.loads(path.read_text()))
            if cached.kind == settings.terminal and cached.content_hash == key:
                return cached, True
        except (ValueError, KeyError, TypeError):
            pass  # unreadable entry: recompute and overwrite
    ingredients = _compute(model, settings, key)
    write_atomically(path, _encode(ingredients))
    return ingredients, False
