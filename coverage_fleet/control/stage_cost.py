"""Weights of the tracking MPC's stage cost l(x - x_s, u - u_s) = |x - x_s|_Q^2 + |u - u_s|_R^2.

Read by the MPC (its cost) and by the terminal-ingredient tools (the Riccati equation is
solved for the same Q and R), so both see one definition.
"""

from __future__ import annotations

import numpy as np

from coverage_fleet.vehicles.base import VehicleModel
from coverage_fleet.vehicles.settings import MpcSettings


def stage_weights(model: VehicleModel, settings: MpcSettings) -> tuple[np.ndarray, np.ndarray]:
    """Q and R (diagonal) from the settings; all ones where the settings leave them empty
    (the vehicle-file loader always fills them and checks their lengths and signs)."""
    q = np.asarray(settings.state_weights or np.ones(model.nx), dtype=float)
    r = np.asarray(settings.input_weights or np.ones(model.nu), dtype=float)
    if q.shape != (model.nx,) or r.shape != (model.nu,):
        raise ValueError(
            f"stage weights need {model.nx} state and {model.nu} input entries, got "
            f"{len(q)} and {len(r)} (vehicle files are checked by vehicles.loader)"
        )
    return np.diag(q), np.diag(r)
