"""Every sample vehicle (config/vehicles/*.yaml, plus the user-model example in
examples/vehicles/, loaded the way a user would: its folder on the import path) against
outside references: its RK4
discretisation against scipy's adaptive integrator, its steady states, stabilisability at
rest by the PBH test, braking within limits, and the odometry/command mappings both ways."""

from __future__ import annotations

from pathlib import Path

import casadi as ca
import numpy as np
import pytest
from scipy.integrate import solve_ivp

from coverage_fleet.vehicles.base import CommandValues, VehicleModel
from coverage_fleet.vehicles.loader import VehicleSpec, load_vehicle_file

REPO = Path(__file__).resolve().parents[1]
EXAMPLES = REPO / "examples" / "vehicles"
SAMPLES = [*sorted((REPO / "config" / "vehicles").glob("*.yaml")), EXAMPLES / "omni_rover.yaml"]


@pytest.fixture(scope="module", params=SAMPLES, ids=lambda p: p.stem)
def spec(request: pytest.FixtureRequest) -> VehicleSpec:
    with pytest.MonkeyPatch.context() as patch:
        patch.syspath_prepend(str(EXAMPLES))  # what PYTHONPATH=examples/vehicles does
        return load_vehicle_file(request.param)


def random_state(model: VehicleModel, rng: np.random.Generator) -> np.ndarray:
    """A state inside the box and polytope limits (rejection sampling)."""
    lower, upper = model.state_bounds()
    G, g = model.state_polytope()
    while True:
        x = rng.normal(0.0, 2.0, model.nx)
        finite = np.isfinite(lower) & np.isfinite(upper)
        x[finite] = rng.uniform(lower[finite], upper[finite])
        if np.all(G @ x <= g):
            return x


def random_input(model: VehicleModel, rng: np.random.Generator) -> np.ndarray:
    lower, upper = model.input_bounds()
    E, e = model.input_polytope()
    while True:
        u = rng.uniform(lower, upper)
        if np.all(E @ u <= e):
            return u


def inside_input_limits(model: VehicleModel, u: np.ndarray, tol: float = 1e-12) -> bool:
    lower, upper = model.input_bounds()
    E, e = model.input_polytope()
    return bool(np.all(u >= lower - tol) and np.all(u <= upper + tol) and np.all(E @ u <= e + tol))


def reference_rollout(model: VehicleModel, x0, inputs, sample_time: float) -> np.ndarray:
    """Zero-order-hold rollout with scipy's DOP853 at tight tolerances (Hairer, Norsett &
    Wanner, "Solving Ordinary Differential Equations I", 1993, sec. II.10)."""
    xs = ca.SX.sym("x", model.nx)
    us = ca.SX.sym("u", model.nu)
    f = ca.Function("f", [xs, us], [model.continuous_dynamics(xs, us)])
    states = [np.asarray(x0, dtype=float)]
    for u in inputs:
        solution = solve_ivp(
            lambda _t, x, u=u: np.asarray(f(x, u)).ravel(),
            (0.0, sample_time),
            states[-1],
            method="DOP853",
            rtol=1e-12,
            atol=1e-12,
        )
        states.append(solution.y[:, -1])
    return np.array(states)


def rk4_rollout(model: VehicleModel, x0, inputs, sample_time: float, substeps: int):
    step = model.discrete_dynamics(sample_time, substeps)
    states = [np.asarray(x0, dtype=float)]
    for u in inputs:
        states.append(np.asarray(step(states[-1], u)).ravel())
    return np.array(states)


def test_rk4_matches_scipy_reference_over_random_inputs(spec: VehicleSpec) -> None:
    model, mpc = spec.model, spec.mpc
    rng = np.random.default_rng(7)
    x0 = random_state(model, rng)
    inputs = [random_input(model, rng) for _ in range(30)]
    reference = reference_rollout(model, x0, inputs, mpc.sample_time)
    rk4 = rk4_rollout(model, x0, inputs, mpc.sample_time, mpc.substeps)
    # RK4 global error is O(h^4) (Butcher, "Numerical Methods for ODEs", 2016, sec. 32);
    # with h = sample_time / substeps <= 0.05 s and these speeds it is far below a micrometre.
    assert np.max(np.abs(rk4 - reference)) < 1e-6


def test_rk4_error_falls_with_fourth_order(spec: VehicleSpec) -> None:
    """Halving the RK4 step must cut the error by about 2^4 = 16 (Butcher 2016, sec. 32):
    this tells a correctly wired RK4 from a lower-order scheme that happens to be close."""
    model = spec.model
    rng = np.random.default_rng(11)
    x0 = random_state(model, rng)
    inputs = [random_input(model, rng) for _ in range(6)]
    coarse_time = 0.8
    reference = reference_rollout(model, x0, inputs, coarse_time)
    error_1 = np.max(np.abs(rk4_rollout(model, x0, inputs, coarse_time, 1) - reference))
    error_2 = np.max(np.abs(rk4_rollout(model, x0, inputs, coarse_time, 2) - reference))
    assert error_2 > 1e-10, "reference tolerance would swamp the comparison"
    assert 10.0 < error_1 / error_2 < 24.0


def test_steady_states_are_fixed_points(spec: VehicleSpec) -> None:
    model, mpc = spec.model, spec.mpc
    family = model.steady_states()
    step = model.discrete_dynamics(mpc.sample_time, mpc.substeps)
    rng = np.random.default_rng(3)
    for _ in range(20):
        theta = rng.normal(0.0, 20.0, len(family.parameter_names))
        xs = family.Mx @ theta + family.x0
        us = family.Mu @ theta + family.u0
        assert np.allclose(np.asarray(step(xs, us)).ravel(), xs, atol=1e-12)
        assert np.allclose(model.position(xs), theta[:2])
        assert inside_input_limits(model, us)


def pbh_stabilisable(A: np.ndarray, B: np.ndarray) -> bool:
    """Popov-Belevitch-Hautus test for a discrete-time pair: stabilisable iff
    rank [A - lambda I, B] = n for every eigenvalue with |lambda| >= 1 (Hespanha, "Linear
    Systems Theory", 2nd ed., 2018, ch. 14; numpy.linalg.matrix_rank)."""
    n = A.shape[0]
    for eigenvalue in np.linalg.eigvals(A):
        if abs(eigenvalue) >= 1.0 - 1e-9:
            test = np.hstack([A - eigenvalue * np.eye(n), B])
            if np.linalg.matrix_rank(test, tol=1e-9) < n:
                return False
    return True


def test_stabilisable_at_rest_matches_pbh_test(spec: VehicleSpec) -> None:
    model, mpc = spec.model, spec.mpc
    family = model.steady_states()
    xs_sym = ca.SX.sym("x", model.nx)
    us_sym = ca.SX.sym("u", model.nu)
    step = model.discrete_dynamics(mpc.sample_time, mpc.substeps)
    next_state = step(xs_sym, us_sym)
    jac = ca.Function("linearised", [xs_sym, us_sym], [ca.jacobian(next_state, xs_sym),
                                                ca.jacobian(next_state, us_sym)])
    rng = np.random.default_rng(5)
    for _ in range(3):
        theta = rng.normal(0.0, 5.0, len(family.parameter_names))
        xs = family.Mx @ theta + family.x0
        us = family.Mu @ theta + family.u0
        A, B = (np.asarray(m) for m in jac(xs, us))
        assert pbh_stabilisable(A, B) == model.stabilisable_at_rest


def test_braking_input_is_admissible_and_slows_down(spec: VehicleSpec) -> None:
    model, mpc = spec.model, spec.mpc
    step = model.discrete_dynamics(mpc.sample_time, mpc.substeps)
    family = model.steady_states()
    # Velocity-like states: those the steady-state family pins (no free parameter moves them).
    pinned = np.all(family.Mx == 0.0, axis=1)
    rng = np.random.default_rng(9)
    for _ in range(30):
        x = random_state(model, rng)
        u = model.braking_input(x)
        assert inside_input_limits(model, u)
        after = np.asarray(step(x, u)).ravel()
        if pinned.any():
            before_speed = np.linalg.norm(x[pinned] - family.x0[pinned])
            after_speed = np.linalg.norm(after[pinned] - family.x0[pinned])
            assert after_speed <= before_speed + 1e-12
    at_rest = family.Mx @ np.ones(len(family.parameter_names)) + family.x0
    assert np.allclose(model.braking_input(at_rest), family.u0, atol=1e-12)


def angles_close(a: float, b: float) -> bool:
    return abs((a - b + np.pi) % (2 * np.pi) - np.pi) < 1e-12


def test_odometry_round_trip(spec: VehicleSpec) -> None:
    model = spec.model
    rng = np.random.default_rng(13)
    for _ in range(30):
        x = random_state(model, rng)
        back = model.state_from_odometry(model.odometry_from_state(x))
        for i in range(model.nx):
            if i in model.angle_indices:
                assert angles_close(back[i], x[i])
            else:
                assert back[i] == pytest.approx(x[i], abs=1e-12)
        odom = model.odometry_from_state(x)
        assert -np.pi <= odom.yaw < np.pi
        # A wrapped yaw continued against the true state gives the state back exactly.
        far = x.copy()
        far[list(model.angle_indices)] += 6 * np.pi
        assert np.allclose(model.continue_angles(back, far), far, atol=1e-9)


def admissible_input(model: VehicleModel, x: np.ndarray, step, rng) -> np.ndarray:
    """An input inside the limits whose step keeps the state inside its box: what a
    feasible MPC plan applies (a command may only be inverted exactly inside that set)."""
    lower, upper = model.state_bounds()
    while True:
        u = random_input(model, rng)
        after = np.asarray(step(x, u)).ravel()
        if np.all(after >= lower) and np.all(after <= upper):
            return u


def test_command_round_trip_and_clipping(spec: VehicleSpec) -> None:
    model = spec.model
    step = model.discrete_dynamics(spec.mpc.sample_time, spec.mpc.substeps)
    rng = np.random.default_rng(17)
    for _ in range(30):
        x = random_state(model, rng)
        u = admissible_input(model, x, step, rng)
        command = model.command_from_input(u, x)
        assert command.kind == model.command_kind
        assert np.allclose(model.input_from_command(command, x), u, atol=1e-9)
    # A command far beyond every limit comes back inside the limits, never NaN.
    x = random_state(model, rng)
    huge = CommandValues(model.command_kind, (1e6, -1e6, 0.0), (0.0, 0.0, 1e6))
    u = model.input_from_command(huge, x)
    assert np.all(np.isfinite(u)) and inside_input_limits(model, u)
    nan = CommandValues(model.command_kind, (np.nan, np.nan, 0.0), (0.0, 0.0, np.nan))
    assert np.all(np.isfinite(model.input_from_command(nan, x)))
