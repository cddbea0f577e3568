"""Limits a trial's states and inputs exceeded: state and input boxes, the model's
polytopes and the region (footprint inside), with limits.TRIAL_LIMIT_TOLERANCE of slack.

Run on every row by the trial assembler (fleet/trial_records.py), whichever path fed it,
so both paths count the same violations.
"""

from __future__ import annotations

import numpy as np

from coverage_fleet.control.limits import TRIAL_LIMIT_TOLERANCE
from coverage_fleet.fleet.mission import RobotEntry
from coverage_fleet.fleet.trial import LimitViolation


def limit_violations(
    entry: RobotEntry, x: np.ndarray, u: np.ndarray, region_A, region_b, t: float
) -> list[LimitViolation]:
    """Every state, input and geofence limit that x and u exceed (beyond
    TRIAL_LIMIT_TOLERANCE). An input of NaN (no command recorded for the state) is not
    checked."""
    model = entry.vehicle.model
    name = entry.name
    found = []
    x_low, x_high = model.state_bounds()
    u_low, u_high = model.input_bounds()
    for values, low, high, names in (
        (x, x_low, x_high, model.state_names),
        (u, u_low, u_high, model.input_names),
    ):
        for k, label in enumerate(names):
            if values[k] < low[k] - TRIAL_LIMIT_TOLERANCE:
                found.append(LimitViolation(t, name, f"{label} >= {low[k]:g}", values[k], low[k]))
            if values[k] > high[k] + TRIAL_LIMIT_TOLERANCE:
                found.append(LimitViolation(t, name, f"{label} <= {high[k]:g}", values[k], high[k]))
    for label, (G, g), vector in (
        ("state polytope", model.state_polytope(), x),
        ("input polytope", model.input_polytope(), u),
        (
            "region (footprint inside)",
            (region_A, region_b - model.footprint_radius),
            model.position(x),
        ),
    ):
        if len(g) and np.all(np.isfinite(vector)):
            excess = G @ vector - g
            row = int(np.argmax(excess))
            if excess[row] > TRIAL_LIMIT_TOLERANCE:
                found.append(
                    LimitViolation(t, name, f"{label} row {row}", float(G[row] @ vector), g[row])
                )
    return found
