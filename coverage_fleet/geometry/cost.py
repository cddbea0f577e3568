"""The coverage cost H on its own, for callers that need the number and not the cells."""

from __future__ import annotations

import numpy as np

from coverage_fleet.geometry.density import Density
from coverage_fleet.geometry.partition import compute_partition
from coverage_fleet.geometry.region import ConvexRegion


def coverage_cost(positions: np.ndarray, region: ConvexRegion, density: Density) -> float:
    """H(p) = sum_i integral over V_i(p) of ||q - p_i||^2 phi(q) dq (Cortes, Martinez,
    Karatas & Bullo, "Coverage control for mobile sensing networks", IEEE Trans. Robotics
    and Automation 20(2), 2004, eq. (1) with f(r) = r^2). Lower is better coverage: it is
    the density-weighted mean squared distance from a place to its nearest agent, times the
    total mass."""
    return compute_partition(positions, region, density).cost
