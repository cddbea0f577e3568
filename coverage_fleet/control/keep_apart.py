"""Which buffered-cell rows a robot's MPC honours at a solve (geometry/buffered_cells.py).

Robots solve at different times (different sample times, different phases, latency on the
wire), so two robots may hold cells built from different snapshots of the fleet. Cells of
one snapshot are disjoint (with footprints and margin); cells of two different snapshots
need not be. The rule that keeps every pair apart anyway: snapshots are taken every
`snapshot_period` P; at a solve at time t a robot honours the intersection of its cells of
*every* snapshot taken in (t - W, t], W = longest sample time in the fleet T + P + latency L.
Why that is enough: robot B's newest snapshot at its last solve t_B > t - T was taken after
t_B - P - L > t - W, so it is among the snapshots robot A honours at t; and B honours it too.
So at any moment any two robots honour a common snapshot's cells, which are disjoint. (A's
plan runs until t + T_A; B re-solving at t' < t + T_A honours (t' - W, t'], which holds A's
newest snapshot for the same reason.) Between samples the robot's centre moves at most
v * sample_time / 2 from the nearer sample point, which the MPC keeps as a pad.

Rows that the robot cannot reach over its horizon are inactive and dropped; the rest, the
least slack first, fill a fixed number of rows (`rows`, padding rows 0 . p <= 1), so the
MPC's problems are built once (it leaves the padding out and solves the smallest of its row
budgets that holds the rest, control/mpc.CELL_ROW_BUDGETS). A robot whose newest snapshot
is older than `max_age` gets no rows: it brakes (`CellRows.reason` says why).
"""

from __future__ import annotations

import math
from collections import deque
from dataclasses import dataclass

import numpy as np

from coverage_fleet.geometry.buffered_cells import (
    FleetSnapshot,
    HalfPlanes,
    separating_halfplanes,
)

#: Default metres kept between two footprints (split between the two robots); common
#: practice: a few centimetres of localisation error plus a little room.
DEFAULT_MARGIN = 0.10
#: Default neighbour rows per snapshot: a planar Voronoi cell has six neighbours on average
#: (Okabe, Boots, Sugihara & Chiu, Spatial Tessellations, 2nd ed., 2000, section 5.1).
DEFAULT_NEIGHBOURS = 6
#: Seconds by which two stamps may differ and still count as the same instant (float sums
#: of sample times; stamps on the wire are nanoseconds).
STAMP_TOLERANCE = 1e-6
#: Upper bound of `neighbours` (each row costs solve time at every stage).
KEEP_APART_NEIGHBOURS_MAX = 32


@dataclass(frozen=True)
class KeepApartSettings:
    """enabled: the cells constrain the MPC (off: the robots do not avoid each other).
    margin: metres between footprints. neighbours: rows per snapshot (nearest first).
    snapshot_period: seconds between snapshots (None: the fleet's longest sample time).
    latency: seconds a snapshot may take to reach a controller (0 offline).
    max_age: seconds after which a controller whose newest snapshot is older brakes."""

    enabled: bool = True
    margin: float = DEFAULT_MARGIN
    neighbours: int = DEFAULT_NEIGHBOURS
    snapshot_period: float | None = None
    latency: float = 0.0
    max_age: float = 1.0


@dataclass(frozen=True)
class CellRows:
    """The rows for one solve: normals (rows, 2) @ p <= offsets (rows,), padding rows
    (0, 0) . p <= 1. `used` real rows; `dropped` reachable rows left out for lack of room
    (0 unless the fleet is dense beyond `neighbours`); `reason` is set (and the rows are
    None) when the robot must brake instead."""

    normals: np.ndarray | None
    offsets: np.ndarray | None
    used: int = 0
    dropped: int = 0
    reason: str = ""

    @property
    def brake(self) -> bool:
        return self.normals is None


def window_length(longest_sample_time: float, snapshot_period: float, latency: float) -> float:
    """W = T + P + L (module docstring), seconds."""
    return longest_sample_time + snapshot_period + latency


def snapshots_in_window(window: float, snapshot_period: float) -> int:
    """How many snapshots taken every P the window (t - W, t] can hold."""
    return math.ceil(window / snapshot_period - STAMP_TOLERANCE)


class CellWindow:
    """One robot's snapshots within the window, and the rows they give at a solve.

    own: the robot's name. rows: the MPC's fixed row count. reach: metres the robot can
    travel over its horizon (rows farther than this from its position are dropped)."""

    def __init__(
        self,
        own: str,
        settings: KeepApartSettings,
        window: float,
        rows: int,
        reach: float,
    ) -> None:
        self.own = own
        self.settings = settings
        self.window = float(window)
        self.rows = int(rows)
        self.reach = float(reach)
        self._snapshots: deque[FleetSnapshot] = deque()
        #: The robot's half-planes of each snapshot (by identity; None: not in it),
        #: computed at its first solve: a snapshot serves every solve within the window.
        self._planes: dict[int, HalfPlanes | None] = {}

    def add(self, snapshot: FleetSnapshot) -> None:
        """A newer snapshot (older or same-time ones are ignored)."""
        if self._snapshots and snapshot.time <= self._snapshots[-1].time:
            return
        self._snapshots.append(snapshot)

    def _halfplanes(self, snapshot: FleetSnapshot) -> HalfPlanes | None:
        key = id(snapshot)
        if key not in self._planes:
            self._planes[key] = (
                separating_halfplanes(snapshot, self.own, self.settings.margin)
                if self.own in snapshot.names else None
            )
        return self._planes[key]

    @property
    def newest(self) -> FleetSnapshot | None:
        return self._snapshots[-1] if self._snapshots else None

    def rows_at(self, now: float, position: np.ndarray) -> CellRows:
        """The rows to honour for a solve at `now` from `position` (metres)."""
        # The newest stays even when out of the window: its age decides (max_age).
        while (
            len(self._snapshots) > 1
            and self._snapshots[0].time <= now - self.window + STAMP_TOLERANCE
        ):
            self._planes.pop(id(self._snapshots.popleft()), None)
        newest = self.newest
        if newest is None:
            return CellRows(None, None, reason="no snapshot of the fleet's positions yet")
        age = now - newest.time
        if age > self.settings.max_age:
            return CellRows(
                None,
                None,
                reason=(
                    f"newest snapshot of the neighbours' positions is {age:.2f} s old "
                    f"(limit {self.settings.max_age:g} s)"
                ),
            )
        normals, offsets = [], []
        for snapshot in self._snapshots:
            planes = self._halfplanes(snapshot)
            if planes is None:
                continue
            normals.append(planes.normals)
            offsets.append(planes.offsets)
        normals_all = np.vstack(normals) if normals else np.zeros((0, 2))
        offsets_all = np.concatenate(offsets) if offsets else np.zeros(0)
        slack = offsets_all - normals_all @ np.asarray(position, float).reshape(2)
        reachable = np.nonzero(slack <= self.reach)[0]
        order = reachable[np.argsort(slack[reachable], kind="stable")]
        kept, dropped = order[: self.rows], max(0, len(order) - self.rows)
        out_normals = np.zeros((self.rows, 2))
        out_offsets = np.ones(self.rows)
        out_normals[: len(kept)] = normals_all[kept]
        out_offsets[: len(kept)] = offsets_all[kept]
        return CellRows(out_normals, out_offsets, used=len(kept), dropped=dropped)


def shifted_rows(rows: CellRows, shift: np.ndarray) -> CellRows:
    """The rows for a problem whose positions are moved by `shift` (metres; the geofence's
    return plan, control/geofence.py): n . (p - shift) <= o is n . p <= o + n . shift;
    padding rows (n = 0) stay as they are, and braking rows stay braking rows."""
    if rows.brake:
        return rows
    offsets = rows.offsets + rows.normals @ np.asarray(shift, float).reshape(2)
    return CellRows(rows.normals, offsets, rows.used, rows.dropped, rows.reason)


@dataclass(frozen=True)
class CellLayout:
    """The fleet-wide numbers every robot's cells follow: snapshot period P (s), window
    W (s) and the MPC's fixed row count."""

    snapshot_period: float
    window: float
    rows: int


def cell_layout(settings: KeepApartSettings, longest_sample_time: float) -> CellLayout:
    """P (default: the longest sample time), W = T + P + L, rows = neighbours per
    snapshot times the snapshots W can hold."""
    period = settings.snapshot_period or longest_sample_time
    window = window_length(longest_sample_time, period, settings.latency)
    return CellLayout(period, window, settings.neighbours * snapshots_in_window(window, period))


def horizon_reach(max_planar_speed: float, sample_time: float, horizon: int) -> float:
    """Metres a robot can travel over its horizon (plus one sample of slack)."""
    return max_planar_speed * sample_time * (horizon + 1)
