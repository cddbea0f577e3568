"""MPC settings read from the `mpc` section of a vehicle parameter file.

The vehicle-file loader checks every field (vehicles/loader.py, _read_mpc: kinds, ranges,
the bounds below, the solver vocabulary, the rules that depend on the model), so the control
layer can take an MpcSettings from a VehicleSpec as valid. Adding a field: add it here with a
default and read it in _read_mpc; the loader rejects unknown keys.

Upper bounds (values beyond them hang or overflow the solver, and no robot needs them):
- horizon <= 500 steps: tracking MPC on mobile robots uses tens of steps (common practice);
- substeps <= 100 RK4 steps per sample; sample_time in [0.001, 10] s (1 kHz to 0.1 Hz);
- weights <= 1e6 (costs are compared with O(1) stage costs; larger only scales badly);
- solver.max_iter <= 10000.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Literal

TerminalKind = Literal["equality", "ellipsoid"]
TERMINAL_KINDS: tuple[str, ...] = ("equality", "ellipsoid")

HORIZON_MAX = 500
SUBSTEPS_MAX = 100
SAMPLE_TIME_MIN = 0.001
SAMPLE_TIME_MAX = 10.0
WEIGHT_MAX = 1e6
MAX_ITER_MAX = 10_000

#: The `mpc.solver` vocabulary (control/mpc.py holds each plugin's casadi options and must
#: offer exactly these plugins; test_vehicles_loader checks that they agree).
SOLVER_PLUGINS: tuple[str, ...] = ("fatrop", "ipopt")
SOLVER_KEYS: tuple[str, ...] = ("plugin", "max_iter", "options", "compile", "path", "qp")
#: `mpc.solver.path`: `real_time` (the default: one to three SQP steps per sample from the
#: shifted plan, control/rti.py; a sample whose iterate fails the acceptance test is solved
#: in full) or `full` (the full solve by `plugin` every sample). With `real_time` the
#: orchard demo mission never settled (its car-like robots rocked at rest) until the cold
#: start and the stall restarts were solved to convergence (control/solver_chain.py's
#: module docstring).
SOLVER_PATHS: tuple[str, ...] = ("real_time", "full")
#: `mpc.solver.qp`: the QP solver of the real-time path (casadi conic plugins; the first is
#: the default, chosen by measurement in benchmarks/mpc_benchmark.py).
QP_PLUGINS: tuple[str, ...] = ("hpipm", "osqp")


def not_stabilisable_reason(kind: str) -> str:
    """The one wording of "this model has no terminal ellipsoid"."""
    return (
        f"the {kind} model is not stabilisable at rest (its linearisation cannot move in "
        f"every direction, e.g. sideways), so no terminal ellipsoid exists"
    )


@dataclass(frozen=True)
class MpcSettings:
    horizon: int = 20
    sample_time: float = 0.1
    substeps: int = 4
    terminal: TerminalKind = "equality"
    #: Diagonal of the stage-cost weight on x - x_s (one entry per state).
    state_weights: tuple[float, ...] = ()
    #: Diagonal of the stage-cost weight on u - u_s (one entry per input).
    input_weights: tuple[float, ...] = ()
    #: Weight of the offset cost V_o = w * ||position(x_s) - target||^2.
    offset_weight: float = 100.0
    #: Steady states must lie this fraction inside the limits (0 = on them).
    steady_state_margin: float = 0.05
    #: Terminal level alpha is this fraction of the largest verified level.
    terminal_shrink: float = 0.9
    #: Terminal weight P = (1 + slack) * (DARE solution): the extra decrease per step that
    #: absorbs the nonlinearity inside the terminal set (Chen & Allgower, Automatica 34(10),
    #: 1998, their kappa). 0 keeps the pure LQR cost (exact for linear models).
    terminal_decrease_slack: float = 0.1
    #: Solver options passed through to casadi (plugin name and its options).
    solver: dict[str, Any] = field(default_factory=dict)
