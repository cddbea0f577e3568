"""Density updates at run time: the density in force, and the rule for occupancy grids.

A risk or importance map is often revised during a trial. The partition uses whatever
density is in force; every replacement gets the next version number, the candidates carry
it (fleet/coordination.py), and the gate commits the first candidates of a new version as
a fresh generation with reason "density" (its cost may jump: it is measured with another
phi; the monotone decrease starts again from there).

Two sources of new densities share `DensitySource`:
- a mission's `density_updates` section (rehearsal: the offline step and the partition
  node apply each at its time, on the clock of the run);
- a `nav_msgs/OccupancyGrid` on the partition node's density topic, mapped by
  `occupancy_density`.

Occupancy rule (documented in the README, "Density updates"): a cell value v in 0..100 is
density v / 100 (0 = unimportant, 100 = most important); -1 (unknown) is `unknown_density`
(a node parameter, default 0.5: neither ignored nor favoured); any other value refuses the
whole grid. Outside the grid the density is `unknown_density` as well. Rows follow the
message: row 0 is the row at the grid's origin (the south row when the grid is not
rotated), values row-major, as nav_msgs/OccupancyGrid documents.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from coverage_fleet.geometry.density import Density, RasterDensity
from coverage_fleet.geometry.region import ConvexRegion

#: Default density of unknown (-1) occupancy cells and of the area outside the grid.
UNKNOWN_DENSITY = 0.5
OCCUPANCY_MAX = 100


@dataclass(frozen=True)
class DensityUpdate:
    """A scripted density change: from `time` (s, clock of the run) on, `density`."""

    time: float
    density: Density


class DensitySource:
    """The density in force and its version (0: the mission's; +1 per replacement)."""

    def __init__(self, initial: Density, scheduled: Sequence[DensityUpdate] = ()) -> None:
        self.density = initial
        self.version = 0
        self._pending = sorted(scheduled, key=lambda u: u.time)

    @property
    def pending(self) -> bool:
        """Scripted updates are still to come (an offline run does not stop before)."""
        return bool(self._pending)

    def replace(self, density: Density) -> int:
        """Put `density` in force; returns its version."""
        self.density = density
        self.version += 1
        return self.version

    def apply_due(self, time: float) -> bool:
        """Apply the scheduled updates whose time has come (several due at once: the last
        wins, one new version). True when the density changed."""
        due = [u for u in self._pending if u.time <= time]
        if not due:
            return False
        self._pending = self._pending[len(due):]
        self.replace(due[-1].density)
        return True


def density_in_force(initial: Density, scheduled: Sequence[DensityUpdate],
                     time: float) -> Density:
    """The scripted density in force at `time` (what a report judges the end of a run by)."""
    source = DensitySource(initial, scheduled)
    source.apply_due(time)
    return source.density


def occupancy_density(
    cells: np.ndarray,
    origin: tuple[float, float],
    resolution: float,
    region: ConvexRegion,
    unknown_density: float = UNKNOWN_DENSITY,
) -> RasterDensity:
    """The density of an occupancy grid by the rule in the module docstring. `cells` is
    (height, width), row 0 at `origin` (the grid's corner, map frame, metres). Raises
    ValueError naming the fault (values outside -1..100, no mass inside the region)."""
    grid = np.asarray(cells)
    if grid.ndim != 2 or grid.size == 0:
        raise ValueError(f"the grid must be non-empty, got shape {grid.shape}")
    bad = (grid < -1) | (grid > OCCUPANCY_MAX)
    if bad.any():
        raise ValueError(f"{int(bad.sum())} cell(s) outside -1..{OCCUPANCY_MAX} (e.g. "
                         f"{int(grid[bad][0])})")
    if not (np.isfinite(resolution) and resolution > 0.0):
        raise ValueError(f"the resolution must be positive, got {resolution!r}")
    values = np.where(grid < 0, unknown_density, grid / float(OCCUPANCY_MAX))
    density = RasterDensity(values, origin, resolution, fill_value=unknown_density)
    if not density.mass_in(region) > 0.0:
        raise ValueError("the density has no mass inside the region")
    return density
