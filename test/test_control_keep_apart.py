"""The tracking MPC with buffered-cell rows (control/mpc.py, control/keep_apart.py).

Sources: the artificial steady state settles at the admissible steady state closest to an
unreachable target (Limon, Alvarado, Alamo & Camacho, Automatica 44(9), 2008, the offset
cost's tracking property); the nearest admissible point is computed independently with
shapely (nearest_points on the admissible polygon). Buffered cells: Zhou, Wang,
Bandyopadhyay & Schwager, IEEE RA-L 2(2), 2017. A sublevel set of a valid terminal set is
valid: Chen & Allgower, Automatica 34(10), 1998, section 3.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
import pytest
import shapely
from shapely.ops import nearest_points
from support_control import on_solver_path

from coverage_fleet.control.controller import RobotController
from coverage_fleet.control.fallbacks import FALLBACK_KEEP_APART_BRAKE
from coverage_fleet.control.ingredients import TerminalIngredients
from coverage_fleet.control.keep_apart import CellRows, CellWindow, KeepApartSettings
from coverage_fleet.control.mpc import (
    KEEP_APART_TERMINAL_EXTENT,
    STEADY_SET_MIN_RADIUS,
    TrackingMpc,
)
from coverage_fleet.control.shared_problems import SharedProblems
from coverage_fleet.control.stage_cost import stage_weights
from coverage_fleet.control.terminal import terminal_for_vehicle
from coverage_fleet.geometry.region import ConvexRegion
from coverage_fleet.vehicles.loader import load_vehicle_file

VEHICLES = Path(__file__).resolve().parents[1] / "config" / "vehicles"
REGION = ConvexRegion.from_vertices(np.array([[-10, -10], [10, -10], [10, 10], [-10, 10]], float))
ROWS = 4


def padded(rows: list[tuple[tuple[float, float], float]]) -> tuple[np.ndarray, np.ndarray]:
    normals, offsets = np.zeros((ROWS, 2)), np.ones(ROWS)
    for k, (normal, offset) in enumerate(rows):
        n = np.asarray(normal, float)
        normals[k], offsets[k] = n / np.linalg.norm(n), offset / np.linalg.norm(n)
    return normals, offsets


def spec_for(kind: str, path: str | None = None):
    """The shipped vehicle file; `path` overrides its solver path."""
    spec = load_vehicle_file(VEHICLES / f"{kind}.yaml")
    if path is None:
        return spec
    return dataclasses.replace(spec, mpc=on_solver_path(spec.mpc, path))


def closed_loop(mpc: TrackingMpc, x: np.ndarray, target, cell, samples: int):
    model, settings = mpc.model, mpc.settings
    fine = model.discrete_dynamics(settings.sample_time / 8, settings.substeps)
    positions, plans, solution = [], [], None
    for _ in range(samples):
        solution = mpc.solve(x, target, cell)
        plan = solution.predicted_states[:, list(model.position_indices)]
        plans.append((model.position(x), plan))
        for _ in range(8):  # the plant between samples, finely
            x = np.array(fine(x, solution.first_input)).ravel()
            positions.append(model.position(x))
    return x, np.array(positions), plans, solution


@pytest.mark.parametrize("kind", ["differential_drive", "car_like", "multirotor", "surface_vessel"])
def test_robot_stops_at_the_nearest_admissible_point_of_its_cell(kind) -> None:
    """Target beyond two cell rows (a corner): the closed loop keeps every fine plant
    position inside the cell (the pad covers the motion between samples), and the robot
    comes to rest at the point of the admissible set nearest the target (shapely): the cell
    pulled back by the larger of the terminal extent (the steady state keeps it) and the pad
    (every predicted position keeps it, the resting one too)."""
    spec = spec_for(kind)
    terminal, _ = terminal_for_vehicle(spec)
    mpc = TrackingMpc(spec.model, spec.mpc, REGION.halfspaces(), terminal, cell_rows=ROWS)
    assert mpc.terminal.position_extent <= KEEP_APART_TERMINAL_EXTENT + 1e-12
    cell = padded([((1.0, 0.0), 2.0), ((1.0, 1.0), 3.0)])  # x <= 2, x + y <= 3
    x = np.zeros(spec.model.nx)
    target = np.array([5.0, 4.0])
    x, positions, plans, solution = closed_loop(mpc, x, target, cell, samples=120)
    normals, offsets = cell
    tolerance = 1e-3  # the soft rows' slack stays at micrometres; solver tolerances
    assert np.max(positions @ normals[:2].T - offsets[:2]) <= tolerance
    # Every predicted position keeps the pad from the rows, but for a row the robot stood
    # within the pad of: that one it keeps no farther out than it stood (control/mpc.py).
    for start, plan in plans:
        held = np.maximum(offsets[:2] - mpc.cell_pad, normals[:2] @ start)
        assert np.max(plan[1:] @ normals[:2].T - held) <= tolerance
    extent = max(mpc.terminal.position_extent, mpc.cell_pad)
    admissible = shapely.box(-9, -9, 2 - extent, 9).intersection(
        shapely.Polygon([(-9, 3 - extent * np.sqrt(2) + 9), (-9, -9),
                         (3 - extent * np.sqrt(2) + 9, -9)])
    )
    expected = np.array(nearest_points(admissible, shapely.Point(target))[0].coords[0])
    final = spec.model.position(x)
    assert np.linalg.norm(final - expected) < 0.02, (final, expected)
    steady = solution.steady_state.position
    # The steady state's slack is priced at k (STEADY_CELL_PENALTIES): where the offset
    # cost w |p_s - target|^2 pulls it out, stationarity (2 k sigma = 2 w d along the row
    # at most) bounds its violation by w d / k.
    pulled = spec.mpc.offset_weight * np.linalg.norm(target - steady) / mpc.steady_cell_penalty
    assert pulled < 0.01
    limit = -mpc.terminal.position_extent + pulled + 1e-3
    assert np.max(normals[:2] @ steady - offsets[:2]) <= limit
    assert solution.steady_cell_violation <= pulled + 1e-6
    assert solution.cell_violation < 1e-3


@pytest.mark.parametrize("horizon", [1, 2, 20])
def test_the_last_predicted_position_keeps_its_rows_at_any_horizon(horizon) -> None:
    """The rows of x_N are written on F(x_{N-1}, u_{N-1}) with stage N-1's slack (stage N
    has no input), and with a horizon of one sample stage 0 carries a second slack for
    them (control/mpc.py): a rover driving at a row x <= 2 from 1.6 m before it keeps
    every predicted position, the last one too, the pad inside the row and comes to rest
    at 2 - pad, the admissible point nearest its target (the same construction as the
    corner test above, on one row). The horizon of 1 puts x_N's rows in the same stage as
    the steady state's rows, whose slack is priced differently."""
    spec = spec_for("differential_drive")
    settings = dataclasses.replace(spec.mpc, horizon=horizon)
    mpc = TrackingMpc(
        spec.model, settings, REGION.halfspaces(),
        TerminalIngredients.equality("test: equality at any horizon"), cell_rows=ROWS,
    )
    cell = padded([((1.0, 0.0), 2.0)])
    x = np.array([0.4, 0.0, 0.0])
    x, positions, plans, solution = closed_loop(mpc, x, np.array([6.0, 0.0]), cell, 80)
    tolerance = 1e-6
    assert np.max(positions[:, 0]) <= 2.0 + tolerance
    for start, plan in plans:
        held = max(2.0 - mpc.cell_pad, start[0])
        assert plan[-1, 0] <= held + tolerance, (start, plan[-1])
        assert np.max(plan[1:, 0]) <= held + tolerance
    assert abs(spec.model.position(x)[0] - (2.0 - mpc.cell_pad)) < 5e-3
    assert solution.cell_violation <= 1e-8


def test_robot_outside_its_cell_is_pushed_back_not_stopped_by_infeasibility() -> None:
    """Start 0.3 m beyond a row (a neighbour came too close): hard rows would be
    infeasible; the soft rows solve, report the violation, and the robot moves back in."""
    spec = spec_for("multirotor")
    terminal, _ = terminal_for_vehicle(spec)
    mpc = TrackingMpc(spec.model, spec.mpc, REGION.halfspaces(), terminal, cell_rows=ROWS)
    cell = padded([((1.0, 0.0), -0.3)])  # x <= -0.3, the robot is at 0 moving on at 1 m/s
    x = np.array([0.0, 0.0, 1.0, 0.0])
    first = mpc.solve(x, np.array([3.0, 0.0]), cell)
    assert first.success and first.cell_violation > 0.05
    x, positions, _, last = closed_loop(mpc, x, np.array([3.0, 0.0]), cell, samples=60)
    assert positions[-1][0] <= -0.3 + 1e-3
    assert last.cell_violation < 1e-3


@pytest.mark.parametrize("kind", ["multirotor", "differential_drive"])
def test_robot_beyond_its_row_and_pinned_at_the_edge_goes_no_farther_out(kind) -> None:
    """Packed start: the robot stands 0.05 m beyond its row y <= -9.55 (a neighbour above
    came within the margin) and on the region's edge (the footprint touches y = -10), its
    target beyond the edge. Its steady state cannot keep both the row and the region's
    steady-state margin (terminal extent off the edge): that conflict must not free the
    rows of its plan, so no fine plant position goes farther out than where it stood (the
    rule that keeps a pair of robots outside their cells from closing in; the buffered
    cells themselves: Zhou, Wang, Bandyopadhyay & Schwager, IEEE RA-L 2(2), 2017)."""
    spec = spec_for(kind)
    terminal, _ = terminal_for_vehicle(spec)
    mpc = TrackingMpc(spec.model, spec.mpc, REGION.halfspaces(), terminal, cell_rows=ROWS)
    radius = spec.model.footprint_radius
    x = np.zeros(spec.model.nx)
    start_y = -10.0 + radius
    x[list(spec.model.position_indices)] = (0.0, start_y)
    cell = padded([((0.0, 1.0), start_y - 0.05)])
    x, positions, _, last = closed_loop(mpc, x, np.array([0.5, -12.0]), cell, samples=50)
    assert positions[:, 1].max() <= start_y + 1e-3, positions[:, 1].max() - start_y
    assert last.success and last.cell_violation < 1e-3


def test_controller_brakes_when_its_snapshots_are_too_old() -> None:
    spec = spec_for("multirotor")
    terminal, _ = terminal_for_vehicle(spec)
    controller = RobotController(
        spec.model, spec.mpc, REGION.halfspaces(), terminal, cell_rows=ROWS
    )
    window = CellWindow("me", KeepApartSettings(max_age=0.5), window=1.0, rows=ROWS, reach=5.0)
    x = np.array([0.0, 0.0, 1.0, 0.0])
    step = controller.step(x, np.array([3.0, 0.0]), window.rows_at(0.0, x[:2]))
    assert step.fallback == FALLBACK_KEEP_APART_BRAKE and "no snapshot" in step.status
    assert np.dot(step.input, x[2:]) < 0  # opposes the motion
    # No solve was attempted: a brake, not a solver failure.
    assert not step.success and not step.solver_failed and step.iterations == 0
    step = controller.step(x, np.array([3.0, 0.0]), None)
    assert step.fallback == FALLBACK_KEEP_APART_BRAKE and "keep-apart" in step.status
    assert not controller.step(x, np.array([3.0, 0.0]), CellRows(*padded([]))).used_fallback


def test_lowered_terminal_level_keeps_the_decrease_condition() -> None:
    """within_extent lowers alpha by (extent ratio)^2; the decrease condition of the
    terminal cost, checked by sampling the smaller set, still holds (Chen & Allgower)."""
    spec = spec_for("multirotor")
    terminal, _ = terminal_for_vehicle(spec)
    small = terminal.within_extent(0.1)
    assert small.alpha == pytest.approx(terminal.alpha * (0.1 / terminal.position_extent) ** 2)
    model, settings = spec.model, spec.mpc
    F = model.discrete_dynamics(settings.sample_time, settings.substeps)
    q_weights, r_weights = stage_weights(model, settings)
    rng = np.random.default_rng(0)
    L = np.linalg.cholesky(np.linalg.inv(small.P))
    for _ in range(300):
        direction = rng.normal(size=model.nx)
        e = L @ (direction / np.linalg.norm(direction)) * np.sqrt(small.alpha) * rng.uniform()
        u = small.K @ e
        e_next = np.array(F(e, u)).ravel()
        stage = e @ q_weights @ e + u @ r_weights @ u
        decrease = e_next @ small.P @ e_next - e @ small.P @ e + stage
        assert decrease <= 1e-9 * max(1.0, e @ small.P @ e)
        assert np.sqrt(e[:2] @ e[:2]) <= 0.1 + 1e-9


def test_padding_rows_left_out_give_the_same_closed_loop() -> None:
    """The MPC leaves out padding rows (normal 0) and solves the problem built for the
    smallest row budget that holds the rest. A constraint that cannot bind carries a zero
    multiplier and leaves the optimality conditions unchanged (Nocedal & Wright, Numerical
    Optimization, 2nd ed., 2006, section 12.3, the KKT conditions; a padding row reads
    sigma >= pad - c with c >= pad, and the optimal sigma is >= 0). So the closed loop
    with budgets matches the one of the problem built for all 12 rows alone, through
    changes of budget (no real rows, two, five, one: the warm start's multipliers carried
    between problems), with the budgets' problems built on first use (as offline). The
    full solve: a real-time step's iterate is not a KKT point, so the two problems' iterates
    differ within its acceptance test (measured 2e-4 m), not to the solver's tolerance."""
    spec = spec_for("differential_drive", path="full")
    terminal, _ = terminal_for_vehicle(spec)
    rows = 12
    budgeted = TrackingMpc(
        spec.model, spec.mpc, REGION.halfspaces(), terminal, cell_rows=rows, prebuild=False
    )
    single = TrackingMpc(
        spec.model, spec.mpc, REGION.halfspaces(), terminal, cell_rows=rows, row_budgets=()
    )
    assert budgeted.row_budgets == (0, 2, 4, 8, 12) and single.row_budgets == (12,)
    ahead = [((1.0, 0.0), 2.0), ((1.0, 0.1), 2.05)]  # a neighbour ahead, two snapshots
    far = [((0.0, 1.0), 5.0), ((0.0, -1.0), 5.0), ((-1.0, 0.0), 5.0)]
    schedule = [[]] * 5 + [ahead] * 15 + [ahead + far] * 10 + [ahead[:1]] * 10

    def rows_of(real):
        normals, offsets = np.zeros((rows, 2)), np.ones(rows)
        for k, (normal, offset) in enumerate(real):
            n = np.asarray(normal, float)
            normals[k], offsets[k] = n / np.linalg.norm(n), offset / np.linalg.norm(n)
        return normals, offsets

    x = np.zeros(spec.model.nx)
    target = np.array([4.0, 0.5])
    F = spec.model.discrete_dynamics(spec.mpc.sample_time, spec.mpc.substeps)
    budgets = []
    for real in schedule:
        cell = rows_of(real)
        a, b = budgeted.solve(x, target, cell), single.solve(x, target, cell)
        assert a.success and b.success
        budgets.append(a.row_budget)
        assert b.row_budget == rows
        # Two solves to fatrop's tolerance (1e-5 on the KKT residual, solver_chain.
        # SOLVER_DEFAULTS): measured to agree within 1e-8 (2e-4 before the path slack was
        # counted in millimetres, mpc.PATH_SLACK_UNIT: the flat optimum along the cell's
        # edge was solved loosely).
        assert np.max(np.abs(a.first_input - b.first_input)) < 1e-4
        assert np.max(np.abs(a.predicted_states - b.predicted_states)) < 1e-4
        assert abs(a.cell_violation - b.cell_violation) < 1e-5
        x = np.array(F(x, a.first_input)).ravel()
    assert budgets == [0] * 5 + [2] * 15 + [8] * 10 + [2] * 10
    # The neighbour's row held (soft row: the slack stays at micrometres here).
    assert x[0] <= 2.0 - budgeted.cell_pad + 1e-3


def test_an_offline_robot_rents_the_full_problem_until_it_has_needed_a_budget_enough() -> None:
    """Offline (prebuild False) with rented_samples k, a robot solves with the problem built
    for all its rows, filled up with padding rows, until it has needed a smaller budget's
    problem k times; then it builds that one (mpc.RENTED_SAMPLES: rent or buy, Karlin et
    al., Algorithmica 3, 1988). The rented answers are the budgets' own (the padding rows
    cannot bind: test_padding_rows_left_out_give_the_same_closed_loop), through the same
    changes of budget as there, and the renting robot never builds a second problem."""
    spec = spec_for("differential_drive", path="full")
    terminal, _ = terminal_for_vehicle(spec)
    rows = 12

    def mpc(rented: int, shared: SharedProblems | None = None) -> TrackingMpc:
        return TrackingMpc(
            spec.model, spec.mpc, REGION.halfspaces(), terminal, cell_rows=rows,
            prebuild=False, shared=shared, rented_samples=rented,
        )

    builds = SharedProblems()
    bought, renting, after_three = mpc(0), mpc(1000, builds), mpc(3)
    ahead = [((1.0, 0.0), 2.0), ((1.0, 0.1), 2.05)]
    far = [((0.0, 1.0), 5.0), ((0.0, -1.0), 5.0), ((-1.0, 0.0), 5.0)]
    schedule = [[]] * 5 + [ahead] * 15 + [ahead + far] * 10 + [ahead[:1]] * 10
    x = np.zeros(spec.model.nx)
    target = np.array([4.0, 0.5])
    F = spec.model.discrete_dynamics(spec.mpc.sample_time, spec.mpc.substeps)
    budgets: dict[str, list[int]] = {"bought": [], "renting": [], "after_three": []}
    for real in schedule:
        normals, offsets = np.zeros((rows, 2)), np.ones(rows)
        for k, (normal, offset) in enumerate(real):
            n = np.asarray(normal, float)
            normals[k], offsets[k] = n / np.linalg.norm(n), offset / np.linalg.norm(n)
        answers = {
            name: controller.solve(x, target, (normals, offsets))
            for name, controller in
            (("bought", bought), ("renting", renting), ("after_three", after_three))
        }
        reference = answers["bought"]
        for name, answer in answers.items():
            assert answer.success, name
            budgets[name].append(answer.row_budget)
            # Both solved to fatrop's tolerance: the bound of the padding-row test.
            assert np.max(np.abs(answer.first_input - reference.first_input)) < 1e-4
            assert np.max(np.abs(answer.predicted_states - reference.predicted_states)) < 1e-4
        x = np.array(F(x, reference.first_input)).ravel()
    assert budgets["bought"] == [0] * 5 + [2] * 15 + [8] * 10 + [2] * 10
    assert budgets["renting"] == [rows] * 40 and builds.builds == 1
    assert budgets["after_three"] == (
        [rows] * 2 + [0] * 3 + [rows] * 2 + [2] * 13 + [rows] * 2 + [8] * 8 + [2] * 10
    )


def test_a_robot_with_no_row_within_reach_solves_the_problem_without_keep_apart() -> None:
    """Budget 0 (no row can bind) leaves the slacks out: with no row to relax, each slack
    appears only in its own cost term, whose minimum over sigma >= 0 is at 0 (the exact
    penalty's price is positive: Kerrigan & Maciejowski, UKACC Control 2000), so the
    problem without them has the same optimum. For the rover (terminal equality, whose
    terminal set the keep-apart MPC does not shrink) it is then the very problem of the
    MPC without keep-apart: the same variables, and on the shipped real-time path the same
    closed loop, sample for sample."""
    spec = spec_for("differential_drive")
    terminal, _ = terminal_for_vehicle(spec)
    plain = TrackingMpc(spec.model, spec.mpc, REGION.halfspaces(), terminal)
    kept_apart = TrackingMpc(
        spec.model, spec.mpc, REGION.halfspaces(), terminal, cell_rows=ROWS, prebuild=False
    )
    # Every strategy of budget 0 solves over the plain MPC's variables only.
    for strategy in kept_apart._problem(0).chain.strategies:
        assert len(strategy.kept) == len(plain._lbw) < len(kept_apart._lbw)
    # Padding rows only: what keep_apart.CellWindow gives when every row is out of reach.
    far = padded([])
    x = np.zeros(spec.model.nx)
    F = spec.model.discrete_dynamics(spec.mpc.sample_time, spec.mpc.substeps)
    for _ in range(30):
        a, b = kept_apart.solve(x, (3.0, 1.0), far), plain.solve(x, (3.0, 1.0))
        assert a.success and b.success and a.row_budget == 0
        assert a.status == b.status
        assert np.max(np.abs(a.predicted_states - b.predicted_states)) < 1e-9
        assert a.cell_violation == 0.0
        x = np.array(F(x, a.first_input)).ravel()
    assert np.hypot(x[0] - 3.0, x[1] - 1.0) < 0.5  # under way to the target


def test_the_real_time_step_holds_rows_hard_and_hands_a_violation_to_the_full_solve() -> None:
    """The real-time step solves with the predicted positions' rows hard (mpc._hard_rows),
    its problem without their slacks: with an exact penalty the soft optimum has every
    path slack at 0 wherever the rows can be held (Kerrigan & Maciejowski, UKACC Control
    2000). Where they cannot, the sample must go to the full solve with soft rows. A
    multirotor at 2.5 m/s heading at a row 0.6 m ahead cannot stop before it: braking
    distance v^2 / (2 a) (uniform deceleration, kinematics) is over 1.3 m at the 2.31 m/s^2
    it has along an axis (an octagon inscribed in its 2.5 m/s^2 disc), before drag."""
    spec = spec_for("multirotor")  # shipped default: the real-time path
    terminal, _ = terminal_for_vehicle(spec)
    plain = TrackingMpc(spec.model, spec.mpc, REGION.halfspaces(), terminal)
    mpc = TrackingMpc(spec.model, spec.mpc, REGION.halfspaces(), terminal, cell_rows=ROWS)
    real_time = mpc._problem(2).chain.strategies[0]
    assert real_time.name == "rti"
    # The plain problem's variables and the steady state's slack, no path slack.
    assert len(real_time.kept) == len(plain._lbw) + 1
    cell = padded([((1.0, 0.0), 0.6)])
    x = np.array([0.0, 0.0, 2.5, 0.0])
    target = np.array([5.0, 0.0])
    cold = mpc.solve(x, target, cell)  # no shifted plan yet: the full solve
    assert cold.success and cold.cell_violation > 0.1
    again = mpc.solve(x, target, cell)  # from the shifted plan: the real-time step first
    # The hard QP has no solution; a full solve with soft rows answers.
    assert again.success and again.status.startswith("rti: QP failed; ")
    assert again.cell_violation > 0.1
    x, positions, _, last = closed_loop(mpc, x, target, cell, samples=40)
    assert last.status == "real-time iteration accepted" and last.cell_violation == 0.0
    assert positions[-1][0] <= 0.6 - mpc.cell_pad + 1e-3


def test_a_car_pinned_between_two_held_rows_waits_instead_of_buying_slack() -> None:
    """A car-like robot at rest stands 0.05 m beyond one row and 0.14 m inside another
    (within its pad, 0.15 m), facing between them: forward breaks the second, backward
    the first. Its steady state must lie inside the first row, beyond reach without
    moving. With the path slack's exact penalty the plan holds both rows exactly and
    waits (the steady state takes the violation); a quadratic price alone (before) drove
    0.0135 m out, the multiplier over twice the price (Kerrigan & Maciejowski, "Soft
    constraints and exact penalty functions in model predictive control", UKACC Control
    2000: the soft problem's optimum is the hard one's whenever the hard one is feasible
    and the linear price exceeds the multipliers). The case is the orchard mission's
    packed start that overlapped by 7 mm (seed 24)."""
    spec = spec_for("car_like")
    terminal, _ = terminal_for_vehicle(spec)
    mpc = TrackingMpc(spec.model, spec.mpc, REGION.halfspaces(), terminal, cell_rows=ROWS)
    second = (-0.75, -0.66)
    cell = padded([((0.0, -1.0), -0.05), (second, -0.14 * np.hypot(*second))])
    x = np.array([0.0, 0.0, 2.6, 0.0])
    x, positions, plans, solution = closed_loop(mpc, x, np.array([0.75, 9.0]), cell, 10)
    normals = cell[0]
    # Zero to the solver's tolerance: an interior-point method leaves a bounded variable
    # at its bound only to O(barrier parameter), here 1e-6 mm per stage slack (1.5e-9 m
    # measured), against 0.0135 m bought with a quadratic price.
    assert solution.success and solution.cell_violation <= 1e-8
    # Held rows: n . p <= n . p0 = 0 for every predicted position; the fine plant too.
    for _, plan in plans:
        assert np.max(plan[1:] @ normals[:2].T) <= 1e-6
    assert np.max(positions @ normals[:2].T) <= 1e-6
    assert solution.steady_cell_violation >= 0.05


@pytest.mark.parametrize(
    "normal, heading, target",
    [((-0.957, 0.289), 1.3276, (9.0, 6.1)), ((0.0, 1.0), 0.2, (9.0, 0.0))],
)
def test_a_rover_beyond_its_row_never_arcs_out_between_samples(normal, heading, target) -> None:
    """A rover at rest 0.05 m beyond its row, facing slightly out across it, with its
    target inside and ahead: driving off while turning inwards ends each sample inside the
    held row, but the arc between samples starts tangent to the heading and bulges out
    (measured before: 0.8 mm and 1.25 mm at the plant's fine substeps; the first case is
    the orchard mission's packed start, seed 35, that overlapped by 0.3 mm). The first
    move may not head out across a held row, so every fine position stays inside it
    (arithmetic: along the row's normal a circular arc of less than half a turn is a
    sinusoid with at most one extremum, so it stays within its end values when it does
    not start outwards)."""
    spec = spec_for("differential_drive")
    terminal, _ = terminal_for_vehicle(spec)
    mpc = TrackingMpc(spec.model, spec.mpc, REGION.halfspaces(), terminal, cell_rows=ROWS)
    cell = padded([(normal, -0.05 * np.hypot(*normal))])
    x = np.array([0.0, 0.0, heading])
    x, positions, _, solution = closed_loop(mpc, x, np.array(target), cell, 10)
    along = cell[0][0]
    # No slack bought (a real-time step's QP leaves rounding, 1e-17).
    assert solution.success and solution.cell_violation <= 1e-12
    assert np.max(positions @ along) <= 1e-6
    assert np.linalg.norm(spec.model.position(x)) > 0.5  # it did drive off


def test_a_zero_normal_row_that_can_bind_is_kept() -> None:
    """A row 0 . p <= c with c < 0 cannot be met (an empty cell): it is not a padding row,
    so it stays. The robot stands beyond it, so its plan may only go no farther out, which
    a zero normal does not restrict (the path slack stays 0); the steady state's rows move
    out just enough for that row (read as 0 <= c - extent + s, arithmetic: s = extent - c,
    plus the room STEADY_SET_MIN_RADIUS), so its steady position lies exactly extent - c
    beyond the row as given."""
    spec = spec_for("multirotor")
    terminal, _ = terminal_for_vehicle(spec)
    mpc = TrackingMpc(spec.model, spec.mpc, REGION.halfspaces(), terminal, cell_rows=ROWS)
    normals, offsets = padded([])
    offsets[0] = -0.1
    solution = mpc.solve(np.zeros(spec.model.nx), np.array([1.0, 0.0]), (normals, offsets))
    assert solution.success and solution.row_budget == 2
    assert solution.cell_violation == pytest.approx(0.0, abs=1e-5)
    expected = mpc.terminal.position_extent + 0.1
    assert solution.steady_cell_violation == pytest.approx(expected, abs=1e-6)


def _half_plane(normal, offset, reach: float = 1e3) -> shapely.Polygon:
    """{p : normal . p <= offset} within reach of its edge (normal a unit vector)."""
    n = np.asarray(normal, float)
    on_edge, along = n * offset, np.array([-n[1], n[0]])
    return shapely.Polygon([on_edge + reach * along, on_edge - reach * along,
                            on_edge - reach * (along + 2 * n), on_edge + reach * (along - 2 * n)])


def _steady_set(mpc: TrackingMpc, normals, offsets, relaxation) -> shapely.Geometry:
    """The steady position's admissible set moved out by (cell s, region s), with shapely."""
    extent = mpc.terminal.position_extent
    admissible = shapely.box(-1e3, -1e3, 1e3, 1e3)
    for n, c in zip(normals, offsets, strict=True):
        if np.any(n):
            admissible = admissible.intersection(_half_plane(n, c - extent + relaxation[0]))
        elif c - extent + relaxation[0] < 0:
            return shapely.Polygon()
    A, b = REGION.halfspaces()
    margin = mpc.footprint_radius + extent - relaxation[1]
    for n, c in zip(A, b, strict=True):
        admissible = admissible.intersection(_half_plane(n, c - margin))
    return admissible


def _room(geometry: shapely.Geometry) -> float:
    """Radius of the largest disc inside (shapely's maximum inscribed circle; 0 if empty)."""
    if geometry.is_empty or geometry.area == 0.0:
        return 0.0
    return float(shapely.maximum_inscribed_circle(geometry, tolerance=1e-7).length)


@pytest.mark.parametrize(
    "rows",
    [
        [((0.0, 1.0), -9.55)],  # beyond a row, pinned against the region's edge
        [((1.0, 0.0), -1.0), ((-1.0, 0.0), -1.0)],  # an empty cell: x <= -1 and x >= 1
        [((1.0, 1.0), -19.0), ((1.0, -1.0), 0.1)],  # a sliver in the region's corner
        [((1.0, 0.0), 2.0), ((1.0, 1.0), 3.0)],  # room to rest: no relaxation
    ],
)
def test_steady_rows_move_out_just_enough_for_the_room(rows) -> None:
    """The steady state's rows move out by the least s that leaves a disc of radius
    STEADY_SET_MIN_RADIUS (none where one fits already), the region's by at most the
    terminal extent: checked against shapely's maximum inscribed circle of the moved-out
    set (Chebyshev centre, Boyd & Vandenberghe, "Convex Optimization", 2004, 8.5.1) and of
    the set moved out by 0.1 mm less."""
    spec = spec_for("multirotor")
    terminal, _ = terminal_for_vehicle(spec)
    mpc = TrackingMpc(spec.model, spec.mpc, REGION.halfspaces(), terminal, cell_rows=ROWS)
    normals, offsets = padded(rows)
    relaxation = mpc.steady_relaxation(normals, offsets, np.zeros(2))
    extent = mpc.terminal.position_extent
    assert relaxation[1] == pytest.approx(min(relaxation[0], extent))
    room = _room(_steady_set(mpc, normals, offsets, relaxation))
    if relaxation[0] == 0.0:
        assert room >= STEADY_SET_MIN_RADIUS
        return
    assert room == pytest.approx(STEADY_SET_MIN_RADIUS, abs=1e-6)
    less = relaxation[0] - 1e-4
    assert _room(_steady_set(mpc, normals, offsets, (less, min(less, extent)))) < (
        STEADY_SET_MIN_RADIUS - 1e-5
    )
