"""`coverage-fleet terminal <vehicle-file>`: the MPC's terminal ingredients for a vehicle.

Computes (or reads from the cache, keyed by the file's content) the terminal cost and set
the tracking MPC uses, and prints a short report: P, K, alpha, the decrease margin and which
limit decides the set. For models not stabilisable at rest it says so and that the terminal
equality is used.
"""

from __future__ import annotations

import argparse

import numpy as np

from coverage_fleet.control.ingredients import TerminalIngredients
from coverage_fleet.control.terminal import cache_path, terminal_for_vehicle
from coverage_fleet.vehicles.loader import load_vehicle_file


def register(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser(
        "terminal",
        help="compute and show the MPC terminal ingredients of a vehicle file",
        description=__doc__.splitlines()[0],
    )
    parser.add_argument("vehicle_file", help="vehicle parameter file (ROS 2 parameter layout)")
    parser.add_argument(
        "--recompute", action="store_true", help="ignore the cache and compute again"
    )
    parser.set_defaults(handler=run)


def _matrix(name: str, m: np.ndarray) -> list[str]:
    rows = np.array2string(np.asarray(m), precision=4, suppress_small=True, max_line_width=96)
    return [f"  {name} ="] + [f"    {line}" for line in rows.splitlines()]


def report(ingredients: TerminalIngredients, model_kind: str) -> str:
    lines = [f"model: {model_kind}", f"terminal: {ingredients.kind}"]
    if ingredients.kind == "equality":
        lines.append(f"  {ingredients.reason}")
        lines.append("  the MPC ends every prediction at rest on its steady state: x_N = x_s")
        return "\n".join(lines)
    assert ingredients.P is not None and ingredients.K is not None
    lines += _matrix("P (terminal weight, steady-frame error)", ingredients.P)
    lines += _matrix("K (local law u = u_s + K e)", ingredients.K)
    lines.append(f"  alpha = {ingredients.alpha:.6g}   (set: e' P e <= alpha)")
    lines.append(f"  active limit: {ingredients.active_limit}")
    lines.append(
        f"  decrease margin: {ingredients.decrease_margin:.3e} "
        "(largest [V_f(next) - V_f + l] / V_f in the set; <= 0 verified)"
    )
    lines.append(
        f"  position extent: {ingredients.position_extent:.3f} m "
        "(steady positions keep this much further inside the region)"
    )
    closest = sorted(ingredients.limit_levels.items(), key=lambda item: item[1])[:4]
    lines.append("  tightest levels: " + ", ".join(f"{k} {v:.4g}" for k, v in closest))
    return "\n".join(lines)


def run(args: argparse.Namespace) -> int:
    spec = load_vehicle_file(args.vehicle_file)
    ingredients, cached = terminal_for_vehicle(spec, use_cache=not args.recompute)
    print(f"coverage-fleet terminal: {spec.source}")
    print(report(ingredients, spec.model.kind))
    where = cache_path(spec.cache_key)
    print(f"({'read from the cache' if cached else 'computed'}; cache file {where})")
    return 0
