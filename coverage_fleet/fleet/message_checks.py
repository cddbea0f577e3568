"""Checks on what arrives over the wire, before it reaches the core: a message that fails one
is dropped (and counted), never allowed to crash a node or to steer a robot.

Every node converts a message to plain values and asks this module whether they are usable:

- finite numbers (`check_finite`): one NaN position would make the partition of the whole
  fleet fail;
- the expected frame (`check_frame`): positions are in the shared map frame (REP 105); a
  state in another frame is not comparable with the others;
- a plausible stamp (`check_stamp`): a state stamped far in the future would block every
  later state (the controller solves when a sample time has passed since its newest state),
  one from far in the past is stale;
- a plausible position (`check_position`): a robot reported far outside the region (beyond
  `implausible_distance`) is a localisation fault, not a robot;
- a well-formed table (`table_rows`, `roster_indices`): the layout the candidates and gate
  openings tables document, and indices that name robots of the roster.

A dropped state leaves the robot's previous state as its newest: when bad states keep coming
the robot's state goes stale and the liveness rules (fleet/liveness.py) leave it out; it
rejoins when good states return. `DropCounter` keeps the per-robot counts that the nodes
publish on /diagnostics and says when a warning is due (throttled, so a flood of bad
messages does not flood the log). `RateLimit` caps how many states a controller answers per
second, so that a flood on one robot's odometry cannot starve the rest of the graph.

Plain Python with explicit times (seconds), so the rules are tested without a ROS graph.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np

from coverage_fleet.geometry.region import ConvexRegion
from coverage_fleet.vehicles.base import OdometryValues

#: The frame every position of the graph is expressed in (REP 105: the shared map frame).
#: The default of the nodes' `map_frame` parameter (ros/frames.py), which StateChecks.frame carries.
EXPECTED_FRAME = "map"

#: Reasons a message is dropped (the keys of the counts on /diagnostics).
NOT_FINITE = "not_finite"
WRONG_FRAME = "wrong_frame"
STAMP_FUTURE = "stamp_future"
STAMP_PAST = "stamp_past"
IMPLAUSIBLE_POSITION = "implausible_position"
BAD_TABLE = "bad_table"
BAD_INDEX = "bad_index"
FLOOD = "flood"
#: A localization pose whose covariance says the position is too uncertain (fleet/pose_state.py).
TOO_UNCERTAIN = "too_uncertain"
REASONS = (
    NOT_FINITE, WRONG_FRAME, STAMP_FUTURE, STAMP_PAST, IMPLAUSIBLE_POSITION, BAD_TABLE,
    BAD_INDEX, FLOOD, TOO_UNCERTAIN,
)


class BadMessageError(ValueError):
    """A message that must be dropped; `reason` is one of REASONS."""

    def __init__(self, reason: str, detail: str) -> None:
        super().__init__(f"{reason}: {detail}")
        self.reason = reason
        self.detail = detail


# --- single checks --------------------------------------------------------------------------


def check_finite(values: Mapping[str, float]) -> None:
    """Every named number is finite."""
    bad = [name for name, value in values.items() if not math.isfinite(float(value))]
    if bad:
        shown = ", ".join(f"{name} = {float(values[name])!r}" for name in bad)
        raise BadMessageError(NOT_FINITE, f"not finite: {shown}")


def check_frame(frame_id: str, expected: str = EXPECTED_FRAME) -> None:
    if frame_id != expected:
        raise BadMessageError(WRONG_FRAME, f"frame {frame_id!r}, expected {expected!r}")


@dataclass(frozen=True)
class StampLimits:
    """How far a stamp may be from the receiver's clock: up to `future` seconds ahead (clocks
    of different machines, a /clock message still on its way) and up to `past` seconds behind
    (beyond that the state is stale anyway)."""

    future: float = 1.0
    past: float = 2.0


def check_stamp(stamp: float, now: float, limits: StampLimits) -> None:
    if not math.isfinite(stamp):
        raise BadMessageError(NOT_FINITE, f"stamp {stamp!r}")
    if stamp - now > limits.future:
        raise BadMessageError(
            STAMP_FUTURE,
            f"stamped {stamp - now:.3g} s ahead of the clock (limit {limits.future:g} s)",
        )
    if now - stamp > limits.past:
        raise BadMessageError(
            STAMP_PAST, f"stamped {now - stamp:.3g} s behind the clock (limit {limits.past:g} s)"
        )


def outside_distance(region: ConvexRegion, xy: Sequence[float]) -> float:
    """How far a point lies outside the region (0 inside): the largest violated half-space,
    which is the distance for a point beside an edge and a lower bound near a corner."""
    A, b = region.halfspaces()
    return max(0.0, float(np.max(A @ np.asarray(xy, float) - b)))


def check_position(region: ConvexRegion, xy: Sequence[float], implausible_distance: float) -> None:
    """A position more than `implausible_distance` outside the region is a localisation
    fault (no robot of the fleet gets there from inside between two states)."""
    distance = outside_distance(region, xy)
    if distance > implausible_distance:
        raise BadMessageError(
            IMPLAUSIBLE_POSITION,
            f"position ({xy[0]:.4g}, {xy[1]:.4g}) is {distance:.4g} m outside the region "
            f"(limit {implausible_distance:g} m)",
        )


@dataclass(frozen=True)
class StateChecks:
    """What a node expects of a robot's odometry (`stamps` None: any finite stamp, for a
    listener whose clock is not the graph's, like a recorder)."""

    region: ConvexRegion
    stamps: StampLimits | None = StampLimits()
    implausible_distance: float = 20.0
    frame: str = EXPECTED_FRAME


def check_odometry(
    values: OdometryValues, frame_id: str, stamp: float, now: float, checks: StateChecks
) -> None:
    """All checks on one odometry message (raises BadMessageError for the first that fails)."""
    check_finite({
        "x": values.x, "y": values.y, "yaw": values.yaw, "body_vx": values.body_vx,
        "body_vy": values.body_vy, "yaw_rate": values.yaw_rate,
    })
    check_frame(frame_id, checks.frame)
    if checks.stamps is None:
        check_finite({"stamp": stamp})
    else:
        check_stamp(stamp, now, checks.stamps)
    check_position(checks.region, (values.x, values.y), checks.implausible_distance)


# --- tables ---------------------------------------------------------------------------------


@dataclass(frozen=True)
class TableDimension:
    label: str
    size: int
    stride: int


def table_rows(
    dims: Sequence[TableDimension],
    data_offset: int,
    data: Sequence[float],
    columns: Sequence[str],
) -> np.ndarray:
    """The rows of a Float64MultiArray table whose layout names `columns` (the layout
    conversions.py documents: dim[0] the rows, dim[1] labelled with the column names)."""
    if len(dims) != 2 or dims[1].label != ",".join(columns) or dims[1].size != len(columns):
        raise BadMessageError(BAD_TABLE, f"expected a table with columns {','.join(columns)}")
    if data_offset < 0 or dims[0].size < 1:
        raise BadMessageError(BAD_TABLE, "table without a header row or with a negative offset")
    values = np.asarray(data, dtype=float)[data_offset:]
    if values.size != dims[0].size * dims[1].size:
        raise BadMessageError(BAD_TABLE, "table data does not match its layout")
    rows = values.reshape(dims[0].size, dims[1].size)
    if not np.all(np.isfinite(rows)):
        raise BadMessageError(NOT_FINITE, "table holds values that are not finite")
    return rows


def roster_indices(column: Iterable[float], roster_size: int | None) -> list[int]:
    """Robot indices of a table column: whole numbers naming distinct robots of a roster of
    `roster_size` (None: any non-negative index)."""
    values = [float(v) for v in column]
    indices = [int(v) for v in values]
    limit = math.inf if roster_size is None else roster_size
    if any(i != v or not 0 <= i < limit for i, v in zip(indices, values, strict=True)):
        raise BadMessageError(
            BAD_INDEX, f"robot indices {values} outside the roster of {roster_size}"
        )
    if len(set(indices)) != len(indices):
        raise BadMessageError(BAD_INDEX, f"robot indices {indices} repeat")
    return indices


# --- counting and rate limiting ---------------------------------------------------------------


@dataclass
class _Drops:
    counts: dict[str, int] = field(default_factory=dict)
    warned_at: float = -math.inf
    since_warning: int = 0


class DropCounter:
    """Dropped messages per source (a robot name, or a topic) and reason; a warning is due
    for the first drop of a source and then at most once per `warn_period` seconds."""

    def __init__(self, warn_period: float = 5.0) -> None:
        self.warn_period = float(warn_period)
        self._sources: dict[str, _Drops] = {}

    def drop(self, source: str, reason: str, now: float) -> int:
        """Count one dropped message; returns how many drops of `source` the warning due now
        covers (0: no warning due)."""
        drops = self._sources.setdefault(source, _Drops())
        drops.counts[reason] = drops.counts.get(reason, 0) + 1
        drops.since_warning += 1
        if now - drops.warned_at >= self.warn_period:
            covered, drops.since_warning, drops.warned_at = drops.since_warning, 0, float(now)
            return covered
        return 0

    def counts(self, source: str) -> dict[str, int]:
        drops = self._sources.get(source)
        return dict(drops.counts) if drops else {}

    def total(self, source: str | None = None) -> int:
        sources = self._sources.values() if source is None else [self._sources.get(source)]
        return sum(sum(d.counts.values()) for d in sources if d is not None)


class RateLimit:
    """A token bucket: up to `rate` events per second on average, bursts of up to `burst`."""

    def __init__(self, rate: float, burst: float) -> None:
        self.rate = float(rate)
        self.burst = float(burst)
        self._tokens = float(burst)
        self._at: float | None = None

    def allow(self, now: float) -> bool:
        if self._at is not None:
            self._tokens = min(self.burst, self._tokens + (now - self._at) * self.rate)
        self._at = float(now)
        if self._tokens >= 1.0:
            self._tokens -= 1.0
            return True
        return False


class MessageRates:
    """Messages received per source, and the rate over the last reporting period."""

    def __init__(self) -> None:
        self.totals: dict[str, int] = {}
        self._marked: dict[str, int] = {}
        self._marked_at: float | None = None

    def saw(self, source: str) -> None:
        self.totals[source] = self.totals.get(source, 0) + 1

    def rates(self, now: float) -> dict[str, float]:
        """Messages per second per source since the previous call (first call: 0)."""
        span = None if self._marked_at is None else now - self._marked_at
        rates = {
            s: (n - self._marked.get(s, 0)) / span if span and span > 0 else 0.0
            for s, n in self.totals.items()
        }
        self._marked, self._marked_at = dict(self.totals), float(now)
        return rates
