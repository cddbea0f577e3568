"""Message conversions (coverage_fleet/ros/conversions.py): the wire layouts round-trip
and orientation follows the standard quaternion convention (checked against scipy's
Rotation, the general-purpose reference)."""

from __future__ import annotations

import math

import numpy as np
import pytest

pytest.importorskip("rclpy", reason="ROS 2 wheels not installed (scripts/setup_env.sh)")

from geometry_msgs.msg import Accel, Twist, Wrench
from scipy.spatial.transform import Rotation

from coverage_fleet.ros import conversions as cv
from coverage_fleet.vehicles.base import CommandValues, OdometryValues


@pytest.mark.parametrize("yaw", [-3.0, -1.2, 0.0, 0.4, math.pi / 2, 3.1])
def test_yaw_quaternion_matches_scipy(yaw: float) -> None:
    q = cv.yaw_to_quaternion(yaw)
    # scipy's as_quat is scalar-last (x, y, z, w), the ROS order.
    expected = Rotation.from_euler("z", yaw).as_quat()
    assert np.allclose([q.x, q.y, q.z, q.w], expected, atol=1e-12)
    assert cv.quaternion_to_yaw(q) == pytest.approx(yaw, abs=1e-12)


def test_yaw_of_a_tilted_quaternion_is_the_zyx_euler_angle() -> None:
    rot = Rotation.from_euler("ZYX", [0.7, 0.2, -0.1])
    x, y, z, w = rot.as_quat()
    q = cv.Quaternion(x=x, y=y, z=z, w=w)
    assert cv.quaternion_to_yaw(q) == pytest.approx(0.7, abs=1e-12)


def test_stamp_round_trip_keeps_nanoseconds() -> None:
    stamp = cv.seconds_to_stamp(12.3456789)
    assert (stamp.sec, stamp.nanosec) == (12, 345678900)
    assert cv.stamp_to_nanoseconds(stamp) == 12_345_678_900
    assert cv.stamp_to_seconds(cv.nanoseconds_to_stamp(7)) == pytest.approx(7e-9)


def test_odometry_round_trip_in_map_frame() -> None:
    values = OdometryValues(x=1.5, y=-2.0, yaw=2.5, body_vx=0.8, body_vy=-0.1, yaw_rate=0.3)
    msg = cv.odometry_to_msg(values, cv.seconds_to_stamp(4.0), child_frame_id="r1/base_link")
    assert msg.header.frame_id == "map"
    assert msg.child_frame_id == "r1/base_link"
    back = cv.odometry_from_msg(msg)
    for field in ("x", "y", "yaw", "body_vx", "body_vy", "yaw_rate"):
        assert getattr(back, field) == pytest.approx(getattr(values, field), abs=1e-12)


def test_localization_pose_reads_position_yaw_and_covariance() -> None:
    msg = cv.PoseWithCovarianceStamped()
    msg.pose.pose.position.x, msg.pose.pose.position.y = 3.0, -1.5
    # yaw 2.0 rad about z (the quaternion rule checked against scipy above)
    msg.pose.pose.orientation = cv.yaw_to_quaternion(2.0)
    msg.pose.covariance = [float(k) for k in range(36)]
    values, covariance = cv.pose_from_msg(msg)
    assert (values.x, values.y) == (3.0, -1.5)
    assert values.yaw == pytest.approx(2.0, abs=1e-12)
    assert (values.body_vx, values.body_vy, values.yaw_rate) == (0.0, 0.0, 0.0)
    assert covariance[7] == 7.0 and len(covariance) == 36


@pytest.mark.parametrize(
    ("kind", "message_type"), [("twist", Twist), ("accel", Accel), ("wrench", Wrench)]
)
def test_command_kinds_map_to_their_geometry_msgs_type(kind, message_type) -> None:
    command = CommandValues(kind=kind, linear=(1.0, -2.0, 0.0), angular=(0.0, 0.0, 0.5))
    msg = cv.command_to_msg(command)
    assert type(msg) is message_type
    assert cv.command_from_msg(msg, kind) == command


def test_wrench_uses_force_and_torque_fields() -> None:
    msg = cv.command_to_msg(CommandValues("wrench", (3.0, 0.0, 0.0), (0.0, 0.0, -1.0)))
    assert (msg.force.x, msg.torque.z) == (3.0, -1.0)


def test_command_of_the_wrong_type_is_refused_with_a_clear_message() -> None:
    with pytest.raises(ValueError, match="needs a Accel"):
        cv.command_from_msg(Twist(), "accel")
    with pytest.raises(ValueError, match="unknown command kind"):
        cv.command_message_type("thrust")


def test_target_stamp_identifies_the_generation() -> None:
    msg = cv.target_to_msg([3.0, 4.0], cv.nanoseconds_to_stamp(5_000_000_123))
    xy, stamp_ns = cv.target_from_msg(msg)
    assert np.allclose(xy, [3.0, 4.0])
    assert stamp_ns == 5_000_000_123
    assert msg.header.frame_id == "map"


def test_progress_layout() -> None:
    values = cv.ProgressValues(42, 3.5, 1.25, 17.2)
    msg = cv.progress_to_msg(values)
    assert cv.stamp_to_nanoseconds(msg.header.stamp) == 42
    assert (msg.vector.x, msg.vector.y, msg.vector.z) == (3.5, 1.25, 17.2)
    assert cv.progress_from_msg(msg) == values


def test_candidate_table_round_trip() -> None:
    values = cv.CandidateValues(
        time=2.5,
        cost=11.0,
        positions={0: np.array([1.0, 2.0]), 3: np.array([5.0, 6.0])},
        centroids={0: np.array([1.5, 2.5]), 3: np.array([4.0, 6.5])},
        masses={0: 10.0, 3: 20.0},
        density_version=2,
    )
    msg = cv.candidates_to_msg(values)
    assert [d.label for d in msg.layout.dim] == [
        "row 0: time,cost,robots,density_version; rows 1..n: one robot each",
        "roster_index,px,py,cx,cy,mass",
    ]
    assert len(msg.data) == 3 * 6
    back = cv.candidates_from_msg(msg)
    assert (back.time, back.cost) == (2.5, 11.0)
    assert sorted(back.positions) == [0, 3]
    assert np.allclose(back.centroids[3], [4.0, 6.5])
    assert back.masses == {0: 10.0, 3: 20.0}
    assert back.density_version == 2


def test_a_table_that_does_not_match_its_layout_is_refused() -> None:
    msg = cv.candidates_to_msg(
        cv.CandidateValues(0.0, 1.0, {0: np.zeros(2)}, {0: np.zeros(2)}, {0: 1.0})
    )
    msg.data = list(msg.data)[:-1]
    with pytest.raises(ValueError, match="does not match"):
        cv.candidates_from_msg(msg)


def test_opening_table_round_trip() -> None:
    values = cv.OpeningValues(
        generation=4,
        time=9.0,
        cost=3.25,
        reason="progress",
        positions={1: np.array([0.0, 1.0])},
        targets={1: np.array([2.0, 3.0])},
        distances={1: 2.83},
    )
    back = cv.opening_from_msg(cv.opening_to_msg(values))
    assert (back.generation, back.time, back.cost, back.reason) == (4, 9.0, 3.25, "progress")
    assert np.allclose(back.targets[1], [2.0, 3.0])
    assert back.distances == {1: 2.83}


def _read_by_labels(msg) -> tuple[dict[str, float], list[dict[str, float]], str]:
    """A reader that knows nothing but the labels (as someone echoing the topic would):
    row 0's fields from the first label, the per-robot columns from the second."""
    rows_label, columns_label = (d.label for d in msg.layout.dim)
    head = rows_label.split(";")[0].removeprefix("row 0: ").split(" (")[0].split(",")
    columns = columns_label.split(",")
    n_rows, n_cols = (d.size for d in msg.layout.dim)
    table = np.asarray(msg.data).reshape(n_rows, n_cols)
    row0 = dict(zip(head, table[0], strict=False))
    body = [dict(zip(columns, row, strict=True)) for row in table[1:]]
    return row0, body, rows_label


def test_candidate_table_reads_back_from_its_labels_alone() -> None:
    values = cv.CandidateValues(
        time=7.5, cost=2.0, positions={2: np.array([1.0, 2.0])},
        centroids={2: np.array([3.0, 4.0])}, masses={2: 5.0},
    )
    row0, body, _ = _read_by_labels(cv.candidates_to_msg(values))
    assert row0 == {"time": 7.5, "cost": 2.0, "robots": 1.0, "density_version": 0.0}
    assert body == [
        {"roster_index": 2.0, "px": 1.0, "py": 2.0, "cx": 3.0, "cy": 4.0, "mass": 5.0}
    ]


def test_opening_table_reads_back_from_its_labels_alone() -> None:
    values = cv.OpeningValues(
        generation=6, time=9.0, cost=3.25, reason="roster",
        positions={1: np.array([0.0, 1.0])}, targets={1: np.array([2.0, 3.0])},
        distances={1: 2.5},
    )
    row0, body, rows_label = _read_by_labels(cv.opening_to_msg(values))
    assert row0 == {"generation": 6.0, "time": 9.0, "cost": 3.25, "reason": 2.0, "robots": 1.0}
    codes = dict(
        item.split("=") for item in rows_label.split("(reason ")[1].split(")")[0].split()
    )
    assert codes[str(int(row0["reason"]))] == "roster"
    assert body[0]["tx"] == 2.0 and body[0]["distance"] == 2.5


def test_tables_with_the_earlier_plain_rows_label_are_still_read() -> None:
    """Readers check the column label only: tables whose first label said just "rows"
    (written before the layout was described in the message) still read back."""
    values = cv.OpeningValues(
        generation=2, time=1.0, cost=4.0, reason="start",
        positions={0: np.zeros(2)}, targets={0: np.ones(2)}, distances={0: 1.4},
    )
    msg = cv.opening_to_msg(values)
    msg.layout.dim[0].label = "rows"
    back = cv.opening_from_msg(msg)
    assert (back.generation, back.reason, back.distances) == (2, "start", {0: 1.4})


def test_plan_poses_are_stamped_per_sample() -> None:
    positions = np.array([[0.0, 0.0], [0.1, 0.0], [0.2, 0.05]])
    msg = cv.plan_to_msg(positions, [0.0, 0.1, 0.2], start=10.0, sample_time=0.1)
    assert np.allclose(cv.plan_positions(msg), positions)
    assert [cv.stamp_to_seconds(p.header.stamp) for p in msg.poses] == pytest.approx(
        [10.0, 10.1, 10.2]
    )


def test_partition_markers_draw_closed_cells_and_label_robots() -> None:
    square = np.array([[0.0, 0.0], [1.0, 0.0], [1.0, 1.0], [0.0, 1.0]])
    markers = cv.partition_markers(
        cv.seconds_to_stamp(1.0),
        {0: "rover_a"},
        {0: square},
        {0: np.array([0.5, 0.5])},
        {0: np.array([0.4, 0.4])},
    ).markers
    assert markers[0].action == markers[0].DELETEALL
    outline = next(m for m in markers if m.ns == "cells")
    assert len(outline.points) == 5
    first, last = outline.points[0], outline.points[-1]
    assert (first.x, first.y) == (last.x, last.y)
    assert next(m for m in markers if m.ns == "labels").text == "rover_a"
    assert {m.ns for m in markers[1:]} == {"cells", "centroids", "labels", "targets"}
    assert all(m.header.frame_id == "map" for m in markers)


def test_solve_outcome_round_trip_keeps_the_state_time_exactly() -> None:
    # The state time names the row of the trial log: it must survive as the same float.
    values = cv.SolveValues("rover_a", 12.300000000000002, 0.0123, "Solve_Succeeded", True, "", 7)
    msg = cv.solve_to_msg(values)
    assert msg.level == msg.OK and msg.hardware_id == "rover_a"
    assert cv.solve_from_msg(msg) == values
    failed = cv.SolveValues("rover_a", 1.0, 0.2, "Maximum_Iterations_Exceeded", False,
                            "previous plan", 40)
    assert cv.solve_to_msg(failed).level == msg.WARN
    assert cv.solve_from_msg(cv.solve_to_msg(failed)) == failed


def test_occupancy_grid_is_row_major_from_its_origin() -> None:
    """nav_msgs/OccupancyGrid (ROS 2 common_interfaces, OccupancyGrid.msg): "The map data,
    in row-major order, starting with (0,0)"; cell (0,0) lies at info.origin."""
    msg = cv.occupancy_to_msg(
        cv.OccupancyValues("map", np.array([[0, 10, 20], [-1, 100, 50]]), (2.0, 3.0), 0.0,
                           0.5),
        cv.seconds_to_stamp(1.0),
    )
    assert (msg.info.width, msg.info.height) == (3, 2)
    assert list(msg.data) == [0, 10, 20, -1, 100, 50]
    back = cv.occupancy_from_msg(msg)
    assert back.cells[1, 0] == -1 and back.origin == (2.0, 3.0) and back.resolution == 0.5
    msg.info.width = 4
    with pytest.raises(ValueError, match="4 x 2"):
        cv.occupancy_from_msg(msg)


def test_candidates_without_layout_or_naming_robot_99_are_refused_as_bad_messages() -> None:
    """Issue 9's fault rows: a candidates table without its layout, or with roster index 99
    in a roster of 4, is a BadMessageError (dropped by the nodes), never an IndexError."""
    from std_msgs.msg import Float64MultiArray

    from coverage_fleet.fleet.message_checks import BAD_INDEX, BAD_TABLE, BadMessageError

    bare = Float64MultiArray(data=[0.0, 1.0, 1.0, 0.0, 0.0, 0.0, 0.0, 1.0, 1.0, 2.0, 2.0, 3.0])
    with pytest.raises(BadMessageError) as caught:
        cv.candidates_from_msg(bare, roster_size=4)
    assert caught.value.reason == BAD_TABLE
    far = cv.candidates_to_msg(
        cv.CandidateValues(0.0, 1.0, {99: np.zeros(2)}, {99: np.zeros(2)}, {99: 1.0})
    )
    with pytest.raises(BadMessageError) as caught:
        cv.candidates_from_msg(far, roster_size=4)
    assert caught.value.reason == BAD_INDEX
    assert sorted(cv.candidates_from_msg(far).positions) == [99]  # no roster: any index


def _snapshot(**changes):
    from coverage_fleet.geometry.buffered_cells import FleetSnapshot

    values = dict(
        time=12.5, names=("rover_c", "rover_a"),
        positions=np.array([[3.0, 4.0], [1.0, -2.0]]), ages=np.array([0.25, 0.0]),
        radii=np.array([0.35, 0.3]), speed_limits=np.array([0.5, 1.2]),
    )
    return FleetSnapshot(**{**values, **changes})


ROSTER = ("rover_a", "rover_b", "rover_c")


def test_snapshot_table_round_trip_in_roster_order_and_readable_from_its_labels() -> None:
    """The keep-apart snapshot (issue 12) on the wire: the same values back, robots by roster
    index, and a reader that knows only the labels gets every field (common practice: a
    Float64MultiArray's layout labels describe its dimensions, std_msgs/MultiArrayLayout)."""
    msg = cv.snapshot_to_msg(_snapshot(), ROSTER)
    row0, body, _ = _read_by_labels(msg)
    assert row0 == {"time": 12.5, "robots": 2.0}
    assert body == [
        {"roster_index": 0.0, "px": 1.0, "py": -2.0, "age": 0.0, "radius": 0.3,
         "speed_limit": 1.2},
        {"roster_index": 2.0, "px": 3.0, "py": 4.0, "age": 0.25, "radius": 0.35,
         "speed_limit": 0.5},
    ]
    back = cv.snapshot_from_msg(msg, ROSTER)
    assert back.time == 12.5 and back.names == ("rover_a", "rover_c")
    assert np.array_equal(back.positions, [[1.0, -2.0], [3.0, 4.0]])
    assert np.array_equal(back.ages, [0.0, 0.25])
    assert np.array_equal(back.radii, [0.3, 0.35])
    assert np.array_equal(back.speed_limits, [1.2, 0.5])


@pytest.mark.parametrize(
    ("spoil", "reason"),
    [
        ("negative_age", "bad_table"),
        ("negative_radius", "bad_table"),
        ("nan_position", "not_finite"),
        ("robot_99", "bad_index"),
        ("robot_twice", "bad_index"),
        ("count", "bad_table"),
        ("short", "bad_table"),
        ("columns", "bad_table"),
    ],
)
def test_a_spoilt_snapshot_is_a_bad_message_with_its_reason(spoil: str, reason: str) -> None:
    """Every way a snapshot can be wrong ends as a BadMessageError (the controller drops and
    counts it, ros/inbox.py), never as a crash or as cells from nonsense."""
    from coverage_fleet.fleet.message_checks import BadMessageError

    msg = cv.snapshot_to_msg(_snapshot(), ROSTER)
    data = list(msg.data)
    width = len(cv.SNAPSHOT_COLUMNS)
    column = {name: k for k, name in enumerate(cv.SNAPSHOT_COLUMNS)}
    if spoil == "negative_age":
        data[width + column["age"]] = -0.5
    elif spoil == "negative_radius":
        data[2 * width + column["radius"]] = -0.1
    elif spoil == "nan_position":
        data[width + column["px"]] = float("nan")
    elif spoil == "robot_99":
        data[width] = 99.0
    elif spoil == "robot_twice":
        data[2 * width] = data[width]
    elif spoil == "count":
        data[1] = 3.0
    elif spoil == "short":
        data = data[:-1]
    elif spoil == "columns":
        msg.layout.dim[1].label = "roster_index,px,py,cx,cy,mass"
    msg.data = data
    with pytest.raises(BadMessageError) as caught:
        cv.snapshot_from_msg(msg, ROSTER)
    assert caught.value.reason == reason
