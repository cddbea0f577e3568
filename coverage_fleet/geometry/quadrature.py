"""Quadrature on convex polygons for smooth densities: triangle fan, uniform subdivision of
each triangle into m^2 similar pieces, and a 12-point degree-6 symmetric rule on each piece.

The rule is Dunavant's degree-6 rule (D. A. Dunavant, "High degree efficient symmetrical
Gaussian quadrature rules for the triangle", Int. J. Numer. Meth. Eng. 21, 1985, table of
p = 6). The coefficients are from memory; test_geometry_density checks that the rule
integrates every monomial of degree <= 6 exactly, so a wrong digit cannot go unnoticed.
"""

from __future__ import annotations

from functools import lru_cache
from itertools import permutations

import numpy as np


def _dunavant_degree6() -> tuple[np.ndarray, np.ndarray]:
    """Barycentric points (12, 3) and weights (12,) summing to 1."""
    orbits = [
        (0.116786275726379, (0.501426509658179, 0.249286745170910, 0.249286745170910)),
        (0.050844906370207, (0.873821971016996, 0.063089014491502, 0.063089014491502)),
        (0.082851075618374, (0.053145049844817, 0.310352451033784, 0.636502499121399)),
    ]
    points, weights = [], []
    for weight, bary in orbits:
        for perm in sorted(set(permutations(bary))):
            points.append(perm)
            weights.append(weight)
    return np.array(points), np.array(weights)


RULE_POINTS, RULE_WEIGHTS = _dunavant_degree6()
RULE_DEGREE = 6


@lru_cache(maxsize=64)
def subdivided_rule(m: int) -> tuple[np.ndarray, np.ndarray]:
    """The rule applied on each of the m^2 pieces of the reference triangle (0,0), (1,0),
    (0,1): points (m^2 * 12, 2) in (s, t) coordinates and weights summing to 1."""
    corners = []
    for i in range(m):
        for j in range(m - i):
            upright = ((i, j), (i + 1, j), (i, j + 1))
            corners.append(upright)
            if j < m - i - 1:
                corners.append(((i + 1, j), (i + 1, j + 1), (i, j + 1)))  # inverted piece
    tri = np.array(corners, dtype=float) / m  # (m^2, 3, 2)
    pts = np.einsum("qk,tkd->tqd", RULE_POINTS, tri).reshape(-1, 2)
    wts = np.tile(RULE_WEIGHTS, len(tri)) / len(tri)
    pts.setflags(write=False)
    wts.setflags(write=False)
    return pts, wts


def fan_quadrature(polygons: list[np.ndarray], spacing: float
                   ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Points (P, 2), weights (P,) and owners (P,) such that, for each convex CCW polygon
    k, sum of w * f(points) over its points ~ integral of f over polygon k. Each fan
    triangle is cut into pieces no longer than `spacing`, so the error is that of a
    degree-6 rule at that scale: O(spacing^7 |f^(7)|) per piece. Vectorised over all
    triangles of all polygons (one pass per distinct subdivision count)."""
    lengths = np.array([len(p) for p in polygons], dtype=np.int64)
    fans = np.maximum(lengths - 2, 0)
    if fans.sum() == 0:
        return np.zeros((0, 2)), np.zeros(0), np.zeros(0, dtype=np.int64)
    vertices = np.concatenate([p for p in polygons if len(p)])
    start = np.cumsum(lengths) - lengths
    owner = np.repeat(np.arange(len(polygons)), fans)
    j = np.arange(fans.sum()) - np.repeat(np.cumsum(fans) - fans, fans) + 1
    apex = vertices[start[owner]]
    eb = vertices[start[owner] + j] - apex
    ec = vertices[start[owner] + j + 1] - apex
    area = 0.5 * (eb[:, 0] * ec[:, 1] - eb[:, 1] * ec[:, 0])
    longest = np.max([np.hypot(*eb.T), np.hypot(*ec.T), np.hypot(*(ec - eb).T)], axis=0)
    pieces = np.maximum(1, np.ceil(longest / spacing)).astype(np.int64)
    points, weights, owners = [], [], []
    for m in np.unique(pieces[area > 0.0]):
        pick = (pieces == m) & (area > 0.0)
        ref_points, ref_weights = subdivided_rule(int(m))
        points.append((apex[pick, None, :] + ref_points[None, :, :1] * eb[pick, None, :]
                       + ref_points[None, :, 1:] * ec[pick, None, :]).reshape(-1, 2))
        weights.append((area[pick, None] * ref_weights[None, :]).reshape(-1))
        owners.append(np.repeat(owner[pick], len(ref_weights)))
    if not points:
        return np.zeros((0, 2)), np.zeros(0), np.zeros(0, dtype=np.int64)
    return np.concatenate(points), np.concatenate(weights), np.concatenate(owners)
