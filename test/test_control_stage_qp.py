"""HPIPM called on the stage blocks (control/stage_qp.StageQp) against references.

- casadi's own QP interfaces (`conic` with HPIPM and with OSQP, general-purpose solvers of
  the same convex QP) on an invented stage-structured QP with binding input boxes,
  one-sided path rows and an initial-state equality: the same minimiser and the same
  multipliers, with and without partial condensing;
- the LQR law: with the terminal weight from the discrete algebraic Riccati equation the
  finite-horizon unconstrained problem has the infinite-horizon LQR's first input,
  u_0 = -K x_0 (Rawlings, Mayne & Diehl, Model Predictive Control, 2nd ed., 2017, sec.
  1.3 and 2.5); K and P from scipy.linalg.solve_discrete_are;
- a QP whose Hessian couples two stages is refused with a message saying so.
"""

from __future__ import annotations

import casadi as ca
import numpy as np
import pytest
import scipy.linalg

from coverage_fleet.control.stage_qp import StageLayout, StageQp

HORIZON = 6
NX = 3
#: One free state that stays constant, like the artificial steady state the MPC carries.
NZ = NX + 1
NU = 2
#: Path rows per stage: stage 0 pins the NX real states (equalities), every stage has two
#: one-sided rows on its position-like state and inputs.
PATH_ROWS = (NX + 2,) + (2,) * HORIZON
INPUT_LIMIT = 0.4
ROW_LIMIT = 0.5


def _stage_qp_data(seed: int):
    """An invented QP in casadi's conic form over [z_0 u_0 ... z_N] with the row layout
    of StageLayout (dynamics rows first, read as A z + B u - z_next)."""
    rng = np.random.default_rng(seed)
    n_w = (HORIZON + 1) * NZ + HORIZON * NU
    starts = [k * (NZ + NU) for k in range(HORIZON + 1)]
    h = np.zeros((n_w, n_w))
    grad = np.zeros(n_w)
    for k in range(HORIZON + 1):
        size = NZ + (NU if k < HORIZON else 0)
        root = rng.normal(size=(size, size))
        block = root @ root.T + 0.5 * np.eye(size)
        h[starts[k]:starts[k] + size, starts[k]:starts[k] + size] = block
        grad[starts[k]:starts[k] + size] = rng.normal(scale=3.0, size=size)
        if k > 0:
            grad[starts[k]] = -8.0  # pushes the first state up against its one-sided rows
    rows, lower, upper = [], [], []
    transition = np.eye(NZ)
    transition[:NX, :NX] += 0.1 * rng.normal(size=(NX, NX))
    transition[:NX, NX] = 0.2  # the free state drives the others, as a reference would
    inputs = np.zeros((NZ, NU))
    inputs[:NX] = rng.normal(size=(NX, NU))
    for k in range(HORIZON + 1):
        if k < HORIZON:
            offset = rng.normal(scale=0.1, size=NZ)
            for i in range(NZ):
                row = np.zeros(n_w)
                row[starts[k]:starts[k] + NZ] = transition[i]
                row[starts[k] + NZ:starts[k] + NZ + NU] = inputs[i]
                row[starts[k + 1] + i] = -1.0
                rows.append(row)
                lower.append(offset[i])
                upper.append(offset[i])
        if k == 0:
            for i in range(NX):
                row = np.zeros(n_w)
                row[i] = 1.0
                rows.append(row)
                value = rng.normal(scale=0.2)
                lower.append(value)
                upper.append(value)
        for sign in (1.0, -1.0):
            row = np.zeros(n_w)
            row[starts[k]] = sign
            if k < HORIZON:
                row[starts[k] + NZ] = 0.5 * sign
            rows.append(row)
            lower.append(-np.inf)
            upper.append(ROW_LIMIT)
    lbx = np.full(n_w, -np.inf)
    ubx = np.full(n_w, np.inf)
    for k in range(HORIZON):
        lbx[starts[k] + NZ:starts[k] + NZ + NU] = -INPUT_LIMIT
        ubx[starts[k] + NZ:starts[k] + NZ + NU] = INPUT_LIMIT
    a = np.array(rows)
    return h, grad, a, np.array(lower), np.array(upper), lbx, ubx


def _layout() -> StageLayout:
    return StageLayout(HORIZON, NZ, (NU,) * HORIZON, PATH_ROWS)


def _sparse(matrix: np.ndarray) -> ca.DM:
    """casadi keeps a numpy array's zeros as entries; the structure is the nonzeros."""
    return ca.sparsify(ca.DM(matrix))


def _solve_stage_qp(h, grad, a, lba, uba, lbx, ubx, stages_per_block):
    hessian, jacobian = _sparse(h), _sparse(a)
    qp = StageQp(_layout(), hessian.sparsity(), jacobian.sparsity(),
                 stages_per_block=stages_per_block)
    return qp.solve(
        h=np.array(hessian.nonzeros()), grad=grad, a=np.array(jacobian.nonzeros()),
        lba=lba, uba=uba, lbx=lbx, ubx=ubx,
    )


def _casadi_conic(plugin, h, grad, a, lba, uba, lbx, ubx):
    options = {"hpipm": {"N": HORIZON, "nx": [NZ] * (HORIZON + 1), "nu": [NU] * HORIZON + [0],
                         "ng": list(PATH_ROWS), "print_problem": False,
                         "error_on_fail": False,
                         "hpipm": {"res_g_max": 1e-6, "res_b_max": 1e-6, "res_d_max": 1e-6,
                                   "res_m_max": 1e-6}},
               "osqp": {"error_on_fail": False,
                        "osqp": {"verbose": False, "eps_abs": 1e-10, "eps_rel": 1e-10,
                                 "max_iter": 200000, "polish": True}}}[plugin]
    sparsity = {"h": _sparse(h).sparsity(), "a": _sparse(a).sparsity()}
    solver = ca.conic("reference", plugin, sparsity, options)
    answer = solver(h=h, g=grad, a=a, lba=lba, uba=uba, lbx=lbx, ubx=ubx)
    assert solver.stats()["success"], plugin
    return {key: np.array(value).ravel() for key, value in answer.items()}


@pytest.mark.parametrize("seed", [1, 2, 3])
@pytest.mark.parametrize("stages_per_block", [1, 2, 3])
def test_the_stage_qp_matches_casadis_qp_solvers_with_binding_limits(seed, stages_per_block):
    data = _stage_qp_data(seed)
    ours = _solve_stage_qp(*data, stages_per_block)
    assert ours.success
    _, _, a, lba, uba, lbx, ubx = data
    # Input limits and one-sided rows bind, or the multipliers would prove nothing.
    assert np.any(np.isclose(np.abs(ours.step[np.isfinite(lbx)]), INPUT_LIMIT, atol=1e-6))
    assert np.any(np.isclose(a @ ours.step, ROW_LIMIT, atol=1e-6) & np.isinf(lba))
    # Both solve to about 1e-6 in their residuals; casadi's HPIPM interface stops short of
    # 1e-8 on some of these (its +-1e8 boxes on every state), OSQP's polish is exact.
    for plugin, tolerance in (("hpipm", 1e-4), ("osqp", 1e-5)):
        reference = _casadi_conic(plugin, *data)
        np.testing.assert_allclose(ours.step, reference["x"], atol=tolerance, err_msg=plugin)
        np.testing.assert_allclose(ours.lam_a, reference["lam_a"], atol=10 * tolerance,
                                   err_msg=plugin)
        np.testing.assert_allclose(ours.lam_x, reference["lam_x"], atol=10 * tolerance,
                                   err_msg=plugin)
    # The answer is feasible for the rows and bounds (the solver's own tolerance).
    rows = a @ ours.step
    assert np.all(rows >= lba - 1e-6) and np.all(rows <= uba + 1e-6)
    assert np.all(ours.step >= lbx - 1e-6) and np.all(ours.step <= ubx + 1e-6)


@pytest.mark.parametrize("stages_per_block", [1, 2])
def test_the_unconstrained_stage_qp_gives_the_lqr_law(stages_per_block):
    # A double integrator per axis (sample time 0.2 s) with an input weight; terminal
    # weight P from the Riccati equation: the horizon's first input is -K x0.
    dt, horizon = 0.2, 8
    A = np.array([[1.0, dt], [0.0, 1.0]])
    B = np.array([[0.5 * dt**2], [dt]])
    Q, R = np.diag([2.0, 0.5]), np.array([[0.3]])
    P = scipy.linalg.solve_discrete_are(A, B, Q, R)
    K = np.linalg.solve(R + B.T @ P @ B, B.T @ P @ A)
    x0 = np.array([1.5, -0.4])
    nz, nu = 2, 1
    n_w = (horizon + 1) * nz + horizon * nu
    h = np.zeros((n_w, n_w))
    rows, values = [], []
    for k in range(horizon + 1):
        start = k * (nz + nu)
        h[start:start + nz, start:start + nz] = 2 * (P if k == horizon else Q)
        if k < horizon:
            h[start + nz:start + nz + nu, start + nz:start + nz + nu] = 2 * R
            for i in range(nz):
                row = np.zeros(n_w)
                row[start:start + nz] = A[i]
                row[start + nz:start + nz + nu] = B[i]
                row[start + nz + nu + i] = -1.0
                rows.append(row)
                values.append(0.0)
        if k == 0:
            for i in range(nz):
                row = np.zeros(n_w)
                row[i] = 1.0
                rows.append(row)
                values.append(x0[i])
    a = np.array(rows)
    layout = StageLayout(horizon, nz, (nu,) * horizon, (nz,) + (0,) * horizon)
    hessian, jacobian = _sparse(h), _sparse(a)
    qp = StageQp(layout, hessian.sparsity(), jacobian.sparsity(),
                 stages_per_block=stages_per_block)
    values = np.array(values)
    answer = qp.solve(
        h=np.array(hessian.nonzeros()), grad=np.zeros(n_w), a=np.array(jacobian.nonzeros()),
        lba=values, uba=values, lbx=np.full(n_w, -np.inf), ubx=np.full(n_w, np.inf),
    )
    assert answer.success
    np.testing.assert_allclose(answer.step[nz:nz + nu], -K @ x0, atol=1e-6)


def test_a_hessian_coupling_two_stages_is_refused():
    h, _, a, *_ = _stage_qp_data(1)
    h[0, NZ + NU] = h[NZ + NU, 0] = 0.1
    with pytest.raises(ValueError, match="couples variables of different stages"):
        StageQp(_layout(), _sparse(h).sparsity(), _sparse(a).sparsity())
