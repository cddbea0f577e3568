"""Load-time checks that a model (built-in or user-supplied) keeps the VehicleModel contract.

The one the control layer relies on most is position invariance: shifting the position
states shifts the next state by the same amount and changes nothing else, so terminal
ingredients computed once per vehicle type hold at every target. It is checked
numerically: one discrete step from random states and inputs, with and without a random
shift, must agree to ~1e-9 (relative to the shift).
"""

from __future__ import annotations

import numpy as np

from coverage_fleet.errors import Problem
from coverage_fleet.vehicles.base import VehicleModel

INVARIANCE_TOLERANCE = 1e-9
_TRIALS = 8
_SHIFT_SCALE = 50.0  # metres: a shift the size of a field site


def check_model(
    model: VehicleModel, sample_time: float, substeps: int, source: str
) -> list[Problem]:
    """Every contract violation found (empty list: the model is usable)."""
    problems = _check_shapes(model, source)
    if problems:
        return problems
    try:
        step = model.discrete_dynamics(sample_time, substeps)
    except Exception as error:  # user code: report, never crash the loader
        return [Problem(source, "vehicle.model", f"dynamics cannot be built: {error}")]
    rng = np.random.default_rng(20260)
    samples = [(_random_state(model, rng), _random_input(model, rng)) for _ in range(_TRIALS)]
    try:
        problems += _check_position_invariance(model, step, samples, rng, source)
        problems += _check_steady_states(model, step, rng, source)
        problems += _check_fallbacks_and_mappings(model, samples, source)
    except Exception as error:  # user code: report, never crash the loader
        problems.append(Problem(source, "vehicle.model", f"model check raised: {error!r}"))
    return problems


def _check_shapes(model: VehicleModel, source: str) -> list[Problem]:
    problems: list[Problem] = []

    def bad(message: str) -> None:
        problems.append(Problem(source, "vehicle.model", message))

    try:
        xl, xu = (np.asarray(b, dtype=float) for b in model.state_bounds())
        ul, uu = (np.asarray(b, dtype=float) for b in model.input_bounds())
        G, g = (np.asarray(b, dtype=float) for b in model.state_polytope())
        E, e = (np.asarray(b, dtype=float) for b in model.input_polytope())
        family = model.steady_states()
        i, j = model.position_indices
    except Exception as error:
        return [Problem(source, "vehicle.model", f"model interface raised: {error!r}")]
    nx, nu = model.nx, model.nu
    if xl.shape != (nx,) or xu.shape != (nx,):
        bad(f"state_bounds must be two arrays of length nx={nx}")
    if ul.shape != (nu,) or uu.shape != (nu,):
        bad(f"input_bounds must be two arrays of length nu={nu}")
    elif not (np.all(np.isfinite(ul)) and np.all(np.isfinite(uu)) and np.all(ul <= uu)):
        bad("input_bounds must be finite with lower <= upper")
    if G.ndim != 2 or G.shape[1] != nx or g.shape != (G.shape[0],):
        bad(f"state_polytope must be (G (m, {nx}), g (m,))")
    if E.ndim != 2 or E.shape[1] != nu or e.shape != (E.shape[0],):
        bad(f"input_polytope must be (E (m, {nu}), e (m,))")
    if not (0 <= i < nx and 0 <= j < nx and i != j):
        bad(f"position_indices {model.position_indices} must name two different states")
    p = len(family.parameter_names)
    shapes_ok = (
        family.Mx.shape == (nx, p)
        and family.x0.shape == (nx,)
        and family.Mu.shape == (nu, p)
        and family.u0.shape == (nu,)
    )
    if not shapes_ok:
        bad(f"steady_states: Mx must be ({nx}, {p}), x0 ({nx},), Mu ({nu}, {p}), u0 ({nu},)")
    elif p < 2 or not (np.allclose(family.Mx[[i, j], :2], np.eye(2))):
        bad("steady_states: theta[0:2] must be the planar position of the steady state")
    return problems


def _random_state(model: VehicleModel, rng: np.random.Generator) -> np.ndarray:
    lower, upper = model.state_bounds()
    x = rng.normal(0.0, 1.0, model.nx)
    finite = np.isfinite(lower) & np.isfinite(upper)
    x[finite] = rng.uniform(lower[finite], upper[finite])
    return x


def _random_input(model: VehicleModel, rng: np.random.Generator) -> np.ndarray:
    lower, upper = model.input_bounds()
    return rng.uniform(lower, upper)


def _check_position_invariance(model, step, samples, rng, source) -> list[Problem]:
    i, j = model.position_indices
    worst = 0.0
    for x, u in samples:
        shift = np.zeros(model.nx)
        shift[[i, j]] = rng.uniform(-_SHIFT_SCALE, _SHIFT_SCALE, 2)
        plain = np.asarray(step(x, u)).ravel()
        shifted = np.asarray(step(x + shift, u)).ravel() - shift
        worst = max(worst, float(np.max(np.abs(shifted - plain))))
    if not worst <= INVARIANCE_TOLERANCE * (1.0 + _SHIFT_SCALE):
        return [
            Problem(
                source,
                "vehicle.model",
                f"{type(model).__name__} is not position invariant: shifting the position "
                f"changes one step of the dynamics by up to {worst:.3g} (tolerance "
                f"{INVARIANCE_TOLERANCE * (1.0 + _SHIFT_SCALE):.1g}); the dynamics must not "
                "depend on the position states",
            )
        ]
    return []


def _check_fallbacks_and_mappings(model, samples, source) -> list[Problem]:
    """The braking input (the last line of defence when the solver fails) must respect the
    input limits, and the message mappings must give vectors of the right length."""
    lower, upper = (np.asarray(b, dtype=float) for b in model.input_bounds())
    E, e = (np.asarray(b, dtype=float) for b in model.input_polytope())
    problems: list[Problem] = []
    for x, u in samples:
        brake = np.asarray(model.braking_input(x), dtype=float)
        inside = (
            brake.shape == (model.nu,)
            and np.all(np.isfinite(brake))
            and np.all(brake >= lower - 1e-9)
            and np.all(brake <= upper + 1e-9)
            and np.all(E @ brake <= e + 1e-9)
        )
        if not inside:
            problems.append(
                Problem(
                    source,
                    "vehicle.model",
                    f"braking_input({np.round(x, 3).tolist()}) = {brake.tolist()} is outside "
                    "the input limits",
                )
            )
            break
        back = np.asarray(model.input_from_command(model.command_from_input(u, x), x))
        state = np.asarray(model.state_from_odometry(model.odometry_from_state(x)))
        if back.shape != (model.nu,) or state.shape != (model.nx,):
            problems.append(
                Problem(
                    source,
                    "vehicle.model",
                    f"command/odometry mappings must return vectors of length nu={model.nu} "
                    f"and nx={model.nx}, got {back.shape} and {state.shape}",
                )
            )
            break
    return problems


def _check_steady_states(model, step, rng, source) -> list[Problem]:
    family = model.steady_states()
    worst = 0.0
    for _ in range(_TRIALS):
        theta = rng.normal(0.0, 10.0, len(family.parameter_names))
        xs = family.Mx @ theta + family.x0
        us = family.Mu @ theta + family.u0
        worst = max(worst, float(np.max(np.abs(np.asarray(step(xs, us)).ravel() - xs))))
    if not worst <= 1e-9:
        return [
            Problem(
                source,
                "vehicle.model",
                f"steady_states: f(x_s, u_s) differs from x_s by up to {worst:.3g}",
            )
        ]
    return []
