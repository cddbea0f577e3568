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


def polygon_quadrature(polygon: np.ndarray, spacing: float) -> tuple[np.ndarray, np.ndarray]:
    """Points (P, 2) and weights (P,) with sum(w * f(points)) ~ integral of f over the
    convex polygon. Each fan triangle is cut into pieces no longer than `spacing`, so the
    error is that of a degree-6 rule at that scale: O(spacing^7 |f^(7)|) per piece."""
    if len(polygon) < 3:
        return np.zeros((0, 2)), np.zeros(0)
    all_points, all_weights = [], []
    apex = polygon[0]
    for k in range(1, len(polygon) - 1):
        b, c = polygon[k], polygon[k + 1]
        eb, ec = b - apex, c - apex
        area = 0.5 * (eb[0] * ec[1] - eb[1] * ec[0])
        if area <= 0.0:
            continue
        longest = max(np.hypot(*eb), np.hypot(*ec), np.hypot(*(c - b)))
        m = max(1, int(np.ceil(longest / spacing)))
        ref_points, ref_weights = subdivided_rule(m)
        all_points.append(apex + ref_points[:, :1] * eb + ref_points[:, 1:] * ec)
        all_weights.append(ref_weights * area)
    if not all_points:
        return np.zeros((0, 2)), np.zeros(0)
    return np.concatenate(all_points), np.concatenate(all_weights)
