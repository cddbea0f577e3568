"""Solve time of the tracking MPC against the same problem written the plain way.

For every vehicle file in config/vehicles/ (horizon 20): two closed loops of STEPS samples
from an invented start through invented targets in an invented orchard block:
  - fast: coverage_fleet.control.mpc.TrackingMpc on the real-time path (`path: real_time`,
    problem functions compiled), its own plant; the same path without a C compiler
    (`compile: false`) is given the same states;
  - full: the full solve every sample (`path: full`, compiled), its own plant; the plain
    baseline, casadi Opti, multiple shooting, IPOPT with default options, warm-started from
    its previous solution (only printing switched off), is given the same states.
Printed per model: median / 95th-percentile solve time of each, the ratios of Opti's median
to the fast path's (compiled and not), the fast path's share of samples answered by the
real-time iteration, the closed-loop cost of the fast loop over the full loop's (position
error to the target and input effort, summed over the loop: issue 13 asks for <= 1.01),
and whether the fast path's 95th percentile is below 20 % of the sample time.

With --keep-apart: the cost of the buffered-cell rows (issue 12 allows 30 % more median
solve time). For every vehicle file and two solver paths (`full`, and the shipped default
`real_time`, not compiled, as shipped), the same MPC without rows and with the fleet's row
count (6 neighbours x 2 snapshots = 12 rows) is given the same states of one closed loop
(the loop with rows drives the plant) past eight invented neighbours standing in the block;
the rows come from control/keep_apart.CellWindow with a snapshot every sample. Printed: median /
95th percentile without and with rows, their ratio, the largest row slack used, and the
median / largest number of real rows per solve (CellRows.used: rows within the robot's reach;
the rest of the 12 are padding rows, which the MPC leaves out by solving the problem built
for the smallest row budget that holds the real ones, control/mpc.CELL_ROW_BUDGETS), the
median solver iterations without / with rows, and the samples the first strategy did not
answer alone (a rescue, or a plugin held off after a failure, answered them).

Timing: CPU time of this process around each solver call (time.process_time). The machine
is shared (2 cores, load often far above 2), and wall-clock time then measures the other
processes' share as much as ours (casadi's own t_wall / t_proc differed 10x in a loaded
run); the controllers take turns in the same run, so the ratios compare like with like.
Print `uptime` with the figures. They take turns in blocks of BLOCK samples (each runs or is
given BLOCK samples, then the next), not sample by sample: a controller process runs one
MPC, whose code and data stay in the processor's caches from one sample to the next, and
running four controllers at every sample evicted them. Measured on the rover's real-time
path, median 0.85 ms taking turns at every sample against 0.55 ms for its loop alone; the
first sample of each block still starts with cold caches. (Measured by the same turns, the
keep-apart comparisons below alternate their two MPCs at every sample: both pay alike.)

    .venv/bin/python benchmarks/mpc_benchmark.py [--steps 200] [--keep-apart] [vehicle files...]
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import sys
import time
from pathlib import Path

import casadi as ca
import numpy as np

from coverage_fleet.control.frames import heading_index, steady_frame_error
from coverage_fleet.control.limits import input_limits, state_limits, steady_limits
from coverage_fleet.control.mpc import TrackingMpc
from coverage_fleet.control.stage_cost import stage_weights
from coverage_fleet.control.terminal import compute_terminal_ingredients
from coverage_fleet.fleet.mission import Mission
from coverage_fleet.gc_freeze import freeze_after_setup
from coverage_fleet.geometry.region import ConvexRegion
from coverage_fleet.vehicles.loader import VehicleSpec, load_vehicle_file

REPO = Path(__file__).resolve().parents[1]
#: Invented orchard block (metres, map frame), counter-clockwise.
REGION = np.array([(0.0, 0.0), (40.0, 0.0), (46.0, 22.0), (20.0, 34.0), (-4.0, 18.0)])
START = (4.0, 4.0)
#: Samples each controller runs (or is given) before the next takes its turn (docstring).
BLOCK = 10
#: Targets visited in turn (a new one every STEPS/4 samples), like gate openings.
TARGETS = [(30.0, 20.0), (12.0, 22.0), (36.0, 8.0), (20.0, 12.0)]


class OptiBaseline:
    """The same optimal control problem, written directly with casadi Opti."""

    def __init__(self, spec: VehicleSpec, mpc: TrackingMpc) -> None:
        model, settings = spec.model, spec.mpc
        N, nx, nu = settings.horizon, model.nx, model.nu
        F = model.discrete_dynamics(settings.sample_time, settings.substeps)
        family = model.steady_states()
        opti = ca.Opti()
        X = opti.variable(nx, N + 1)
        U = opti.variable(nu, N)
        theta = opti.variable(len(family.parameter_names))
        self.x0 = opti.parameter(nx)
        self.target = opti.parameter(2)
        x_s = ca.DM(family.Mx) @ theta + ca.DM(family.x0)
        u_s = ca.DM(family.Mu) @ theta + ca.DM(family.u0)
        i, j = model.position_indices
        Q, R = (ca.DM(m) for m in stage_weights(model, settings))
        x_lo, x_hi = model.state_bounds()
        u_lo, u_hi = model.input_bounds()
        G, g = model.state_polytope()
        E, e = model.input_polytope()
        A = ca.DM(mpc.region_A)
        J = 0
        opti.subject_to(X[:, 0] == self.x0)
        for k in range(N):
            J += ca.bilin(Q, X[:, k] - x_s, X[:, k] - x_s) + ca.bilin(
                R, U[:, k] - u_s, U[:, k] - u_s
            )
            opti.subject_to(X[:, k + 1] == F(X[:, k], U[:, k]))
            opti.subject_to(opti.bounded(u_lo, U[:, k], u_hi))
            if len(e):
                opti.subject_to(ca.DM(E) @ U[:, k] <= e)
        for k in range(1, N + 1):
            for n in range(nx):
                if np.isfinite(x_hi[n]):
                    opti.subject_to(X[n, k] <= x_hi[n])
                if np.isfinite(x_lo[n]):
                    opti.subject_to(X[n, k] >= x_lo[n])
            if len(g):
                opti.subject_to(ca.DM(G) @ X[:, k] <= g)
            opti.subject_to(A @ ca.vertcat(X[i, k], X[j, k]) <= mpc.path_region_b)
        margin = settings.steady_state_margin
        for limits, M, v0, v_s in (
            (state_limits(model), family.Mx, family.x0, x_s),
            (input_limits(model), family.Mu, family.u0, u_s),
        ):
            steady = steady_limits(limits, np.asarray(M), np.asarray(v0), margin)
            if len(steady.g_dep):
                opti.subject_to(ca.DM(steady.G_dep) @ v_s <= steady.g_dep)
        p_s = ca.vertcat(x_s[i], x_s[j])
        opti.subject_to(A @ p_s <= mpc.steady_region_b)
        terminal = mpc.terminal
        if terminal.kind == "equality":
            opti.subject_to(X[:, N] == x_s)
        else:
            err = steady_frame_error(X[:, N], x_s, model.position_indices, heading_index(model))
            P = ca.DM(terminal.P)
            J += ca.bilin(P, err, err)
            opti.subject_to(ca.bilin(P, err, err) <= terminal.alpha)
        J += settings.offset_weight * ca.sumsqr(p_s - self.target)
        opti.minimize(J)
        opti.solver("ipopt", {"print_time": False}, {"print_level": 0, "sb": "yes"})
        self.opti, self.X, self.U, self.theta = opti, X, U, theta
        self.family = family
        self.warm = False

    def solve(self, x: np.ndarray, target: np.ndarray) -> tuple[np.ndarray, float, bool]:
        opti = self.opti
        opti.set_value(self.x0, x)
        opti.set_value(self.target, target)
        if not self.warm:
            opti.set_initial(self.X, np.tile(x, (self.X.shape[1], 1)).T)
            theta, *_ = np.linalg.lstsq(self.family.Mx, x - self.family.x0, rcond=None)
            opti.set_initial(self.theta, theta)
        started = time.perf_counter()
        try:
            solution = opti.solve()
            ok = True
        except RuntimeError:
            solution = opti.debug
            ok = False
        elapsed = time.perf_counter() - started
        u = np.array(solution.value(self.U[:, 0])).reshape(-1)
        # Warm start: the previous solution (primal and dual), as Opti users do.
        opti.set_initial(solution.value_variables())
        opti.set_initial(opti.lam_g, solution.value(opti.lam_g))
        self.warm = True
        return u, elapsed, ok


def _timed(solve, *args):
    started = time.process_time()
    result = solve(*args)
    return result, time.process_time() - started


def _with_solver(spec: VehicleSpec, **solver) -> VehicleSpec:
    merged = {**spec.mpc.solver, **solver}
    return dataclasses.replace(spec, mpc=dataclasses.replace(spec.mpc, solver=merged))


def run(path: Path, steps: int, solver: dict | None) -> dict[str, float | str | int]:
    spec = load_vehicle_file(path)
    if solver is not None:
        spec = _with_solver(spec, **solver)
    terminal = compute_terminal_ingredients(spec.model, spec.mpc, spec.cache_key)
    region = ConvexRegion.from_vertices(REGION, source="benchmark").halfspaces()
    mpcs = {
        name: TrackingMpc(spec.model, _with_solver(spec, **settings).mpc, region, terminal)
        for name, settings in (
            ("fast", {"path": "real_time", "compile": True}),
            ("fast_plain", {"path": "real_time", "compile": False}),
            ("full", {"path": "full", "compile": True}),
        )
    }
    baseline = OptiBaseline(spec, mpcs["full"])
    freeze_after_setup()  # as a controller node does after its set-up (gc_freeze.py)
    model, settings = spec.model, spec.mpc
    F = model.discrete_dynamics(settings.sample_time, settings.substeps)
    Q, R = stage_weights(model, settings)
    i, j = model.position_indices
    start = np.zeros(model.nx)
    start[[i, j]] = START
    plants = {"fast": start.copy(), "full": start.copy()}
    costs = {"fast": 0.0, "full": 0.0}
    times: dict[str, list[float]] = {name: [] for name in ("fast", "fast_plain", "full", "opti")}
    failures = dict.fromkeys(times, 0)
    accepted = 0

    def target_at(k: int) -> np.ndarray:
        return np.array(TARGETS[min(k * len(TARGETS) // steps, len(TARGETS) - 1)])

    def closed_loop(name: str, samples: range) -> list[np.ndarray]:
        """`name`'s own loop over `samples`: the states it was given, in order."""
        nonlocal accepted
        states = []
        for k in samples:
            x, target = plants[name], target_at(k)
            states.append(x)
            answer, elapsed = _timed(mpcs[name].solve, x, target)
            failures[name] += not answer.success
            if k > 0:  # the first (cold) solve is not a warm-started sample
                times[name].append(elapsed)
            if name == "fast":
                accepted += answer.status.startswith("real-time iteration accepted")
            u = answer.first_input
            error = model.position(x) - target
            costs[name] += Q[i, i] * error[0] ** 2 + Q[j, j] * error[1] ** 2 + u @ R @ u
            plants[name] = np.array(F(x, u)).reshape(-1)
        return states

    def given(name: str, samples: range, states: list[np.ndarray]) -> None:
        """`name` given another loop's states over `samples`."""
        for k, x in zip(samples, states, strict=True):
            if name == "opti":
                (_, _, ok), elapsed = _timed(baseline.solve, x, target_at(k))
            else:
                answer, elapsed = _timed(mpcs[name].solve, x, target_at(k))
                ok = answer.success
            failures[name] += not ok
            if k > 0:
                times[name].append(elapsed)

    for first in range(0, steps, BLOCK):
        samples = range(first, min(first + BLOCK, steps))
        fast_states = closed_loop("fast", samples)
        given("fast_plain", samples, fast_states)
        given("opti", samples, closed_loop("full", samples))
    stats = {name: np.percentile(values, [50, 95]) * 1e3 for name, values in times.items()}
    return {
        "model": model.kind,
        "stats": stats,
        "ratio": stats["opti"][0] / stats["fast"][0],
        "ratio_plain": stats["opti"][0] / stats["fast_plain"][0],
        "accepted": accepted / steps,
        "cost_ratio": costs["fast"] / costs["full"],
        "sample_ms": 1e3 * settings.sample_time,
        "failures": "/".join(str(failures[n]) for n in ("fast", "fast_plain", "full", "opti")),
    }


#: Invented neighbours standing in the block (metres), near the route between the targets.
NEIGHBOURS = [(10.0, 8.0), (18.0, 14.0), (26.0, 18.0), (24.0, 22.0), (16.0, 20.0),
              (30.0, 12.0), (28.0, 6.0), (20.0, 9.0)]
NEIGHBOUR_RADIUS = 0.4
CELL_ROWS = 12


def run_cells(path: Path, steps: int, solver: dict, repeat: int = 1) -> dict[str, object]:
    """Median / p95 CPU ms without and with keep-apart rows on the same states; with
    repeat > 1 the same loop runs that many times with fresh MPCs (it is deterministic:
    same states, same warm starts) and each sample keeps its least time."""
    from coverage_fleet.control.keep_apart import CellWindow, KeepApartSettings, horizon_reach
    from coverage_fleet.geometry.buffered_cells import FleetSnapshot

    spec = _with_solver(load_vehicle_file(path), **solver)
    terminal = compute_terminal_ingredients(spec.model, spec.mpc, spec.cache_key)
    region = ConvexRegion.from_vertices(REGION, source="benchmark").halfspaces()
    model, settings = spec.model, spec.mpc
    F = model.discrete_dynamics(settings.sample_time, settings.substeps)
    i, j = model.position_indices
    passes = []
    for _ in range(repeat):
        plain = TrackingMpc(model, settings, region, terminal)
        with_rows = TrackingMpc(model, settings, region, terminal, cell_rows=CELL_ROWS)
        window = CellWindow(
            "robot", KeepApartSettings(), window=2 * settings.sample_time, rows=CELL_ROWS,
            reach=horizon_reach(model.max_planar_speed, settings.sample_time, settings.horizon),
        )
        freeze_after_setup()
        x = np.zeros(model.nx)
        x[[i, j]] = START
        times: dict[str, list[float]] = {"plain": [], "rows": []}
        iterations: dict[str, list[int]] = {"plain": [], "rows": []}
        #: Samples the configured solver did not answer alone (a rescue or a held-off
        #: plugin).
        handed_over = {"plain": 0, "rows": 0}
        used: list[int] = []
        largest_slack = 0.0
        for k in range(steps):
            target = np.array(TARGETS[min(k * len(TARGETS) // steps, len(TARGETS) - 1)])
            t = k * settings.sample_time
            n = len(NEIGHBOURS) + 1
            window.add(FleetSnapshot(
                time=t, names=("robot", *(f"n{m}" for m in range(n - 1))),
                positions=np.vstack([model.position(x), NEIGHBOURS]), ages=np.zeros(n),
                radii=np.r_[model.footprint_radius, np.full(n - 1, NEIGHBOUR_RADIUS)],
                speed_limits=np.zeros(n),
            ))
            rows = window.rows_at(t, model.position(x))
            plain_answer, elapsed_plain = _timed(plain.solve, x, target)
            answer, elapsed_rows = _timed(
                with_rows.solve, x, target, (rows.normals, rows.offsets)
            )
            largest_slack = max(largest_slack, answer.cell_violation)
            if k > 0:
                times["plain"].append(elapsed_plain)
                times["rows"].append(elapsed_rows)
                used.append(rows.used)
                for name, solution in (("plain", plain_answer), ("rows", answer)):
                    iterations[name].append(solution.iterations)
                    handed_over[name] += ";" in solution.status or ":" in solution.status
            x = np.array(F(x, answer.first_input)).reshape(-1)
        passes.append(times)
    least = {name: np.min([p[name] for p in passes], axis=0) for name in ("plain", "rows")}
    stats = {name: np.percentile(v, [50, 95]) * 1e3 for name, v in least.items()}
    return {"model": model.kind, "stats": stats,
            "ratio": stats["rows"][0] / stats["plain"][0], "slack": largest_slack,
            "used": (float(np.median(used)), max(used)),
            "iterations": {n: float(np.median(v)) for n, v in iterations.items()},
            "handed_over": handed_over}


def record_fleet_solves(
    mission_path: Path, packed_gap: float | None, seed: int, duration: float | None
) -> tuple[Mission, dict[int, tuple[TrackingMpc, list[tuple]]]]:
    """Every solve of the fleet's MPCs in one offline run of the mission (keep-apart on, as
    shipped; one process): (state, target, cell rows) in order, by MPC. Start poses: the
    roster's own, or packed with `packed_gap` metres (fleet.batch.start_poses, `seed`).
    The run ends when the fleet is settled (or at `duration`, default the mission's)."""
    from coverage_fleet.fleet.batch import start_poses
    from coverage_fleet.fleet.mission import load_mission
    from coverage_fleet.fleet.simulation import simulate_mission

    mission = load_mission(mission_path)
    if not mission.keep_apart.enabled:
        raise SystemExit(f"{mission_path}: keep_apart is off in this mission; nothing to time")
    poses = None if packed_gap is None else start_poses(mission, seed, packed_gap)
    recorded: dict[int, tuple[TrackingMpc, list[tuple]]] = {}
    solve = TrackingMpc.solve

    def recording(mpc: TrackingMpc, x0, target_xy, cell=None):
        copies = (np.array(x0, float), np.array(target_xy, float),
                  None if cell is None else (np.array(cell[0]), np.array(cell[1])))
        recorded.setdefault(id(mpc), (mpc, []))[1].append(copies)
        return solve(mpc, x0, target_xy, cell)

    # Instrumentation of this run only: the solves themselves are the shipped ones.
    TrackingMpc.solve = recording
    try:
        simulate_mission(mission, seed=seed, duration=duration, initial_poses=poses)
    finally:
        TrackingMpc.solve = solve
    return mission, recorded


def run_fleet_cells(
    mission: Mission, recorded: dict[int, tuple[TrackingMpc, list[tuple]]], solver: dict,
    repeat: int = 1,
) -> dict[str, dict[str, list]]:
    """Per vehicle model: CPU times of fresh MPCs without and with the fleet's rows, given
    the recorded sequence of each robot's solves (states, targets, rows); each sample's
    least time of `repeat` passes (each pass is deterministic, see run_cells)."""
    from coverage_fleet.control.terminal import terminal_for_vehicle

    by_model = {id(e.vehicle.model): e for e in mission.roster}
    results: dict[str, dict[str, list]] = {}
    for fleet_mpc, solves in recorded.values():
        entry = by_model[id(fleet_mpc.model)]
        spec = _with_solver(entry.vehicle, **solver)
        terminal, _ = terminal_for_vehicle(spec)
        region = (fleet_mpc.region_A, fleet_mpc.region_b)
        bucket = results.setdefault(spec.model.kind, {
            "plain": [], "rows": [], "iters_plain": [], "iters_rows": [], "used": [],
            "handed_plain": [], "handed_rows": [], "slack": [], "robots": [],
        })
        bucket["robots"].append(1)
        least: dict[str, np.ndarray] = {}
        for pass_index in range(repeat):
            plain = TrackingMpc(spec.model, spec.mpc, region, terminal)
            with_rows = TrackingMpc(spec.model, spec.mpc, region, terminal,
                                    cell_rows=fleet_mpc.cell_rows)
            freeze_after_setup()
            elapsed: dict[str, list[float]] = {"plain": [], "rows": []}
            for k, (x, target, cell) in enumerate(solves):
                if cell is None:
                    continue  # a robot without its cell brakes: no solve in either
                plain_answer, elapsed_plain = _timed(plain.solve, x, target)
                answer, elapsed_rows = _timed(with_rows.solve, x, target, cell)
                if k == 0:
                    continue  # the cold first solve is not a warm-started sample
                elapsed["plain"].append(elapsed_plain)
                elapsed["rows"].append(elapsed_rows)
                if pass_index:
                    continue
                bucket["used"].append(int(np.count_nonzero(np.any(cell[0] != 0.0, axis=1))))
                bucket["slack"].append(answer.cell_violation)
                for name, solution in (("plain", plain_answer), ("rows", answer)):
                    bucket[f"iters_{name}"].append(solution.iterations)
                    bucket[f"handed_{name}"].append(
                        ";" in solution.status or ":" in solution.status
                    )
            for name, values in elapsed.items():
                least[name] = np.minimum(least.get(name, np.inf), np.array(values))
        for name in ("plain", "rows"):
            bucket[name].extend(least[name].tolist())
    return results


def main_fleet_cells(mission_path: Path, packed_gap: float | None, seed: int,
                     duration: float | None, repeat: int) -> int:
    started = time.perf_counter()
    mission, recorded = record_fleet_solves(mission_path, packed_gap, seed, duration)
    solves = sum(len(v) for _, v in recorded.values())
    start = "the roster's poses" if packed_gap is None else f"packed, gap {packed_gap:g} m"
    print(f"keep-apart rows in the fleet's own loop: {mission_path.name} ({start}, seed "
          f"{seed}), {solves} solves of {len(recorded)} robots recorded in "
          f"{time.perf_counter() - started:.0f} s; each robot's solves given again, in order, "
          f"to fresh MPCs without and with rows (each sample's least time of {repeat} passes);"
          " CPU ms median/95th percentile; ratio = "
          "medians (issue 12: at most 1.30); rows used = real rows per solve, median/largest;"
          " iters = median iterations without/with rows; handed = samples a rescue answered")
    header = (
        f"{'model':<20}{'path':<11}{'robots':>7}{'samples':>8}{'no rows':>15}{'rows':>15}"
        f"{'ratio':>8}{'slack':>10}{'rows used':>11}{'iters':>9}{'handed':>10}"
    )
    print(header)
    print("-" * len(header))
    for solver in ({"path": "full"}, {"path": "real_time"}):
        for model, r in sorted(run_fleet_cells(mission, recorded, solver, repeat).items()):
            plain = np.percentile(r["plain"], [50, 95]) * 1e3
            rows = np.percentile(r["rows"], [50, 95]) * 1e3
            print(
                f"{model:<20}{solver['path']:<11}{len(r['robots']):>7}{len(r['plain']):>8}"
                f"{plain[0]:>8.2f}/{plain[1]:<6.2f}{rows[0]:>8.2f}/{rows[1]:<6.2f}"
                f"{rows[0] / plain[0]:>7.2f}x{max(r['slack']):>10.1e}"
                f"{np.median(r['used']):>8g}/{max(r['used']):<2d}"
                f"{np.median(r['iters_plain']):>5g}/{np.median(r['iters_rows']):<3g}"
                f"{sum(r['handed_plain']):>5d}/{sum(r['handed_rows']):<4d}",
                flush=True,
            )
    return 0


def main_cells(files: list[Path], steps: int, repeat: int) -> int:
    print(f"keep-apart rows: {CELL_ROWS} rows, {steps} closed-loop samples (each sample's least"
          f" time of {repeat} runs of the loop); CPU ms per solve as")
    print("median/95th percentile without and with rows on the same states; ratio = medians")
    print("(issue 12: at most 1.30); slack = largest keep-apart slack used (m); rows used =")
    print("real rows per solve (within reach; the rest are padding), median/largest;")
    print("iters = median solver iterations without/with rows; handed = samples the first")
    print("strategy did not answer alone (a rescue answered), without/with rows")
    header = (
        f"{'model':<20}{'path':<11}{'no rows':>15}{'12 rows':>15}{'ratio':>8}{'slack':>10}"
        f"{'rows used':>11}{'iters':>9}{'handed':>9}"
    )
    print(header)
    print("-" * len(header))
    for solver in ({"path": "full"}, {"path": "real_time"}):
        for path in files:
            r = run_cells(path, steps, solver, repeat)
            st = r["stats"]
            print(
                f"{r['model']:<20}{solver['path']:<11}"
                f"{st['plain'][0]:>8.2f}/{st['plain'][1]:<6.2f}"
                f"{st['rows'][0]:>8.2f}/{st['rows'][1]:<6.2f}{r['ratio']:>7.2f}x"
                f"{r['slack']:>10.1e}{r['used'][0]:>8g}/{r['used'][1]:<2d}"
                f"{r['iterations']['plain']:>5g}/{r['iterations']['rows']:<3g}"
                f"{r['handed_over']['plain']:>5d}/{r['handed_over']['rows']:<3d}",
                flush=True,
            )
    return 0


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("files", nargs="*", type=Path)
    parser.add_argument("--steps", type=int, default=200)
    parser.add_argument(
        "--solver",
        type=json.loads,
        default=None,
        help='override mpc.solver, e.g. \'{"plugin": "ipopt"}\'',
    )
    parser.add_argument(
        "--keep-apart", action="store_true",
        help="time the MPC without and with keep-apart rows instead",
    )
    parser.add_argument(
        "--fleet", type=Path, default=None, metavar="MISSION",
        help="with --keep-apart: time the rows on the solves of this mission's own fleet run",
    )
    parser.add_argument("--packed-gap", type=float, default=None,
                        help="with --fleet: start packed with this gap (metres)")
    parser.add_argument("--seed", type=int, default=1, help="with --fleet: the run's seed")
    parser.add_argument(
        "--repeat", type=int, default=1,
        help="with --keep-apart: run each (deterministic) loop this many times and keep each "
        "sample's least time (filters out the other processes' bursts on a shared machine)",
    )
    parser.add_argument("--duration", type=float, default=None,
                        help="with --fleet: simulated seconds at most (default: the mission's)")
    args = parser.parse_args(argv)
    files = args.files or sorted((REPO / "config" / "vehicles").glob("*.yaml"))
    if args.keep_apart and args.fleet is not None:
        return main_fleet_cells(args.fleet, args.packed_gap, args.seed, args.duration,
                                args.repeat)
    if args.keep_apart:
        return main_cells(files, args.steps, args.repeat)
    header = (
        f"{'model':<20}{'fast':>15}{'fast, no cc':>15}{'full':>15}{'Opti+IPOPT':>15}"
        f"{'ratio':>7}{'no cc':>7}{'RTI':>6}{'cost':>8}{'dt':>5}{'p95<dt/5':>9}{'fails':>10}"
    )
    print(f"tracking MPC, horizon 20, {args.steps} closed-loop samples; CPU ms per solve as")
    print("median/95th percentile; fast = real-time path, full = full solve (both compiled);")
    print("ratio = Opti median / fast median (no cc: / fast without compiler); RTI = share of")
    print("samples the real-time iteration answered; cost = closed-loop cost fast / full;")
    print("fails = unsuccessful samples fast / fast no cc / full / Opti")
    print(header)
    print("-" * len(header))
    for path in files:
        r = run(path, args.steps, args.solver)
        st = r["stats"]
        below = "yes" if st["fast"][1] < 0.2 * r["sample_ms"] else "NO"
        names = ("fast", "fast_plain", "full", "opti")
        cells = "".join(f"{st[n][0]:>8.2f}/{st[n][1]:<6.2f}" for n in names)
        print(
            f"{r['model']:<20}{cells}{r['ratio']:>6.1f}x{r['ratio_plain']:>6.1f}x"
            f"{r['accepted']:>6.0%}{r['cost_ratio']:>8.4f}{r['sample_ms']:>5.0f}{below:>9}"
            f"{r['failures']:>10}",
            flush=True,
        )
    return 0


if __name__ == "__main__":
    sys.exit(main())
