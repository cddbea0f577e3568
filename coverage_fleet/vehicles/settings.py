"""MPC settings read from the `mpc` section of a vehicle parameter file.

The loader fills every field of MpcSettings from the file by name, so adding a field here
(with a default) is all it takes to add a setting; the loader rejects unknown keys.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Literal

TerminalKind = Literal["equality", "ellipsoid"]


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
