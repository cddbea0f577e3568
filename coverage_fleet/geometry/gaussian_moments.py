"""Mass, first and second moments of the standard bivariate normal over polygons, in closed
form: one pass over the polygons' edges, no quadrature.

phi(z) = exp(-|z|^2 / 2) / (2 pi). For a polygon P with edges from a to b (counter-clockwise),
write each edge's line as z = h n + t d: d the unit direction, n = (d_y, -d_x) the outward
normal, h = a . n its signed distance from the origin, t from t_a = a . d to t_b = b . d.
- Mass: P is the signed sum of the triangles (0, a, b). In polar coordinates about the
  origin a triangle's integral is (1 / 2 pi) int (1 - exp(-r(theta)^2 / 2)) dtheta, with
  r = h / cos(psi) on the edge (psi the angle from n, tan psi = t / h); and
  (1 / 2 pi) int_0^psi exp(-h^2 / (2 cos^2 s)) ds is Owen's T function T(h, tan psi)
  (D. B. Owen, "Tables for computing bivariate normal probabilities", Ann. Math. Statist.
  27(4), 1956: T(h, a) = (1 / 2 pi) int_0^a exp(-h^2 (1 + x^2) / 2) / (1 + x^2) dx, here
  with x = tan s; the definition from memory, the results checked against scipy.integrate
  by test_geometry_density; scipy.special.owens_t evaluates it). So the triangle holds
  dtheta / (2 pi) - sign(h) (T(|h|, t_b / |h|) - T(|h|, t_a / |h|)), dtheta its signed
  angle at the origin (0 for h = 0: a triangle with no area). The angles add up to the
  polygon's winding number about the origin.
- First moment: z phi = -grad phi, so int_P z phi = -sum over edges of n int_edge phi ds
  (Gauss's divergence theorem), and int_edge phi ds = exp(-h^2 / 2) / sqrt(2 pi)
  (Phi(t_b) - Phi(t_a)), Phi the standard normal distribution function.
- Second moments: d_i d_j phi = (z_i z_j - delta_ij) phi, so
  int_P z_i z_j phi = delta_ij mass - sum over edges of n_i int_edge z_j phi ds, with
  int_edge z phi ds = h n I_0 + d I_1, I_0 the edge's int phi ds and
  I_1 = int t phi ds = exp(-h^2 / 2) (exp(-t_a^2 / 2) - exp(-t_b^2 / 2)) / (2 pi).

Why: the quadrature this replaced (a degree-6 rule on pieces 0.75 standard deviations
wide) took most of the orchard mission's partition time, a third of its offline run.
test_geometry_density checks the results against scipy.integrate (QUADPACK).
"""

from __future__ import annotations

import math

import numpy as np
from scipy.special import erf, ndtr, owens_t

_SQRT_2PI = math.sqrt(2.0 * math.pi)
#: How near a sum of a polygon's angles must be to a whole number of turns to be taken as
#: one (rounding leaves about 1e-15; an origin on the boundary gives at least the smallest
#: interior angle's share, far more).
WINDING_TOLERANCE = 1e-9


def _owens_t_change(h: np.ndarray, t_a: np.ndarray, t_b: np.ndarray) -> np.ndarray:
    """T(h, t_b / h) - T(h, t_a / h) for h > 0. Where both ends lie beyond the foot of the
    perpendicular on the same side (|t| > h), by Owen's identity T(h, a) + T(ah, 1/a) =
    Phi(h) / 2 + Phi(ah) / 2 - Phi(h) Phi(ah) (h, a >= 0; Owen 1956, sec. 2, from
    memory; test_geometry_density's small far cells fail without it): both T
    values there are near T(h, inf), up to 1/4, and a small cell's edge pointing at the
    origin would lose their difference (measured: a 1 cm cell 6 standard deviations out
    had its mass 3e-5 off), while the identity's terms are its own size."""
    far = (np.abs(t_a) > h) & (np.abs(t_b) > h) & (np.sign(t_a) == np.sign(t_b))
    change = np.empty_like(h)
    near = ~far
    h_near = h[near]
    change[near] = owens_t(h_near, t_b[near] / h_near) - owens_t(h_near, t_a[near] / h_near)
    h_far, end_a, end_b = h[far], np.abs(t_a[far]), np.abs(t_b[far])
    gain = ndtr(-end_a) - ndtr(-end_b)  # Phi(|t_b|) - Phi(|t_a|), from the tails
    # 1/2 - Phi(h) = -erf(h / sqrt 2) / 2; T is odd in a.
    change[far] = np.sign(t_b[far]) * (
        -0.5 * erf(h_far / math.sqrt(2.0)) * gain
        - owens_t(end_b, h_far / end_b)
        + owens_t(end_a, h_far / end_a)
    )
    return change


def standard_normal_moments(
    vertices: np.ndarray, starts: np.ndarray, count: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per polygon k: the standard bivariate normal's mass (count,), first moment
    int z phi (count, 2) and second moments int z z' phi (count, 2, 2).

    vertices: (V, 2) the polygons' vertices, each counter-clockwise, one after the other;
    starts: (count,) where each polygon's vertices begin in `vertices` (ascending; a
    polygon ends where the next begins). A polygon with fewer than 3 vertices holds
    nothing."""
    vertices = np.asarray(vertices, dtype=float)
    lengths = np.diff(np.append(starts, len(vertices)))
    owner = np.repeat(np.arange(count), lengths)
    following = np.arange(len(vertices)) + 1
    ends = starts + lengths - 1
    closing = lengths > 0
    following[ends[closing]] = starts[closing]
    a, b = vertices, vertices[following]
    edge = b - a
    length = np.hypot(edge[:, 0], edge[:, 1])
    real = (length > 0.0) & np.repeat(lengths >= 3, lengths)
    a, b, edge, length, owner = a[real], b[real], edge[real], length[real], owner[real]
    d = edge / length[:, None]
    n = np.column_stack([d[:, 1], -d[:, 0]])
    h = np.einsum("ij,ij->i", a, n)
    t_a = np.einsum("ij,ij->i", a, d)
    t_b = t_a + length

    away = np.abs(h)
    turn = np.arctan2(a[:, 0] * b[:, 1] - a[:, 1] * b[:, 0], np.einsum("ij,ij->i", a, b))
    turn = np.where(away > 0.0, turn, 0.0)
    safe = np.where(away > 0.0, away, 1.0)
    sweep = np.where(away > 0.0, np.sign(h) * _owens_t_change(safe, t_a, t_b), 0.0)

    fall = np.exp(-0.5 * h * h)
    # Phi(t_b) - Phi(t_a) from the tail nearer to both, so far edges keep their digits.
    upper = t_a > 0.0
    spread = np.where(upper, ndtr(-t_a) - ndtr(-t_b), ndtr(t_b) - ndtr(t_a))
    along_0 = fall / _SQRT_2PI * spread
    along_1 = fall * (np.exp(-0.5 * t_a * t_a) - np.exp(-0.5 * t_b * t_b)) / (2.0 * math.pi)

    # The triangles' angles add up to the polygon's winding number about the origin, 1
    # inside, 0 outside: taken as that whole number, so that a small cell far from the
    # origin, whose triangles are large and cancel, keeps only the small T terms (its
    # mass to their relative precision, not to 1e-16 of 1). With the origin on the
    # boundary the sum is the interior angle's share, as it is.
    winding = np.bincount(owner, weights=turn, minlength=count) / (2.0 * math.pi)
    whole = np.round(winding)
    winding = np.where(np.abs(winding - whole) < WINDING_TOLERANCE, whole, winding)
    mass = winding - np.bincount(owner, weights=sweep, minlength=count)
    first = -np.column_stack([
        np.bincount(owner, weights=n[:, i] * along_0, minlength=count) for i in range(2)
    ])
    # int over the edge of z phi: h n I_0 + d I_1 (module docstring).
    edge_moment = (h * along_0)[:, None] * n + along_1[:, None] * d
    second = np.zeros((count, 2, 2))
    for i in range(2):
        for j in range(2):
            second[:, i, j] = -np.bincount(owner, weights=n[:, i] * edge_moment[:, j],
                                           minlength=count)
    second[:, 0, 0] += mass
    second[:, 1, 1] += mass
    return mass, first, second
