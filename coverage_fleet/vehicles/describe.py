"""Check a vehicle file and print what the controller will use:

    python -m coverage_fleet.vehicles.describe config/vehicles/car_like.yaml

Exit status 0 when the file loads, 2 with the list of problems otherwise (the same checks
the controller and simulator run at start-up: parameters, MPC settings, model contract,
position invariance).
"""

from __future__ import annotations

import sys

import numpy as np

from coverage_fleet.errors import ConfigError
from coverage_fleet.vehicles.loader import VehicleSpec, load_vehicle_file

EXIT_BAD_INPUT = 2


def _limits(names: tuple[str, ...], lower: np.ndarray, upper: np.ndarray) -> list[str]:
    lines = [
        f"    {name:<16} [{lo:g}, {hi:g}]"
        for name, lo, hi in zip(names, lower, upper, strict=True)
        if np.isfinite(lo) or np.isfinite(hi)
    ]
    return lines or ["    none (positions are bounded by the region)"]


def describe_spec(spec: VehicleSpec) -> str:
    model, mpc = spec.model, spec.mpc
    G, _ = model.state_polytope()
    E, _ = model.input_polytope()
    family = model.steady_states()
    lines = [
        f"{spec.source}: {spec.model_name} ({type(model).__name__})",
        f"  sha256           {spec.content_hash}",
        f"  states           {', '.join(model.state_names)}",
        f"  inputs           {', '.join(model.input_names)}",
        f"  command          {spec.command_kind}",
        f"  footprint radius {model.footprint_radius:g} m",
        "  state limits:",
        *_limits(model.state_names, *model.state_bounds()),
        "  input limits:",
        *_limits(model.input_names, *model.input_bounds()),
        f"  extra linear limits: {G.shape[0]} on the state, {E.shape[0]} on the input",
        f"  steady states    parameters ({', '.join(family.parameter_names)})",
        f"  stabilisable at rest: {'yes' if model.stabilisable_at_rest else 'no'}",
        f"  mpc              horizon {mpc.horizon} x {mpc.sample_time:g} s "
        f"({mpc.horizon * mpc.sample_time:g} s), {mpc.substeps} RK4 substeps, "
        f"terminal {mpc.terminal}",
        f"  state weights    {list(mpc.state_weights)}",
        f"  input weights    {list(mpc.input_weights)}",
    ]
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    paths = sys.argv[1:] if argv is None else argv
    if not paths:
        print("usage: python -m coverage_fleet.vehicles.describe VEHICLE_FILE...", file=sys.stderr)
        return EXIT_BAD_INPUT
    status = 0
    for path in paths:
        try:
            print(describe_spec(load_vehicle_file(path)))
        except ConfigError as error:
            print(f"{path}: bad vehicle file:", file=sys.stderr)
            for problem in error.problems:
                print(f"  {problem}", file=sys.stderr)
            status = EXIT_BAD_INPUT
    return status


if __name__ == "__main__":
    sys.exit(main())
