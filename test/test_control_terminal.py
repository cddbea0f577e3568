"""Terminal ingredients: Riccati solution, stabilisability, invariance of the terminal set,
the cache and the `coverage-fleet terminal` command. Sources named beside each check."""

from __future__ import annotations

import dataclasses
import json
from pathlib import Path

import numpy as np
import pytest
import scipy.linalg
from support_control import DoubleIntegratorModel, discrete_matrices

from coverage_fleet.cli.main import main
from coverage_fleet.control.frames import heading_index, rotation_transform, steady_frame_error
from coverage_fleet.control.limits import input_limits, state_limits
from coverage_fleet.control.terminal import (
    cache_path,
    check_rotation_equivariance,
    compute_ellipsoid,
    compute_terminal_ingredients,
    is_stabilisable,
    linearise_at_rest,
    terminal_for_vehicle,
)
from coverage_fleet.errors import ConfigError
from coverage_fleet.vehicles.loader import load_vehicle_file
from coverage_fleet.vehicles.settings import MpcSettings

REPO = Path(__file__).resolve().parents[1]
VEHICLES = REPO / "config" / "vehicles"
VEHICLE_FILES = sorted(VEHICLES.glob("*.yaml"))
STABILISABLE_FILES = [p for p in VEHICLE_FILES if load_vehicle_file(p).model.stabilisable_at_rest]


@pytest.fixture(autouse=True)
def _private_cache(tmp_path, monkeypatch):
    monkeypatch.setenv("COVERAGE_FLEET_CACHE", str(tmp_path / "cache"))


def test_riccati_solution_matches_scipy_and_the_handbook_equation():
    """P against scipy.linalg.solve_discrete_are on the exact zero-order-hold matrices of
    the double integrator (independent of the casadi linearisation), and the Riccati
    residual P - (A'PA - A'PB (R + B'PB)^-1 B'PA + Q) = 0 (Anderson & Moore, "Optimal
    Control: Linear Quadratic Methods", 1990, ch. 2)."""
    settings = MpcSettings(
        terminal="ellipsoid", state_weights=(1.0, 2.0, 0.5, 0.3), input_weights=(0.4, 0.7)
    )
    ingredients = compute_ellipsoid(DoubleIntegratorModel(), settings)
    A, B = discrete_matrices(settings.sample_time)
    Q, R = np.diag(settings.state_weights), np.diag(settings.input_weights)
    P = scipy.linalg.solve_discrete_are(A, B, Q, R)
    np.testing.assert_allclose(ingredients.P_lqr, P, rtol=1e-9)
    residual = A.T @ P @ A - A.T @ P @ B @ np.linalg.solve(R + B.T @ P @ B, B.T @ P @ A) + Q - P
    assert np.abs(residual).max() < 1e-9 * np.abs(P).max()
    K = -np.linalg.solve(R + B.T @ P @ B, B.T @ P @ A)
    np.testing.assert_allclose(ingredients.K, K, rtol=1e-8, atol=1e-10)
    np.testing.assert_allclose(ingredients.P, (1 + settings.terminal_decrease_slack) * P)


def test_constraint_level_is_the_support_function_closed_form():
    """Largest alpha with g' e <= s on {e' P e <= alpha} is s^2 / (g' P^-1 g) (support
    function of an ellipsoid; Boyd & Vandenberghe, "Convex Optimization", 2004, sec. 8.4).
    Checked by maximising g' e on the boundary with scipy."""
    model = DoubleIntegratorModel(max_speed=0.8, max_acceleration=1.3)
    settings = MpcSettings(terminal="ellipsoid")
    ingredients = compute_ellipsoid(model, settings)
    P = ingredients.P
    for name, level in ingredients.limit_levels.items():
        if name == "decrease condition":
            continue
        limits = state_limits(model) if name.startswith("v") else input_limits(model)
        k = limits.names.index(name)
        row = limits.G[k] if name.startswith("v") else limits.G[k] @ ingredients.K
        e_best = np.linalg.solve(P, row)
        e_best *= np.sqrt(level / (e_best @ P @ e_best))
        assert row @ e_best == pytest.approx(limits.g[k], rel=1e-9)


def test_unicycle_and_bicycle_are_not_stabilisable_at_rest():
    """Brockett, "Asymptotic stability and feedback stabilization", 1983: the kinematic
    unicycle's linearisation at rest cannot move sideways; the Hautus test (Hautus 1969)
    must say not stabilisable for both nonholonomic models, stabilisable for the others."""
    for path in VEHICLE_FILES:
        spec = load_vehicle_file(path)
        A, B, *_ = linearise_at_rest(spec.model, spec.mpc)
        assert is_stabilisable(A, B) == spec.model.stabilisable_at_rest, path.name


def test_equality_is_reported_for_models_not_stabilisable():
    for path in VEHICLE_FILES:
        spec = load_vehicle_file(path)
        if spec.model.stabilisable_at_rest:
            continue
        ingredients = compute_terminal_ingredients(spec.model, spec.mpc)
        assert ingredients.kind == "equality" and "not stabilisable" in ingredients.reason
        with pytest.raises(ConfigError) as caught:
            compute_ellipsoid(spec.model, dataclasses.replace(spec.mpc, terminal="ellipsoid"))
        assert "equality" in str(caught.value)


@pytest.mark.parametrize("path", STABILISABLE_FILES, ids=lambda p: p.stem)
def test_rotated_linearisation_is_a_similarity_transform(path):
    """Heading models: A(psi) = T A(0) T^-1, B(psi) = T B(0) (rotation equivariance of
    planar rigid-body kinematics, Fossen, "Handbook of Marine Craft Hydrodynamics and
    Motion Control", 2011, sec. 2.2)."""
    spec = load_vehicle_file(path)
    assert check_rotation_equivariance(spec.model, spec.mpc) is None
    if heading_index(spec.model) is not None:
        A0, B0, *_ = linearise_at_rest(spec.model, spec.mpc, 0.0)
        A1, B1, *_ = linearise_at_rest(spec.model, spec.mpc, 1.1)
        T = rotation_transform(spec.model.nx, spec.model.position_indices, 1.1)
        np.testing.assert_allclose(A1, T @ A0 @ np.linalg.inv(T), atol=1e-10)
        np.testing.assert_allclose(B1, T @ B0, atol=1e-10)


@pytest.mark.parametrize("path", STABILISABLE_FILES, ids=lambda p: p.stem)
def test_terminal_set_is_invariant_under_the_local_law(path):
    """Chen & Allgower, Automatica 34(10), 1998, Lemma 1: inside the terminal set the local
    law keeps the nonlinear system in the set and within every limit. From random points of
    the set around random steady states (position and heading), 30 steps of u = u_s + K e on
    the nonlinear discretised model."""
    spec = load_vehicle_file(path)
    model, settings = spec.model, spec.mpc
    ingredients = compute_ellipsoid(model, settings)
    assert ingredients.decrease_margin <= 0
    F = model.discrete_dynamics(settings.sample_time, settings.substeps)
    family = model.steady_states()
    xs_limits, us_limits = state_limits(model), input_limits(model)
    L_inv_T = np.linalg.inv(np.linalg.cholesky(ingredients.P)).T
    rng = np.random.default_rng(1998)
    h = heading_index(model)
    for _ in range(40):
        theta = np.zeros(family.Mx.shape[1])
        theta[:2] = rng.uniform(-50, 50, 2)
        if h is not None:
            theta[2] = rng.uniform(-np.pi, np.pi)
        x_s = family.Mx @ theta + family.x0
        u_s = family.Mu @ theta + family.u0
        z = rng.standard_normal(model.nx)
        z *= rng.uniform(0.2, 1.0) ** (1 / model.nx) / np.linalg.norm(z)
        e_frame = np.sqrt(ingredients.alpha) * (L_inv_T @ z)
        # e_frame is the error in the steady frame; rotate it back into the map frame.
        e = e_frame.copy()
        if h is not None:
            T = rotation_transform(model.nx, model.position_indices, x_s[h])
            e = T @ e_frame
        x = x_s + e
        for _ in range(30):
            error = steady_frame_error(x, x_s, model.position_indices, h)
            level = error @ ingredients.P @ error
            assert level <= ingredients.alpha * (1 + 1e-9)
            u = u_s + ingredients.K @ error
            assert np.all(us_limits.G @ u <= us_limits.g + 1e-9)
            assert np.all(xs_limits.G @ x <= xs_limits.g + 1e-9)
            x = np.array(F(x, u)).reshape(-1)


def test_nonlinear_decrease_condition_limits_the_vessel_level():
    """The nonlinear check must do work: for the vessel (Coriolis and cross-coupling terms,
    Fossen 2011, sec. 6.5) the decrease condition, not a limit, sets the level, and the
    condition V_f(f(x, k(x))) - V_f(x) + l(x, k(x)) <= 0 (Chen & Allgower 1998, eq. 11,
    discrete form) is violated somewhere on the boundary of twice that level: evaluated
    directly here, point by point, on the nonlinear model."""
    path = VEHICLES / "surface_vessel.yaml"
    spec = load_vehicle_file(path)
    model, settings = spec.model, spec.mpc
    ingredients = compute_ellipsoid(model, settings)
    assert ingredients.active_limit == "decrease condition"
    level = ingredients.limit_levels["decrease condition"]
    F = model.discrete_dynamics(settings.sample_time, settings.substeps)
    Q, R = np.diag(settings.state_weights), np.diag(settings.input_weights)
    P, K = ingredients.P, ingredients.K
    L_inv_T = np.linalg.inv(np.linalg.cholesky(P)).T
    rng = np.random.default_rng(34)

    def margin(e: np.ndarray) -> float:
        u = K @ e
        nxt = np.array(F(e, u)).reshape(-1)
        return nxt @ P @ nxt - e @ P @ e + e @ Q @ e + u @ R @ u

    def worst(alpha: float) -> float:
        z = rng.standard_normal((4000, model.nx))
        z /= np.linalg.norm(z, axis=1, keepdims=True)
        return max(margin(np.sqrt(alpha) * (L_inv_T @ zi)) for zi in z)

    assert worst(ingredients.alpha) <= 1e-12
    assert worst(2.0 * level) > 0


def test_cache_is_keyed_by_file_content(tmp_path):
    source = (VEHICLES / "multirotor.yaml").read_text()
    first = tmp_path / "a.yaml"
    first.write_text(source)
    spec = load_vehicle_file(first)
    computed, cached = terminal_for_vehicle(spec)
    assert not cached and cache_path(spec.cache_key).is_file()
    again, cached = terminal_for_vehicle(load_vehicle_file(first))
    assert cached
    np.testing.assert_allclose(again.P, computed.P)
    assert again.alpha == computed.alpha and again.active_limit == computed.active_limit
    changed = tmp_path / "b.yaml"
    changed.write_text(source.replace("max_acceleration: 2.5", "max_acceleration: 2.0"))
    other, cached = terminal_for_vehicle(load_vehicle_file(changed))
    assert not cached and other.alpha != computed.alpha
    stored = json.loads(cache_path(spec.cache_key).read_text())
    assert stored["content_hash"] == spec.cache_key


def test_terminal_command_reports_ellipsoid_and_equality(capsys):
    assert main(["terminal", str(VEHICLES / "multirotor.yaml")]) == 0
    out = capsys.readouterr().out
    assert "terminal: ellipsoid" in out and "alpha =" in out and "active limit:" in out
    assert "decrease margin" in out and "K (local law" in out
    assert main(["terminal", str(VEHICLES / "multirotor.yaml")]) == 0
    assert "read from the cache" in capsys.readouterr().out
    assert main(["terminal", str(VEHICLES / "differential_drive.yaml")]) == 0
    out = capsys.readouterr().out
    assert "terminal: equality" in out and "not stabilisable" in out


def test_terminal_command_bad_file_exits_2(tmp_path, capsys):
    bad = tmp_path / "bad.yaml"
    bad.write_text("/**:\n  ros__parameters:\n    vehicle: {model: multirotor}\n")
    assert main(["terminal", str(bad)]) == 2
    err = capsys.readouterr().err
    assert "bad input" in err and "max_speed" in err
    assert main(["terminal", str(tmp_path / "missing.yaml")]) == 2
