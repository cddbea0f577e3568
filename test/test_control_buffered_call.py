"""BufferedFunction: a casadi Function called on bound numpy arrays gives what the ordinary
call gives, insists on every input, and reports the solver's own success.

Reference: casadi's ordinary Function call (Andersson et al., "CasADi: a software framework
for nonlinear optimization and optimal control", Math. Prog. Comp. 11, 2019) and IPOPT's
verdict on a problem whose feasibility is known by hand.
"""

from __future__ import annotations

import casadi as ca
import numpy as np
import pytest

from coverage_fleet.control.buffered_call import BufferedFunction


def _function() -> ca.Function:
    x, y = ca.SX.sym("x", 3), ca.SX.sym("y", 2)
    return ca.Function(
        "mixed", [x, y], [ca.sin(x) * y[0], ca.vertcat(ca.sumsqr(x), y[1] ** 3)],
        ["x", "y"], ["a", "b"],
    )


def test_results_equal_the_ordinary_call_over_repeated_calls() -> None:
    function = _function()
    buffered = BufferedFunction(function)
    rng = np.random.default_rng(7)
    for _ in range(5):
        x, y = rng.normal(size=3), rng.normal(size=2)
        expected = function(x=x, y=y)
        result = buffered(x=x, y=y)
        for name in ("a", "b"):
            reference = np.asarray(expected[name]).reshape(-1)
            np.testing.assert_allclose(result[name], reference, rtol=0, atol=1e-15)


def test_every_input_must_be_given() -> None:
    buffered = BufferedFunction(_function())
    with pytest.raises(TypeError, match=r"missing inputs \['y'\]"):
        buffered(x=np.zeros(3))
    with pytest.raises(TypeError, match=r"unknown inputs \['z'\]"):
        buffered(x=np.zeros(3), y=np.zeros(2), z=np.zeros(1))


def test_a_matrix_input_is_refused_with_its_shape() -> None:
    m = ca.SX.sym("m", 2, 2)
    with pytest.raises(ValueError, match="input 0 must be a dense column, got 2x2"):
        BufferedFunction(ca.Function("matrix", [m], [ca.trace(m)]))


def test_the_solvers_verdict_is_read_after_a_buffered_call() -> None:
    # min (x - 3)^2 s.t. x^2 in [lbg, ubg]: x = 1 for [1, 1]; no real x has x^2 in [-2, -1],
    # which IPOPT reports as a failure.
    x = ca.SX.sym("x")
    solver = ca.nlpsol(
        "tiny", "ipopt", {"x": x, "f": (x - 3) ** 2, "g": x**2},
        {"print_time": False, "ipopt.print_level": 0, "ipopt.sb": "yes"},
    )
    buffered = BufferedFunction(solver)
    arguments = dict(x0=0.5, p=np.zeros(0), lbx=-10.0, ubx=10.0, lam_x0=0.0, lam_g0=0.0)
    result = buffered(**arguments, lbg=1.0, ubg=1.0)
    assert buffered.stats()["success"]
    assert result["x"][0] == pytest.approx(1.0, abs=1e-6)
    buffered(**arguments, lbg=-2.0, ubg=-1.0)
    assert not buffered.stats()["success"]
