"""Heading conventions shared by the MPC and the terminal-ingredient tools.

A model's angle states (VehicleModel.angle_indices) stay continuous inside the MPC:
odometry arrives wrapped to [-pi, pi), and the MPC shifts its warm start by whole turns to
lie next to the measured angle, so the optimiser never sees a 2 pi jump. The first angle
state is the heading.

The terminal set of such a model is computed once at heading 0 and used at any steady
heading psi_s by expressing the error x - x_s in the steady state's own frame (position error
rotated by -psi_s). That is exact for models whose dynamics are unchanged by a rotation of
the map frame (their other states are body-frame or scalar quantities): the linearisation
at heading psi_s is T(psi_s) A T(psi_s)^-1, B at psi_s is T(psi_s) B, a similarity
transform; terminal.check_rotation_equivariance verifies it numerically per model.
"""

from __future__ import annotations

import math

import casadi as ca
import numpy as np

from coverage_fleet.vehicles.base import VehicleModel


def heading_index(model: VehicleModel) -> int | None:
    """Index of the heading state (the first angle state), None for models without one."""
    return model.angle_indices[0] if model.angle_indices else None


def steady_frame_error(
    x: ca.SX | np.ndarray,
    x_s: ca.SX | np.ndarray,
    position_indices: tuple[int, int],
    heading: int | None,
) -> ca.SX | np.ndarray:
    """x - x_s with the position error expressed in the frame of the steady heading.

    Works on casadi symbols and on numpy vectors (same formula, so the MPC constraint and
    the offline checks cannot drift apart)."""
    symbolic = isinstance(x, ca.SX | ca.MX) or isinstance(x_s, ca.SX | ca.MX)
    error = x - x_s
    if heading is None:
        return error
    i, j = position_indices
    psi = x_s[heading]
    cos_, sin_ = (ca.cos(psi), ca.sin(psi)) if symbolic else (math.cos(psi), math.sin(psi))
    ex, ey = error[i], error[j]
    along = cos_ * ex + sin_ * ey
    across = -sin_ * ex + cos_ * ey
    if symbolic:
        parts = [error[k] for k in range(error.shape[0])]
        parts[i], parts[j] = along, across
        return ca.vertcat(*parts)
    rotated = np.array(error, dtype=float)
    rotated[i], rotated[j] = along, across
    return rotated


def rotation_transform(nx: int, position_indices: tuple[int, int], psi: float) -> np.ndarray:
    """T(psi): identity except the position block, which is rotated by psi."""
    i, j = position_indices
    T = np.eye(nx)
    c, s = math.cos(psi), math.sin(psi)
    T[i, i], T[i, j], T[j, i], T[j, j] = c, -s, s, c
    return T
