"""Tracking MPC and robot controller: checks against outside sources and closed-loop outcomes.

Sources named beside each check. The vehicle files under config/vehicles/ are picked up
automatically, so every model that lands is held to the same closed-loop checks.
"""

from __future__ import annotations

import dataclasses
import os
import shutil
from pathlib import Path

import numpy as np
import pytest
import scipy.linalg
import shapely
import yaml
from shapely.geometry import Point, Polygon
from shapely.ops import nearest_points
from support_control import (
    ORCHARD_BLOCK,
    DoubleIntegratorModel,
    discrete_matrices,
    polygon_halfspaces,
)

from coverage_fleet.control import solver_chain
from coverage_fleet.control.controller import (
    FALLBACK_BRAKING,
    FALLBACK_PREVIOUS_PLAN,
    RobotController,
)
from coverage_fleet.control.frames import heading_index
from coverage_fleet.control.limits import input_limits, state_limits
from coverage_fleet.control.mpc import TrackingMpc
from coverage_fleet.control.terminal import compute_terminal_ingredients
from coverage_fleet.errors import ConfigError
from coverage_fleet.vehicles.loader import load_vehicle_file
from coverage_fleet.vehicles.settings import MpcSettings

REPO = Path(__file__).resolve().parents[1]
VEHICLE_FILES = sorted((REPO / "config" / "vehicles").glob("*.yaml"))
REGION = polygon_halfspaces(ORCHARD_BLOCK)
#: Position error at which a reachable target counts as reached (metres; a tenth of a
#: typical footprint, common practice for a settling tolerance).
REACHED_TOLERANCE = 0.05
#: Slack on limits when checking a closed loop (solver tolerances are far smaller).
LIMIT_SLACK = 1e-6


def _vehicle(path: Path):
    spec = load_vehicle_file(path)
    return spec.model, spec.mpc


def _double_integrator():
    settings = MpcSettings(
        terminal="ellipsoid", state_weights=(1.0, 1.0, 0.5, 0.5), input_weights=(0.2, 0.2)
    )
    return DoubleIntegratorModel(), settings


MODELS = [pytest.param(lambda p=p: _vehicle(p), id=p.stem) for p in VEHICLE_FILES] + [
    pytest.param(_double_integrator, id="test_double_integrator")
]


def _assert_within_limits(model, x: np.ndarray, u: np.ndarray) -> None:
    xs, us = state_limits(model), input_limits(model)
    assert np.all(xs.G @ x <= xs.g + LIMIT_SLACK), (x, xs.names)
    assert np.all(us.G @ u <= us.g + LIMIT_SLACK), (u, us.names)
    A, b = REGION
    shrunk = b - model.footprint_radius * np.linalg.norm(A, axis=1)
    assert np.all(A @ model.position(x) <= shrunk + LIMIT_SLACK), model.position(x)


def _closed_loop(model, settings, x0, target, steps, terminal=None):
    controller = RobotController(model, settings, REGION, terminal)
    F = model.discrete_dynamics(settings.sample_time, settings.substeps)
    x = np.array(x0, dtype=float)
    failures = 0
    for _ in range(steps):
        step = controller.step(x, target)
        failures += not step.success
        _assert_within_limits(model, x, step.input)
        x = np.array(F(x, step.input)).reshape(-1)
    return x, failures, controller


def _start_state(model, position, heading=0.0):
    x = np.zeros(model.nx)
    x[list(model.position_indices)] = position
    h = heading_index(model)
    if h is not None:
        x[h] = heading
    return x


# --- linear-quadratic check -----------------------------------------------------------------


def test_unconstrained_linear_mpc_first_input_is_the_lqr_law():
    """Rawlings, Mayne & Diehl, "Model Predictive Control: Theory, Computation, and Design",
    2nd ed., 2017, ch. 2 (sec. 2.5): linear model, no active constraints, terminal cost the
    DARE solution -> the MPC's first input is the LQR input. With the artificial steady
    state the LQR acts on x - x_s, and the optimal x_s minimises the infinite-horizon cost
    (x - x_s)' P (x - x_s) + w |p_s - target|^2, a least-squares problem solved here in
    closed form; u = u_s - K_lqr (x - x_s)."""
    model = DoubleIntegratorModel(max_speed=100.0, max_acceleration=100.0)
    settings = MpcSettings(
        horizon=15,
        terminal="ellipsoid",
        state_weights=(1.0, 2.0, 0.5, 0.3),
        input_weights=(0.4, 0.7),
        offset_weight=3.0,
        terminal_decrease_slack=0.0,
        solver={"plugin": "ipopt", "options": {"ipopt.tol": 1e-12}},
    )
    dt = settings.sample_time
    A, B = discrete_matrices(dt)  # exact zero-order hold, independent of the MPC's RK4
    Q, R = np.diag(settings.state_weights), np.diag(settings.input_weights)
    P = scipy.linalg.solve_discrete_are(A, B, Q, R)
    K_lqr = np.linalg.solve(R + B.T @ P @ B, B.T @ P @ A)  # u = -K_lqr x
    terminal = compute_terminal_ingredients(model, settings)
    np.testing.assert_allclose(terminal.P_lqr, P, rtol=1e-9)
    big_region = (np.array([[1.0, 0], [-1, 0], [0, 1], [0, -1]]), np.full(4, 1e3))
    mpc = TrackingMpc(model, settings, big_region, terminal)
    rng = np.random.default_rng(2017)
    for _ in range(3):
        x = rng.uniform(-1.0, 1.0, 4)
        target = rng.uniform(-1.0, 1.0, 2)
        Mx = model.steady_states().Mx
        w = settings.offset_weight
        theta = np.linalg.solve(Mx.T @ P @ Mx + w * np.eye(2), Mx.T @ P @ x + w * target)
        x_s = Mx @ theta
        expected = -K_lqr @ (x - x_s)
        mpc.reset()
        solution = mpc.solve(x, target)
        assert solution.success, solution.status
        np.testing.assert_allclose(solution.steady_state.position, theta, atol=1e-6)
        np.testing.assert_allclose(solution.first_input, expected, atol=1e-6)


# --- closed loops ---------------------------------------------------------------------------


def _random_pair(rng: np.random.Generator, inner: Polygon) -> tuple[np.ndarray, np.ndarray]:
    """A random start and a random target 2 to 4 m from it, both inside `inner`."""
    low, high = np.array(inner.bounds[:2]), np.array(inner.bounds[2:])
    while True:
        start, target = rng.uniform(low, high), rng.uniform(low, high)
        inside = inner.contains(Point(start)) and inner.contains(Point(target))
        if inside and 2.0 < np.linalg.norm(target - start) < 4.0:
            return start, target


@pytest.mark.parametrize("make", MODELS)
def test_closed_loop_reaches_a_reachable_target_within_limits(make):
    """Tracking MPC property (Limon et al., Automatica 44(9), 2008, Theorem 1): for an
    admissible target the closed loop converges to it; every limit holds on the way.
    Random starts, headings and targets (CONTROL_TEST_SEED picks another draw)."""
    model, settings = make()
    rng = np.random.default_rng(int(os.environ.get("CONTROL_TEST_SEED", "44")))
    inner = Polygon(ORCHARD_BLOCK).buffer(-2.0)
    for _ in range(2):
        start, target = _random_pair(rng, inner)
        x0 = _start_state(model, start, heading=float(rng.uniform(-np.pi, np.pi)))
        x, failures, _ = _closed_loop(model, settings, x0, target, steps=180)
        error = np.linalg.norm(model.position(x) - target)
        assert error < REACHED_TOLERANCE, (start, target, error, failures)


@pytest.mark.parametrize("make", MODELS)
def test_closed_loop_settles_at_closest_admissible_point_for_target_outside(make):
    """Tracking MPC property (Limon et al., Automatica 44(9), 2008, Theorem 1; IEEE TAC
    63(11), 2018): an inadmissible target gives convergence to the admissible steady state
    minimising the offset cost, here the projection of the target onto the region shrunk
    by footprint + terminal-set extent. Reference projection: shapely (negative buffer of
    a convex polygon = inward offset of its edges; nearest_points)."""
    model, settings = make()
    terminal = compute_terminal_ingredients(model, settings)
    target = np.array([16.0, -3.0])
    x0 = _start_state(model, (9.0, 4.0), heading=0.3)
    x, _, controller = _closed_loop(model, settings, x0, target, steps=110, terminal=terminal)
    shrink = model.footprint_radius + terminal.position_extent
    admissible = Polygon(ORCHARD_BLOCK).buffer(-shrink)
    expected = np.array(nearest_points(admissible, Point(target))[0].coords[0])
    steady = controller.mpc.solve(x, target).steady_state.position
    assert np.linalg.norm(steady - expected) < 1e-4
    assert np.linalg.norm(model.position(x) - expected) < REACHED_TOLERANCE


def test_rover_heading_wrap_from_odometry_does_not_disturb_the_loop():
    """Odometry reports yaw wrapped to [-pi, pi) (REP 103 convention); a target behind a
    rover facing along -x makes the heading cross +-pi. The controller must keep going as
    if the heading were continuous (common practice: unwrap against the prediction)."""
    path = REPO / "config" / "vehicles" / "differential_drive.yaml"
    model, settings = _vehicle(path)
    controller = RobotController(model, settings, REGION)
    F = model.discrete_dynamics(settings.sample_time, settings.substeps)
    x = _start_state(model, (8.0, 5.0), heading=np.pi - 0.05)
    target = np.array([5.0, 3.0])
    crossed = False
    for _ in range(130):
        measured = x.copy()
        measured[2] = (x[2] + np.pi) % (2 * np.pi) - np.pi
        crossed |= abs(measured[2] - x[2]) > 1.0
        step = controller.step(measured, target)
        assert step.success, step.status
        x = np.array(F(measured, step.input)).reshape(-1)
    assert crossed, "the scenario must make the wrapped heading jump"
    assert np.linalg.norm(x[:2] - target) < REACHED_TOLERANCE


# --- refusals and failures ------------------------------------------------------------------


def _vehicle_file_with_mpc(tmp_path: Path, source: Path, **mpc_changes) -> Path:
    """A copy of a shipped vehicle file with some `mpc` keys changed."""
    document = yaml.safe_load(source.read_text())
    document["/**"]["ros__parameters"]["mpc"].update(mpc_changes)
    path = tmp_path / source.name
    path.write_text(yaml.safe_dump(document))
    return path


def test_ellipsoid_is_refused_for_a_model_not_stabilisable_at_rest(tmp_path):
    """Reported where the file is read (vehicles.loader); settings built in code that skip
    the loader are refused by the MPC itself (an explicit check, kept under python -O)."""
    rover = REPO / "config" / "vehicles" / "differential_drive.yaml"
    with pytest.raises(ConfigError) as caught:
        load_vehicle_file(_vehicle_file_with_mpc(tmp_path, rover, terminal="ellipsoid"))
    problems = {p.key: p.message for p in caught.value.problems}
    assert "stabilis" in problems["mpc.terminal"] and "equality" in problems["mpc.terminal"]
    model, settings = _vehicle(rover)
    with pytest.raises(ValueError, match="stabilis"):
        TrackingMpc(model, dataclasses.replace(settings, terminal="ellipsoid"), REGION)


def test_bad_solver_settings_are_reported_together(tmp_path):
    multirotor = REPO / "config" / "vehicles" / "multirotor.yaml"
    bad = {"plugin": "nope", "max_iter": 0, "colour": 1}
    with pytest.raises(ConfigError) as caught:
        load_vehicle_file(_vehicle_file_with_mpc(tmp_path, multirotor, solver=bad))
    keys = {p.key for p in caught.value.problems}
    assert {"mpc.solver.colour", "mpc.solver.plugin", "mpc.solver.max_iter"} <= keys
    model, settings = _double_integrator()
    with pytest.raises(ValueError, match="plugin"):
        TrackingMpc(model, dataclasses.replace(settings, solver=bad), REGION)


def test_solver_failure_brakes_when_there_is_no_plan():
    """A real failure: one IPOPT iteration cannot converge from a cold start."""
    model, settings = _vehicle(REPO / "config" / "vehicles" / "multirotor.yaml")
    starved = dataclasses.replace(settings, solver={"max_iter": 1, "path": "full"})
    controller = RobotController(model, starved, REGION)
    x = _start_state(model, (5.0, 5.0))
    x[2:4] = (1.5, -1.0)
    step = controller.step(x, np.array([9.0, 6.0]))
    assert not step.success and step.used_fallback and step.fallback == FALLBACK_BRAKING
    np.testing.assert_allclose(step.input, controller.admissible(model.braking_input(x)))
    _assert_within_limits(model, x, step.input)


def test_solver_failure_flies_the_previous_plan_then_brakes():
    """A real failure: the robot is pushed outside the region (a gust), so no plan can
    keep every predicted position inside: the problem is infeasible. The controller flies
    the last plan one input per sample while it lasts, then brakes."""
    model, settings = _vehicle(REPO / "config" / "vehicles" / "multirotor.yaml")
    controller = RobotController(model, settings, REGION)
    F = model.discrete_dynamics(settings.sample_time, settings.substeps)
    x = _start_state(model, (6.0, 5.0))
    target = np.array([3.0, 3.0])
    for _ in range(5):
        step = controller.step(x, target)
        assert step.success
        x = np.array(F(x, step.input)).reshape(-1)
    # The same problem solved again: what the controller will hold on to, to the solver's
    # tolerance (fatrop's is absolute, 1e-5 on an O(1e3) cost).
    plan = controller.mpc.solve(x, target)
    step = controller.step(x, target)
    assert step.success
    np.testing.assert_allclose(step.input, plan.first_input, atol=1e-3)
    outside = _start_state(model, (6.0, -3.0))
    outside[2:4] = (0.0, -2.5)
    kinds = []
    for k in range(1, settings.horizon + 2):
        step = controller.step(outside, target)
        assert not step.success and step.used_fallback
        kinds.append(step.fallback)
        if step.fallback == FALLBACK_PREVIOUS_PLAN:
            np.testing.assert_allclose(step.input, plan.predicted_inputs[k], atol=1e-3)
        u_lower, u_upper = model.input_bounds()
        assert np.all(step.input >= u_lower) and np.all(step.input <= u_upper)
    assert kinds == [FALLBACK_PREVIOUS_PLAN] * (settings.horizon - 1) + [FALLBACK_BRAKING] * 2


def test_inputs_are_clipped_into_the_input_polytope():
    model, settings = _vehicle(REPO / "config" / "vehicles" / "multirotor.yaml")
    controller = RobotController(model, settings, REGION)
    limits = input_limits(model)
    for u in ([10.0, 10.0], [-3.0, 0.5], [np.nan, 1.0], [2.5, 2.5]):
        clipped = controller.admissible(np.array(u))
        assert np.all(limits.G @ clipped <= limits.g + 1e-12)
    inside = np.array([0.3, -0.2])
    np.testing.assert_array_equal(controller.admissible(inside), inside)


def test_shapely_projection_reference_is_the_edge_offset():
    """Sanity of the reference itself: for a convex polygon shapely's negative buffer
    equals the intersection of the edges moved inwards (common practice)."""
    A, b = REGION
    d = 0.7
    eroded = Polygon(ORCHARD_BLOCK).buffer(-d)
    rng = np.random.default_rng(5)
    points = rng.uniform([-2, -2], [16, 13], (400, 2))
    inside_offset = np.all(points @ A.T <= b - d, axis=1)
    inside_buffer = shapely.contains_xy(eroded, points[:, 0], points[:, 1])
    assert np.mean(inside_offset == inside_buffer) > 0.99


@pytest.mark.parametrize("prebuild", [True, False])
def test_failed_fast_solve_is_rescued_by_ipopt(prebuild):
    """A real failure of the primary plugin (fatrop stopped after one iteration) is solved
    again by IPOPT from the same warm start; the sample still succeeds and says so. Offline
    (prebuild False) the rescue is built at that first failure and gives the same answer
    as the one built up front (the same IPOPT on the same problem)."""
    model, settings = _double_integrator()
    starved = dataclasses.replace(
        settings,
        solver={"plugin": "fatrop", "path": "full", "options": {"fatrop.max_iter": 1}},
    )
    mpc = TrackingMpc(model, starved, REGION, prebuild=prebuild)
    solution = mpc.solve(_start_state(model, (3.0, 3.0)), np.array([6.0, 4.0]))
    assert solution.success
    # fatrop's flag by its name (its enum IpSolverReturnFlag), not casadi's bare number.
    assert solution.status == "fatrop: MaxIterExceeded; ipopt: Solve_Succeeded", solution.status
    reference = TrackingMpc(model, starved, REGION, prebuild=not prebuild)
    again = reference.solve(_start_state(model, (3.0, 3.0)), np.array([6.0, 4.0]))
    np.testing.assert_array_equal(again.first_input, solution.first_input)


def test_offline_mpc_builds_its_full_solve_when_a_sample_first_needs_it():
    """prebuild=False (offline): the real-time path's full solve is built at the first
    sample that needs it, here the cold start (no shifted plan for the real-time step);
    that it then answers as one built up front: test_failed_fast_solve_is_rescued_by_ipopt."""
    model, settings = _double_integrator()
    mpc = TrackingMpc(model, settings, REGION, prebuild=False)
    rti, full, rescue = mpc._problems[0].chain.strategies
    assert (rti.name, full.name, rescue.name) == ("rti", "fatrop", "ipopt")
    assert full._solver is None and rescue._solver is None
    solution = mpc.solve(_start_state(model, (3.0, 3.0)), np.array([6.0, 4.0]))
    assert solution.success and solution.status == "fatrop: Success"
    assert full._solver is not None and rescue._solver is None


def test_a_cold_start_stopped_at_the_cap_runs_again_and_a_shifted_plan_hands_over(monkeypatch):
    """A start that is no shifted plan (here the cold start) whose capped fatrop run stops
    at the cap runs fatrop again from that run's last iterate (up to max_iter // cap runs)
    instead of going to IPOPT, and reaches the answer of an uncapped fatrop; a sample from
    the shifted plan that needs more than the cap still hands over to IPOPT after one run
    (solver_chain.FAST_ITERATION_CAP's comment). The cap is lowered to 8 so that this small
    problem (15 fatrop iterations from rest) meets it."""
    model, settings = _double_integrator()
    full = dataclasses.replace(settings, solver={"plugin": "fatrop", "path": "full"})
    start, target = _start_state(model, (3.0, 3.0)), np.array([6.0, 4.0])
    uncapped = TrackingMpc(model, full, REGION).solve(start, target)
    assert uncapped.success and uncapped.iterations > 8
    monkeypatch.setattr(solver_chain, "FAST_ITERATION_CAP", 8)
    mpc = TrackingMpc(model, full, REGION)
    cold = mpc.solve(start, target)
    assert cold.success and cold.status == "Success after 2 runs", cold.status
    np.testing.assert_allclose(cold.first_input, uncapped.first_input, atol=1e-6)
    # A far new target: from the shifted plan fatrop needs more than 8 iterations.
    moved = mpc.solve(_start_state(model, (3.1, 3.0)), np.array([1.0, 9.0]))
    assert moved.success
    assert moved.status == "fatrop: MaxIterExceeded; ipopt: Solve_Succeeded", moved.status
    # A budget below two runs (max_iter 12, cap 8) keeps the cold start to one run.
    tight = dataclasses.replace(
        settings, solver={"plugin": "fatrop", "path": "full", "max_iter": 12}
    )
    single = TrackingMpc(model, tight, REGION).solve(start, target)
    assert single.status == "fatrop: MaxIterExceeded; ipopt: Solve_Succeeded", single.status


def test_fatrop_status_names_its_own_flag_not_casadis_success_bit():
    """casadi's return_status for fatrop is 1 for every unsuccessful end; the status must
    name the flag itself. A tolerance no iterate meets and an acceptable-point test every
    iterate passes make fatrop stop at its first acceptable point (flag StopAtAcceptablePoint
    of fatrop's enum IpSolverReturnFlag, include/fatrop/ip_algorithm/ip_algorithm.hpp),
    which casadi does not count as success, so IPOPT answers."""
    model, settings = _double_integrator()
    acceptable_stop = dataclasses.replace(
        settings,
        solver={
            "plugin": "fatrop",
            "path": "full",
            "options": {
                "fatrop.tol": 1e-14,
                "fatrop.tol_acceptable": 1e6,
                "fatrop.acceptable_iter": 1,
            },
        },
    )
    mpc = TrackingMpc(model, acceptable_stop, REGION)
    solution = mpc.solve(_start_state(model, (3.0, 3.0)), np.array([6.0, 4.0]))
    assert solution.success
    assert solution.status == (
        "fatrop: StopAtAcceptablePoint; ipopt: Solve_Succeeded"
    ), solution.status


@pytest.mark.skipif(shutil.which("cc") is None, reason="no C compiler")
def test_compiled_problem_gives_the_same_solution(tmp_path, monkeypatch):
    """Code generation changes how the functions are evaluated, not what they are."""
    monkeypatch.setenv("COVERAGE_FLEET_CACHE", str(tmp_path))
    model, settings = _double_integrator()
    settings = dataclasses.replace(settings, horizon=6)
    x0, target = _start_state(model, (3.0, 3.0)), np.array([6.0, 4.0])
    plain = TrackingMpc(model, settings, REGION).solve(x0, target)
    compiled_settings = dataclasses.replace(settings, solver={"compile": True})
    compiled = TrackingMpc(model, compiled_settings, REGION).solve(x0, target)
    assert list((tmp_path / "mpc").glob("*.so"))
    assert plain.success and compiled.success
    np.testing.assert_allclose(compiled.predicted_states, plain.predicted_states, atol=1e-9)


INTERRUPT_SCRIPT = """
import signal, sys
import numpy as np
signal.signal(signal.SIGINT, signal.default_int_handler)
sys.path.insert(0, sys.argv[1])
from support_control import DoubleIntegratorModel
from coverage_fleet.control.mpc import TrackingMpc
from coverage_fleet.vehicles.settings import MpcSettings
box = (np.array([[1.0, 0], [-1, 0], [0, 1], [0, -1]]), np.full(4, 1e3))
settings = MpcSettings(horizon=150, solver={"plugin": sys.argv[2]})
mpc = TrackingMpc(DoubleIntegratorModel(), settings, box)
print("ready", flush=True)
try:
    for _ in range(100000):
        mpc.reset()
        mpc.solve(np.array([0.0, 0.0, 0.9, -0.9]), np.array([400.0, -300.0]))
    print("never interrupted", flush=True)
except KeyboardInterrupt:
    print("interrupted", flush=True)
"""


@pytest.mark.parametrize("plugin", ["ipopt", "fatrop"])
def test_ctrl_c_during_solves_reaches_the_caller(plugin, tmp_path):
    """casadi turns a SIGINT that lands inside a solver callback into a failed solve; the
    MPC must hand the operator's Ctrl-C on as KeyboardInterrupt instead (checked with a
    real signal to a process busy solving, common practice for CLI tools)."""
    import signal
    import subprocess
    import sys
    import time

    script = tmp_path / "busy.py"
    script.write_text(INTERRUPT_SCRIPT)
    here = str(Path(__file__).parent)
    process = subprocess.Popen(
        [sys.executable, str(script), here, plugin], stdout=subprocess.PIPE, text=True
    )
    assert process.stdout is not None
    assert process.stdout.readline().strip() == "ready"
    time.sleep(1.0)  # well inside the solving loop (not a timed assertion)
    process.send_signal(signal.SIGINT)
    out, _ = process.communicate(timeout=120)
    assert out.strip() == "interrupted"


# --- a car beside its target ------------------------------------------------------------------


def test_car_beside_its_target_shunts_closer():
    """A car at rest with its target 0.25 m to its side (ahead by 0.05 m): its cheapest plan
    from a straight start is to stay put (at rest the steering has no first-order effect),
    yet the kinematic bicycle (Rajamani, Vehicle Dynamics and Control, 2nd ed., 2012,
    sec. 2.2) can shift sideways by two arcs on opposite locks, one forward and one back
    (a shunt, common practice). The stalled solve's shunt second starts must find that and
    the closed loop must end far closer than it started, within the limits."""
    model, settings = _vehicle(REPO / "config" / "vehicles" / "car_like.yaml")
    heading = 0.3
    along = np.array([np.cos(heading), np.sin(heading)])
    beside = np.array([-np.sin(heading), np.cos(heading)])
    start = np.array([6.0, 5.0])
    target = start + 0.05 * along + 0.25 * beside
    assert model.manoeuvre_inputs(settings.horizon, settings.sample_time)
    x0 = _start_state(model, start, heading)
    x, failures, _ = _closed_loop(model, settings, x0, target, steps=150)
    assert failures == 0
    before = float(np.linalg.norm(start - target))
    after = float(np.linalg.norm(model.position(x) - target))
    assert after < 0.5 * before, (before, after)
    assert abs(x[3]) < 0.05, "the car must come to rest"


def test_manoeuvre_inputs_start_and_end_at_rest_within_limits():
    """Every shunt of the car-like model stays inside the input box and its speed inside
    the speed limits, and it ends at rest (so it is a fair second start for an MPC whose
    terminal state is a steady state)."""
    model, settings = _vehicle(REPO / "config" / "vehicles" / "car_like.yaml")
    sequences = model.manoeuvre_inputs(settings.horizon, settings.sample_time)
    assert len(sequences) == 4
    F = model.discrete_dynamics(settings.sample_time, settings.substeps)
    lower, upper = model.input_bounds()
    x_lower, x_upper = model.state_bounds()
    for inputs in sequences:
        assert inputs.shape == (settings.horizon, model.nu)
        assert np.all(inputs >= lower - 1e-12) and np.all(inputs <= upper + 1e-12)
        x = _start_state(model, (6.0, 5.0))
        for u in inputs:
            x = np.array(F(x, u)).reshape(-1)
            assert x_lower[3] - 1e-9 <= x[3] <= x_upper[3] + 1e-9
        assert abs(x[3]) < 1e-9
        assert np.linalg.norm(model.position(x) - (6.0, 5.0)) > 0.05
