"""The checks every node applies to what it receives (fleet/message_checks.py), each fault row
of issue 9 that concerns messages as plain values: not finite, wrong frame, implausible
stamp, implausible position, malformed tables, robot index outside the roster, a flood.

Outside references: NaN and infinity are the IEEE 754 special values (IEEE Std 754-2019,
section 6), `math.isfinite` tells them apart; positions live in the shared `map` frame
(REP 105, "Coordinate Frames for Mobile Platforms", section "map"); the distance of a point
outside a square is checked against shapely's `Polygon.distance` (general-purpose geometry
library); the token bucket admits rate * t + burst events over t seconds (common practice:
the token-bucket shaping rule).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from shapely.geometry import Point, Polygon

from coverage_fleet.fleet import message_checks as mc
from coverage_fleet.geometry.region import ConvexRegion
from coverage_fleet.vehicles.base import OdometryValues

SQUARE = [(0.0, 0.0), (10.0, 0.0), (10.0, 10.0), (0.0, 10.0)]
REGION = ConvexRegion.from_vertices(SQUARE)
CHECKS = mc.StateChecks(REGION, mc.StampLimits(future=1.0, past=2.0), 20.0)


def reason(call) -> str:
    with pytest.raises(mc.BadMessageError) as caught:
        call()
    return caught.value.reason


def test_a_good_state_passes() -> None:
    mc.check_odometry(OdometryValues(5.0, 5.0, 0.3, 0.5), "map", 100.0, 100.2, CHECKS)


@pytest.mark.parametrize("field", ["x", "y", "yaw", "body_vx", "body_vy", "yaw_rate"])
@pytest.mark.parametrize("bad", [math.nan, math.inf, -math.inf], ids=["nan", "inf", "-inf"])
def test_a_state_with_a_special_value_is_dropped(field: str, bad: float) -> None:
    values = dict(x=5.0, y=5.0, yaw=0.0, body_vx=0.0, body_vy=0.0, yaw_rate=0.0)
    values[field] = bad
    odom = OdometryValues(**values)
    assert reason(lambda: mc.check_odometry(odom, "map", 100.0, 100.0, CHECKS)) == mc.NOT_FINITE


def test_a_state_in_another_frame_is_dropped() -> None:
    odom = OdometryValues(5.0, 5.0, 0.0)
    for frame in ("odom", "", "Map", "rover_a/map"):
        assert reason(lambda f=frame: mc.check_odometry(odom, f, 1.0, 1.0, CHECKS)) == (
            mc.WRONG_FRAME
        )
    assert mc.EXPECTED_FRAME == "map"  # REP 105


def test_stamps_far_ahead_or_behind_the_clock_are_dropped() -> None:
    odom = OdometryValues(5.0, 5.0, 0.0)
    now = 1000.0
    hour = 3600.0
    assert reason(lambda: mc.check_odometry(odom, "map", now + hour, now, CHECKS)) == (
        mc.STAMP_FUTURE
    )
    assert reason(lambda: mc.check_odometry(odom, "map", now - hour, now, CHECKS)) == (
        mc.STAMP_PAST
    )
    # Within the limits on both sides: kept (the checks can pass, so they can fail).
    mc.check_odometry(odom, "map", now + 0.9, now, CHECKS)
    mc.check_odometry(odom, "map", now - 1.9, now, CHECKS)
    # A listener with its own clock checks only that the stamp is a number.
    mc.check_odometry(odom, "map", now + hour, 0.0, mc.StateChecks(REGION, stamps=None))


@pytest.mark.parametrize("point", [(1000.0, -1000.0), (-30.0, 5.0), (5.0, 40.0), (12.0, -3.0)])
def test_distance_outside_matches_shapely_beside_an_edge_and_bounds_it_near_a_corner(
    point,
) -> None:
    exact = Polygon(SQUARE).distance(Point(point))
    got = mc.outside_distance(REGION, point)
    assert got <= exact + 1e-9
    beside_an_edge = 0 <= point[0] <= 10 or 0 <= point[1] <= 10
    if beside_an_edge:
        assert got == pytest.approx(exact)
    assert mc.outside_distance(REGION, (5.0, 5.0)) == 0.0


def test_a_position_far_outside_the_region_is_dropped_but_a_small_excursion_is_kept() -> None:
    far = OdometryValues(1000.0, -1000.0, 0.0)
    assert reason(lambda: mc.check_odometry(far, "map", 1.0, 1.0, CHECKS)) == (
        mc.IMPLAUSIBLE_POSITION
    )
    # 3 m outside: a robot pushed out of the region is real; the geofence deals with it.
    mc.check_odometry(OdometryValues(13.0, 5.0, 0.0), "map", 1.0, 1.0, CHECKS)


COLUMNS = ("roster_index", "px", "py", "cx", "cy", "mass")


def table(rows: np.ndarray, columns=COLUMNS, offset: int = 0, pad=()) -> tuple:
    dims = [
        mc.TableDimension("rows", rows.shape[0], rows.size),
        mc.TableDimension(",".join(columns), rows.shape[1], rows.shape[1]),
    ]
    return dims, offset, [*pad, *rows.ravel()], COLUMNS


def test_a_well_formed_table_is_read_with_its_offset() -> None:
    rows = np.arange(12.0).reshape(2, 6)
    got = mc.table_rows(*table(rows, offset=3, pad=(9.0, 9.0, 9.0)))
    assert np.array_equal(got, rows)


def test_malformed_tables_are_dropped() -> None:
    rows = np.arange(12.0).reshape(2, 6)
    dims, offset, data, columns = table(rows)
    assert reason(lambda: mc.table_rows([], 0, data, columns)) == mc.BAD_TABLE  # no layout
    assert reason(lambda: mc.table_rows(dims[:1], 0, data, columns)) == mc.BAD_TABLE
    assert reason(lambda: mc.table_rows(*table(rows, columns=("a",) * 6)[:3], columns)) == (
        mc.BAD_TABLE
    )
    assert reason(lambda: mc.table_rows(dims, offset, data[:-1], columns)) == mc.BAD_TABLE
    assert reason(lambda: mc.table_rows(dims, -1, data, columns)) == mc.BAD_TABLE
    bad = rows.copy()
    bad[1, 3] = math.nan
    assert reason(lambda: mc.table_rows(*table(bad))) == mc.NOT_FINITE


def test_robot_indices_must_name_distinct_robots_of_the_roster() -> None:
    assert mc.roster_indices([0.0, 3.0, 1.0], 4) == [0, 3, 1]
    assert reason(lambda: mc.roster_indices([0.0, 99.0], 4)) == mc.BAD_INDEX
    assert reason(lambda: mc.roster_indices([-1.0], 4)) == mc.BAD_INDEX
    assert reason(lambda: mc.roster_indices([1.5], 4)) == mc.BAD_INDEX
    assert reason(lambda: mc.roster_indices([2.0, 2.0], 4)) == mc.BAD_INDEX


def test_drops_are_counted_per_robot_and_warnings_throttled() -> None:
    counter = mc.DropCounter(warn_period=5.0)
    warnings = [counter.drop("rover_a", mc.NOT_FINITE, t * 0.1) for t in range(100)]
    # One warning at once, then one per 5 s covering what came in between.
    assert [w for w in warnings if w] == [1, 50]
    assert counter.counts("rover_a") == {mc.NOT_FINITE: 100}
    assert counter.drop("rover_b", mc.WRONG_FRAME, 9.9) == 1
    assert counter.total("rover_a") == 100 and counter.total() == 101
    assert counter.counts("boat_c") == {}


def test_a_flood_is_cut_to_the_rate_and_burst_of_the_bucket() -> None:
    limit = mc.RateLimit(rate=200.0, burst=20.0)
    # 1000 states per second for 5 s (the flood of issue 9).
    allowed = sum(limit.allow(k / 1000.0) for k in range(5000))
    assert allowed <= 200.0 * 5.0 + 20.0
    assert allowed >= 200.0 * 5.0  # and the robot is still served at the limit
    # At a normal rate (10 per second) nothing is dropped.
    calm = mc.RateLimit(rate=200.0, burst=20.0)
    assert all(calm.allow(k / 10.0) for k in range(100))


def test_receive_rates_cover_the_period_since_the_last_report() -> None:
    rates = mc.MessageRates()
    assert rates.rates(0.0) == {}
    for _ in range(30):
        rates.saw("rover_a")
    assert rates.rates(2.0) == {"rover_a": 15.0}
    assert rates.rates(3.0) == {"rover_a": 0.0}
