"""The real-time SQP path (control/rti.py) against the full solve and the LQR law.

Sources beside each check. Both paths solve the same problem built by TrackingMpc; the
fast path takes SQP steps from the shifted plan and hands a sample to the full solve when
its iterate fails the acceptance test (constraint violation).
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import casadi as ca
import numpy as np
import pytest
import scipy.linalg
from support_control import ORCHARD_BLOCK, closed_loop_cost, on_solver_path, polygon_halfspaces

from coverage_fleet.control.limits import input_limits
from coverage_fleet.control.mpc import TrackingMpc
from coverage_fleet.control.stage_cost import stage_weights
from coverage_fleet.control.terminal import compute_terminal_ingredients
from coverage_fleet.vehicles.loader import load_vehicle_file

REPO = Path(__file__).resolve().parents[1]
VEHICLES = REPO / "config" / "vehicles"
REGION = polygon_halfspaces(ORCHARD_BLOCK)
#: A region so large that no position constraint is near (metres).
OPEN_WATER = (np.array([[1.0, 0], [-1, 0], [0, 1], [0, -1]]), np.full(4, 1e3))
ACCEPTED = "real-time iteration accepted"


def _mpcs(name: str, region, **changes):
    """Full-solve and fast-path MPCs of one vehicle file (same terminal ingredients)."""
    spec = load_vehicle_file(VEHICLES / f"{name}.yaml")
    settings = dataclasses.replace(spec.mpc, **changes)
    terminal = (
        compute_terminal_ingredients(spec.model, settings)
        if settings.terminal == "ellipsoid"
        else None
    )
    full = TrackingMpc(spec.model, on_solver_path(settings, "full"), region, terminal)
    fast = TrackingMpc(spec.model, on_solver_path(settings, "real_time"), region, terminal)
    return spec.model, settings, full, fast


def _at_rest(model, position, heading=0.0):
    x = np.zeros(model.nx)
    x[list(model.position_indices)] = position
    if model.angle_indices:
        x[model.angle_indices[0]] = heading
    return x


@pytest.mark.parametrize(
    ("name", "input_tolerance"),
    # Multirotor: linear dynamics (RK4 of a linear model is linear), linear constraints,
    # the ellipsoid inactive: the QP *is* the NLP, one step is exact (solver tolerance).
    # Vessel: the rotation makes the dynamics nonlinear; one step from the shifted plan
    # leaves an error second order in the step (Diehl, Bock & Schloeder, SIAM J. Control
    # Optim. 43(5), 2005, sec. 4), far below 1e-3 of the force limits (12-50 N) here.
    [("multirotor", 1e-6), ("surface_vessel", 1e-3)],
)
def test_fast_path_full_solve_and_lqr_law_agree_near_a_reachable_target(name, input_tolerance):
    """Rawlings, Mayne & Diehl, "Model Predictive Control: Theory, Computation, and Design",
    2nd ed., 2017, ch. 1 (sec. 1.3, the Riccati iteration) and ch. 2 (sec. 2.5): with no
    active constraint, the first MPC input is the linear-quadratic law u = u_s - K_0 (x - x_s)
    of the linearisation at the steady state, K_0 from the Riccati iteration over the
    horizon started at the terminal weight; with the DARE solution as terminal weight that is
    the LQR law. The terminal weight is (1 + terminal_decrease_slack) times scipy's DARE
    solution (the vessel's terminal set needs its slack; the multirotor runs with none, so
    there the law is the LQR law itself); nothing of the package's terminal module is used
    as reference."""
    slack = {"multirotor": 0.0, "surface_vessel": 0.1}[name]
    model, settings, full, fast = _mpcs(
        name,
        OPEN_WATER,
        terminal_decrease_slack=slack,
        solver={"plugin": "ipopt", "options": {"ipopt.tol": 1e-12}},
    )
    target = np.array([10.0, 10.0])
    x = _at_rest(model, (10.04, 9.97), heading=0.02)
    x[[k for k in range(model.nx) if k not in model.position_indices][-1]] += 0.01
    fast.solve(x, target)  # the first sample warms the plan the next one is shifted from
    F = model.discrete_dynamics(settings.sample_time, settings.substeps)
    x = np.array(F(x, fast.solve(x, target).first_input)).reshape(-1)
    quick = fast.solve(x, target)
    converged = full.solve(x, target)
    assert quick.status == ACCEPTED, quick.status
    assert converged.success, converged.status
    np.testing.assert_allclose(quick.first_input, converged.first_input, atol=input_tolerance)

    x_s, u_s = converged.steady_state.state, converged.steady_state.input
    xs, us = ca.SX.sym("x", model.nx), ca.SX.sym("u", model.nu)
    step = F(xs, us)
    jacobians = ca.Function("AB", [xs, us], [ca.jacobian(step, xs), ca.jacobian(step, us)])
    A, B = (np.array(m) for m in jacobians(x_s, u_s))
    Q, R = stage_weights(model, settings)
    P = (1.0 + slack) * scipy.linalg.solve_discrete_are(A, B, Q, R)
    for _ in range(settings.horizon):
        K = np.linalg.solve(R + B.T @ P @ B, B.T @ P @ A)
        P = Q + A.T @ P @ (A - B @ K)
    lqr = u_s - K @ (x - x_s)
    # Linear model: exact. Vessel: the LQR of the linearisation differs from the nonlinear
    # optimum by a term second order in |x - x_s| (about 0.05 here).
    np.testing.assert_allclose(converged.first_input, lqr, atol=10 * input_tolerance)


def _closed_loop(mpc, model, settings, x, targets, steps):
    F = model.discrete_dynamics(settings.sample_time, settings.substeps)
    Q, R = stage_weights(model, settings)
    positions, cost, statuses = [], 0.0, []
    for k in range(steps):
        target = targets[k * len(targets) // steps]
        solution = mpc.solve(x, target)
        assert solution.success, solution.status
        statuses.append(solution.status)
        u = solution.first_input
        cost += closed_loop_cost(model, Q, R, x, target, u)
        positions.append(model.position(x))
        x = np.array(F(x, u)).reshape(-1)
    return np.array(positions), cost, statuses


ALL_MODELS = ["car_like", "differential_drive", "multirotor", "surface_vessel"]


@pytest.mark.parametrize("name", ALL_MODELS)
def test_constrained_closed_loops_agree(name):
    """Speed and acceleration limits active on the way (the targets are 6-9 m apart, so
    the robot runs at its speed limit), a new target halfway. Tolerance stated: the two
    closed loops stay within 10 cm of each other (under a third of the smallest footprint
    radius, 0.35 m; measured 0.0-2.9 cm, the vessel's the largest) and their closed-loop
    costs within 1 % (issue 13's target; measured at most 0.14 %, the vessel). The real-time
    step itself answers at least 90 % of the samples (measured 78-79 of 80 for every
    model; 62, 62, 78 and 67 of 80 for car, rover, multirotor and vessel before the QP
    Hessian held the dynamics' curvature, control/rti.py), else this test would mostly
    compare the full solve with itself."""
    model, settings, full, fast = _mpcs(name, REGION)
    start = _at_rest(model, (2.0, 2.0))
    targets = [np.array([10.0, 5.0]), np.array([4.0, 7.0])]
    steps = 80
    path_full, cost_full, _ = _closed_loop(full, model, settings, start, targets, steps)
    path_fast, cost_fast, statuses = _closed_loop(fast, model, settings, start, targets, steps)
    assert np.max(np.linalg.norm(path_fast - path_full, axis=1)) < 0.1
    assert abs(cost_fast - cost_full) <= 0.01 * cost_full
    accepted = sum(s.startswith(ACCEPTED) for s in statuses)
    assert accepted >= 0.9 * steps, (accepted, steps)


def test_rejected_iterate_falls_back_to_the_full_solve():
    """A real failure of the acceptance test: after settling near one target the target
    jumps 8 m; one SQP step from the plan that rests at the old target lands far outside
    the terminal ellipsoid (a linearised ellipsoid is a half-space), the iterate is rejected
    and the full solve answers the sample with its converged plan."""
    model, settings, full, fast = _mpcs("multirotor", REGION)
    F = model.discrete_dynamics(settings.sample_time, settings.substeps)
    x = _at_rest(model, (3.0, 3.0))
    near = np.array([3.5, 3.2])
    for _ in range(15):
        solution = fast.solve(x, near)
        full.solve(x, near)
        x = np.array(F(x, solution.first_input)).reshape(-1)
    assert solution.status == ACCEPTED, solution.status
    far = np.array([11.0, 4.0])
    jumped = fast.solve(x, far)
    reference = full.solve(x, far)
    assert jumped.status.startswith("rti: iterate rejected (constraint violation"), jumped.status
    assert "fatrop: " in jumped.status and jumped.success
    # Both converged solutions of the same problem: equal to fatrop's tolerance (absolute
    # 1e-5 on an O(1e3) cost, see solver_chain.SOLVER_DEFAULTS).
    np.testing.assert_allclose(jumped.first_input, reference.first_input, atol=1e-3)


def _input_variation(mpc, model, settings, x, targets, steps):
    F = model.discrete_dynamics(settings.sample_time, settings.substeps)
    inputs = []
    for k in range(steps):
        solution = mpc.solve(x, targets[k * len(targets) // steps])
        assert solution.success, solution.status
        inputs.append(solution.first_input)
        x = np.array(F(x, solution.first_input)).reshape(-1)
    return np.abs(np.diff(np.array(inputs), axis=0)).sum(axis=0)


@pytest.mark.parametrize("name", ALL_MODELS)
def test_real_time_commands_are_not_rougher_than_the_full_solves(name):
    """Stated bound: each input's total variation (sum of |u_{k+1} - u_k|) over the loop
    at most 2x the full solve's over the same targets (common practice for comparing
    smoothness). Two causes of roughness this caught, each measured with the test failing:
    - the warm start of a terminal-equality MPC repeated the last input instead of
      appending u_s (the candidate of Rawlings, Mayne & Diehl, "Model Predictive Control",
      2nd ed., 2017, sec. 2.4.2, whose appended stage rests at x_s with no dynamics
      defect): the rover's yaw-rate commands flipped sign from sample to sample (3.9x);
    - a QP Hessian without the dynamics' curvature (control/rti.py): a feasible iterate
      swung the car's steering between full locks while reversing (4.3x; rover 1.8x,
      vessel 1.6x). With it every model measures 0.95-1.01x."""
    model, settings, full, fast = _mpcs(name, REGION)
    start = _at_rest(model, (2.0, 2.0))
    targets = [np.array([10.0, 5.0]), np.array([4.0, 7.0])]
    rough_full = _input_variation(full, model, settings, start, targets, 80)
    rough_fast = _input_variation(fast, model, settings, start, targets, 80)
    assert np.all(rough_fast <= 2.0 * rough_full + 1e-9), (rough_fast, rough_full)


def test_osqp_and_hpipm_give_the_same_real_time_steps():
    """The QP of each real-time step solved by OSQP (casadi's interface; Stellato et al.,
    "OSQP: an operator splitting solver for quadratic programs", Math. Program. Comput.
    12, 2020), a general-purpose first-order method, against HPIPM called on the stage
    blocks (control/stage_qp.py): the same first inputs on a closed loop from rest to a
    target 10 m away, the acceleration limit binding on the way (multirotor: an octagon
    around the 2.5 m/s^2 disc; HPIPM's absolute mode answers each QP to about 1e-2,
    rti.QP_DEFAULTS)."""
    spec = load_vehicle_file(VEHICLES / "multirotor.yaml")
    settings = on_solver_path(spec.mpc, "real_time")
    with_osqp = dataclasses.replace(settings, solver={**settings.solver, "qp": "osqp"})
    terminal = compute_terminal_ingredients(spec.model, settings)
    hpipm = TrackingMpc(spec.model, settings, REGION, terminal)
    osqp = TrackingMpc(spec.model, with_osqp, REGION, terminal)
    F = spec.model.discrete_dynamics(settings.sample_time, settings.substeps)
    x, target = _at_rest(spec.model, (2.0, 2.0)), np.array([10.0, 8.0])
    limits = input_limits(spec.model)  # G u <= g: the acceleration polygon
    at_limit, osqp_accepted = 0, 0
    for k in range(30):
        first, second = hpipm.solve(x, target), osqp.solve(x, target)
        if k > 0:  # the first is a cold start, always a full solve
            assert first.status == ACCEPTED, first.status
            osqp_accepted += second.status == ACCEPTED
        np.testing.assert_allclose(first.first_input, second.first_input, atol=5e-3)
        at_limit += bool(np.max(limits.G @ first.first_input - limits.g) > -1e-3)
        x = np.array(F(x, first.first_input)).reshape(-1)
    assert at_limit >= 1
    # OSQP's iteration limit stops it on an odd QP (one of 29 here); the full solve
    # answers that sample, with the same input.
    assert osqp_accepted >= 27
