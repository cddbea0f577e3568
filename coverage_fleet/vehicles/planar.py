"""Planar helpers shared by the models: angle wrapping, rotations, regular polygons."""

from __future__ import annotations

import math
from typing import Literal

import numpy as np

PolygonFit = Literal["inner", "outer"]


def wrap_angle(angle: float) -> float:
    """Angle in [-pi, pi)."""
    return (angle + math.pi) % (2.0 * math.pi) - math.pi


def rotate(yaw: float, vx: float, vy: float) -> tuple[float, float]:
    """(vx, vy) given in a frame rotated by yaw, expressed in the parent frame."""
    c, s = math.cos(yaw), math.sin(yaw)
    return c * vx - s * vy, s * vx + c * vy


def disc_polygon(radius: float, sides: int, fit: PolygonFit) -> tuple[np.ndarray, np.ndarray]:
    """Half-spaces H v <= h of a regular polygon approximating the disc ||v|| <= radius.

    Face normals point at angles 2 pi k / sides (so the axes meet a face). `inner`: the
    polygon is inscribed in the disc (vertices on the circle; the limit is never exceeded,
    at the cost of a factor cos(pi/sides) along the face normals, 7.6 % for an octagon).
    `outer`: the polygon circumscribes the disc (faces touch the circle; speeds up to
    radius / cos(pi/sides) are allowed between the faces)."""
    angles = 2.0 * math.pi * np.arange(sides) / sides
    H = np.column_stack([np.cos(angles), np.sin(angles)])
    offset = radius * math.cos(math.pi / sides) if fit == "inner" else radius
    return H, np.full(sides, offset)


def scale_into_polygon(v: np.ndarray, H: np.ndarray, h: np.ndarray) -> np.ndarray:
    """v shrunk towards the origin until H v <= h holds (the polygon contains the origin)."""
    ratios = (H @ v) / h
    worst = float(np.max(ratios, initial=0.0))
    return v / worst if worst > 1.0 else v
