"""Solve time of the tracking MPC against the same problem written the plain way.

For every vehicle file in config/vehicles/ (horizon 20): one closed loop of STEPS samples
from an invented start towards an invented target in an invented orchard block. At every
sample the same state is given to
  - ours: coverage_fleet.control.mpc.TrackingMpc (its configured solver, warm-started), and
  - baseline: casadi Opti, multiple shooting, IPOPT with default options, warm-started from
    its previous solution (only printing switched off),
and the plant is moved with our input. Printed per model: median and 95th-percentile solve
time of both, their ratio, the largest difference between the two first inputs, and
whether our 95th percentile is below the sample time. Timing is wall-clock around the
solver call; the machine is shared, so both run interleaved under the same load.

    .venv/bin/python benchmarks/mpc_benchmark.py [--steps 200] [vehicle files...]
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
from coverage_fleet.geometry.region import ConvexRegion
from coverage_fleet.vehicles.loader import VehicleSpec, load_vehicle_file

REPO = Path(__file__).resolve().parents[1]
#: Invented orchard block (metres, map frame), counter-clockwise.
REGION = np.array([(0.0, 0.0), (40.0, 0.0), (46.0, 22.0), (20.0, 34.0), (-4.0, 18.0)])
START = (4.0, 4.0)
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


def run(path: Path, steps: int, solver: dict | None) -> dict[str, float | str | int]:
    spec = load_vehicle_file(path)
    if solver is not None:
        spec = dataclasses.replace(spec, mpc=dataclasses.replace(spec.mpc, solver=solver))
    compiled_settings = dataclasses.replace(spec.mpc, solver={**spec.mpc.solver, "compile": True})
    terminal = compute_terminal_ingredients(spec.model, spec.mpc, spec.cache_key)
    region = ConvexRegion.from_vertices(REGION, source="benchmark").halfspaces()
    plain = TrackingMpc(spec.model, spec.mpc, region, terminal)
    compiled = TrackingMpc(spec.model, compiled_settings, region, terminal)
    baseline = OptiBaseline(spec, plain)
    F = spec.model.discrete_dynamics(spec.mpc.sample_time, spec.mpc.substeps)
    x = np.zeros(spec.model.nx)
    x[list(spec.model.position_indices)] = START
    times: dict[str, list[float]] = {"plain": [], "compiled": [], "opti": []}
    diffs = []
    failures = {"plain": 0, "compiled": 0, "opti": 0}
    for k in range(steps):
        target = np.array(TARGETS[min(k * len(TARGETS) // steps, len(TARGETS) - 1)])
        ours_plain = plain.solve(x, target)
        ours = compiled.solve(x, target)
        u_base, t_base, ok_base = baseline.solve(x, target)
        if k > 0:  # the first (cold) solve is not a warm-started sample
            times["plain"].append(ours_plain.solve_time)
            times["compiled"].append(ours.solve_time)
            times["opti"].append(t_base)
        failures["plain"] += not ours_plain.success
        failures["compiled"] += not ours.success
        failures["opti"] += not ok_base
        if ours.success and ok_base:
            diffs.append(float(np.abs(ours.first_input - u_base).max()))
        x = np.array(F(x, ours.first_input)).reshape(-1)
    stats = {name: np.percentile(values, [50, 95]) * 1e3 for name, values in times.items()}
    return {
        "model": spec.model.kind,
        "solver": plain.plugin,
        "stats": stats,
        "ratio": stats["opti"][0] / stats["compiled"][0],
        "max_input_diff": max(diffs) if diffs else float("nan"),
        "sample_ms": 1e3 * spec.mpc.sample_time,
        "failures": f"{failures['compiled']}/{failures['plain']}/{failures['opti']}",
    }


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
    args = parser.parse_args(argv)
    files = args.files or sorted((REPO / "config" / "vehicles").glob("*.yaml"))
    header = (
        f"{'model':<20}{'solver':<8}{'ours':>15}{'ours, no cc':>15}{'Opti+IPOPT':>15}"
        f"{'ratio':>7}{'max |du|':>10}{'dt':>6}{'p95<dt':>7}{'fails':>8}"
    )
    print(f"tracking MPC, horizon 20, {args.steps} closed-loop samples;")
    print("times in ms as median / 95th percentile; ours = problem functions compiled (cc);")
    print("ratio = Opti median / ours median; max |du| = largest first-input difference to")
    print("Opti; fails = unsuccessful samples ours / ours without cc / Opti")
    print(header)
    print("-" * len(header))
    for path in files:
        r = run(path, args.steps, args.solver)
        st = r["stats"]
        below = "yes" if st["compiled"][1] < r["sample_ms"] else "NO"
        cells = "".join(f"{st[n][0]:>8.2f}/{st[n][1]:<6.2f}" for n in ("compiled", "plain", "opti"))
        print(
            f"{r['model']:<20}{r['solver']:<8}{cells}{r['ratio']:>6.1f}x"
            f"{r['max_input_diff']:>10.1e}{r['sample_ms']:>6.0f}{below:>7}{r['failures']:>8}",
            flush=True,
        )
    return 0


if __name__ == "__main__":
    sys.exit(main())
