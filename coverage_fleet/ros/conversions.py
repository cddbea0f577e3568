"""Conversions between ROS messages and the plain values of the core (OdometryValues,
CommandValues, numpy arrays). Every node goes through these functions and nothing else, so
the message layouts documented here are the whole wire contract (README, "The ROS 2 graph").

Layouts that standard types do not name by field:

- progress report (`<ns>/coverage/progress`, geometry_msgs/Vector3Stamped):
  header.stamp = stamp of the committed target it refers to (the stamp identifies the
  generation; a zero stamp means "no target yet"), vector.x = distance to the target when
  the robot received it (m), vector.y = distance now (m), vector.z = time (s, the clock of
  the graph) of the odometry the distance was measured at (the lockstep acknowledgement).
- solve outcome (`<ns>/coverage/solve`, diagnostic_msgs/DiagnosticStatus): one per MPC
  solve; name `coverage_fleet/<robot>/solve`, hardware_id the robot, level OK (solved) or
  WARN (a fallback input was used), message the solver status; values state_time (s, the
  state solved on), solve_time (s), status, success (1/0), fallback, iterations.
- candidate centroids (`coverage/candidates`, std_msgs/Float64MultiArray): rows of
  CANDIDATE_COLUMNS; row 0 is [time of the states (s), coverage cost H, robots, density
  version (0 = the mission's density, +1 per update), 0, 0], then one row per live robot:
  [index in the mission roster, px, py, cx, cy, cell mass].
- gate openings (`coverage/openings`, std_msgs/Float64MultiArray): one opening per message,
  rows of OPENING_COLUMNS; row 0 is [generation, time (s), coverage cost H at the positions
  the targets came from, reason, robots, 0] with reason 0 = start, 1 = progress, 2 = roster
  change, 3 = density update; then per robot [roster index, px, py, target x, target y,
  distance at commit].
- fleet snapshot (`coverage/snapshot`, std_msgs/Float64MultiArray): what the keep-apart
  cells are built from (geometry/buffered_cells.py); rows of SNAPSHOT_COLUMNS; row 0 is
  [time of the snapshot (s, the clock of the graph), robots, 0, 0, 0, 0], then one row per
  robot the partition node has heard from: [index in the mission roster, px, py, age of
  the position at the snapshot's time (s), footprint radius (m), largest planar speed
  (m/s)]. Positions in the map frame.

Both tables carry their layout in the message itself, so that `ros2 topic echo` or a
recording is readable without this file: the first dimension's label names the fields of
row 0 and says that one row per robot follows (`table_rows_label`), the second dimension's
label names the columns. Readers check the column label and accept any first label (tables
written before the first label was descriptive said only "rows").
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
from builtin_interfaces.msg import Time
from diagnostic_msgs.msg import DiagnosticStatus, KeyValue
from geometry_msgs.msg import (
    Accel,
    AccelStamped,
    Point,
    PointStamped,
    Pose,
    PoseStamped,
    PoseWithCovarianceStamped,
    Quaternion,
    Twist,
    TwistStamped,
    Vector3,
    Vector3Stamped,
    Wrench,
    WrenchStamped,
)
from nav_msgs.msg import OccupancyGrid, Odometry, Path
from std_msgs.msg import ColorRGBA, Float64MultiArray, Header, MultiArrayDimension
from visualization_msgs.msg import Marker, MarkerArray

from coverage_fleet.fleet.message_checks import (
    BAD_TABLE,
    BadMessageError,
    TableDimension,
    roster_indices,
    table_rows,
)
from coverage_fleet.geometry.buffered_cells import FleetSnapshot
from coverage_fleet.vehicles.base import CommandKind, CommandValues, OdometryValues

from .topics import MAP_FRAME

CANDIDATE_COLUMNS = ("roster_index", "px", "py", "cx", "cy", "mass")
#: Fields of row 0 of a candidates table (the rest of row 0 is zero).
CANDIDATE_HEADER = ("time", "cost", "robots", "density_version")
OPENING_COLUMNS = ("roster_index", "px", "py", "tx", "ty", "distance")
SNAPSHOT_COLUMNS = ("roster_index", "px", "py", "age", "radius", "speed_limit")
#: Fields of row 0 of a snapshot table (the rest of row 0 is zero).
SNAPSHOT_HEADER = ("time", "robots")
OPENING_REASONS = ("start", "progress", "roster", "density")
#: Fields of row 0 of an openings table; reason is an index into OPENING_REASONS.
OPENING_HEADER = ("generation", "time", "cost", "reason", "robots")

# --- time ---------------------------------------------------------------------------------


def seconds_to_stamp(seconds: float) -> Time:
    nanoseconds = round(seconds * 1e9)
    return nanoseconds_to_stamp(nanoseconds)


def nanoseconds_to_stamp(nanoseconds: int) -> Time:
    sec, nanosec = divmod(int(nanoseconds), 1_000_000_000)
    return Time(sec=sec, nanosec=nanosec)


def stamp_to_nanoseconds(stamp: Time) -> int:
    return int(stamp.sec) * 1_000_000_000 + int(stamp.nanosec)


def stamp_to_seconds(stamp: Time) -> float:
    return stamp_to_nanoseconds(stamp) * 1e-9


# --- orientation --------------------------------------------------------------------------


def yaw_to_quaternion(yaw: float) -> Quaternion:
    """Rotation about z by yaw (REP 103: counter-clockwise positive)."""
    return Quaternion(x=0.0, y=0.0, z=math.sin(yaw / 2.0), w=math.cos(yaw / 2.0))


def quaternion_to_yaw(q: Quaternion) -> float:
    """Yaw of a quaternion (the z-y-x Euler angle; roll and pitch are dropped)."""
    return math.atan2(2.0 * (q.w * q.z + q.x * q.y), 1.0 - 2.0 * (q.y * q.y + q.z * q.z))


# --- odometry -----------------------------------------------------------------------------


def odometry_to_msg(
    values: OdometryValues, stamp: Time, child_frame_id: str, frame_id: str = MAP_FRAME
) -> Odometry:
    """nav_msgs/Odometry: pose in `frame_id`, twist in the body frame (REP 105)."""
    msg = Odometry()
    msg.header = Header(stamp=stamp, frame_id=frame_id)
    msg.child_frame_id = child_frame_id
    msg.pose.pose.position = Point(x=float(values.x), y=float(values.y), z=0.0)
    msg.pose.pose.orientation = yaw_to_quaternion(float(values.yaw))
    msg.twist.twist.linear = Vector3(x=float(values.body_vx), y=float(values.body_vy), z=0.0)
    msg.twist.twist.angular = Vector3(x=0.0, y=0.0, z=float(values.yaw_rate))
    return msg


def odometry_from_msg(msg: Odometry) -> OdometryValues:
    pose = msg.pose.pose
    twist = msg.twist.twist
    return OdometryValues(
        x=float(pose.position.x),
        y=float(pose.position.y),
        yaw=quaternion_to_yaw(pose.orientation),
        body_vx=float(twist.linear.x),
        body_vy=float(twist.linear.y),
        yaw_rate=float(twist.angular.z),
    )


def pose_from_msg(msg: PoseWithCovarianceStamped) -> tuple[OdometryValues, list[float]]:
    """A localization pose as odometry values without velocity (fleet/pose_state.py forms
    it) and its row-major 6x6 covariance (x, y, z, rotation about x, y, z)."""
    pose = msg.pose.pose
    values = OdometryValues(
        x=float(pose.position.x), y=float(pose.position.y), yaw=quaternion_to_yaw(pose.orientation)
    )
    return values, [float(v) for v in msg.pose.covariance]


# --- commands -----------------------------------------------------------------------------

_COMMAND_TYPES: dict[str, type] = {"twist": Twist, "accel": Accel, "wrench": Wrench}
#: The stamped variants (header + the plain message in a field named after the kind),
#: what e.g. ros2_control's drive controllers subscribe to (from memory: TwistStamped on
#: their cmd_vel since ROS 2 Jazzy).
_STAMPED_TYPES: dict[str, type] = {
    "twist": TwistStamped, "accel": AccelStamped, "wrench": WrenchStamped,
}

Command = Twist | Accel | Wrench | TwistStamped | AccelStamped | WrenchStamped


def command_message_type(kind: CommandKind, stamped: bool = False) -> type:
    """geometry_msgs type of a command kind (twist -> Twist, accel -> Accel, wrench ->
    Wrench; with stamped, TwistStamped, AccelStamped, WrenchStamped)."""
    types = _STAMPED_TYPES if stamped else _COMMAND_TYPES
    try:
        return types[kind]
    except KeyError:
        raise ValueError(
            f"unknown command kind {kind!r}; expected one of {sorted(_COMMAND_TYPES)}"
        ) from None


def _vector(values: Sequence[float]) -> Vector3:
    return Vector3(x=float(values[0]), y=float(values[1]), z=float(values[2]))


def _triple(v: Vector3) -> tuple[float, float, float]:
    return (float(v.x), float(v.y), float(v.z))


def command_to_msg(
    command: CommandValues, stamp: Time | None = None, frame_id: str = ""
) -> Command:
    """The plain message, or with a stamp its stamped variant (header: stamp and the
    robot's base frame, in which a command's vectors are expressed, REP 105)."""
    msg = command_message_type(command.kind)()
    if command.kind == "wrench":
        msg.force = _vector(command.linear)
        msg.torque = _vector(command.angular)
    else:
        msg.linear = _vector(command.linear)
        msg.angular = _vector(command.angular)
    if stamp is None:
        return msg
    stamped = command_message_type(command.kind, stamped=True)()
    stamped.header = Header(stamp=stamp, frame_id=frame_id)
    setattr(stamped, command.kind, msg)
    return stamped


def command_from_msg(msg: Command, kind: CommandKind) -> CommandValues:
    """Plain or stamped command message -> values (the header is dropped)."""
    if isinstance(msg, command_message_type(kind, stamped=True)):
        msg = getattr(msg, kind)
    if not isinstance(msg, command_message_type(kind)):
        raise ValueError(f"a {kind} command needs a {command_message_type(kind).__name__}")
    if kind == "wrench":
        return CommandValues(kind=kind, linear=_triple(msg.force), angular=_triple(msg.torque))
    return CommandValues(kind=kind, linear=_triple(msg.linear), angular=_triple(msg.angular))


# --- targets and progress -----------------------------------------------------------------


def target_to_msg(
    target_xy: Sequence[float], stamp: Time, frame_id: str = MAP_FRAME
) -> PointStamped:
    """Committed target: the stamp identifies the generation."""
    msg = PointStamped()
    msg.header = Header(stamp=stamp, frame_id=frame_id)
    msg.point = Point(x=float(target_xy[0]), y=float(target_xy[1]), z=0.0)
    return msg


def target_from_msg(msg: PointStamped) -> tuple[np.ndarray, int]:
    """(target xy, generation stamp in nanoseconds)."""
    return np.array([msg.point.x, msg.point.y], dtype=float), stamp_to_nanoseconds(
        msg.header.stamp
    )


@dataclass(frozen=True)
class ProgressValues:
    """A progress report as plain values (layout in the module docstring)."""

    generation_stamp_ns: int
    distance_at_commit: float
    distance_now: float
    state_time: float


def progress_to_msg(values: ProgressValues, frame_id: str = MAP_FRAME) -> Vector3Stamped:
    msg = Vector3Stamped()
    msg.header = Header(
        stamp=nanoseconds_to_stamp(values.generation_stamp_ns), frame_id=frame_id
    )
    msg.vector = Vector3(
        x=float(values.distance_at_commit),
        y=float(values.distance_now),
        z=float(values.state_time),
    )
    return msg


def progress_from_msg(msg: Vector3Stamped) -> ProgressValues:
    return ProgressValues(
        generation_stamp_ns=stamp_to_nanoseconds(msg.header.stamp),
        distance_at_commit=float(msg.vector.x),
        distance_now=float(msg.vector.y),
        state_time=float(msg.vector.z),
    )


# --- candidate centroids ------------------------------------------------------------------


@dataclass(frozen=True)
class CandidateValues:
    """The partition at one instant: per live robot (by roster index) its position, its
    cell's centroid and mass, and the coverage cost H of the whole configuration."""

    time: float
    cost: float
    positions: dict[int, np.ndarray]
    centroids: dict[int, np.ndarray]
    masses: dict[int, float]
    density_version: int = 0


def table_rows_label(header: Sequence[str], codes: str = "") -> str:
    """Label of a table's first dimension: what row 0 holds and what follows, e.g.
    `row 0: time,cost,robots; rows 1..n: one robot each`. `codes` explains coded fields."""
    explained = f" ({codes})" if codes else ""
    return f"row 0: {','.join(header)}{explained}; rows 1..n: one robot each"


CANDIDATE_ROWS_LABEL = table_rows_label(CANDIDATE_HEADER)
SNAPSHOT_ROWS_LABEL = table_rows_label(SNAPSHOT_HEADER)
OPENING_ROWS_LABEL = table_rows_label(
    OPENING_HEADER,
    "reason " + " ".join(f"{k}={name}" for k, name in enumerate(OPENING_REASONS)),
)


def _table(rows: np.ndarray, columns: Sequence[str], rows_label: str) -> Float64MultiArray:
    msg = Float64MultiArray()
    n_rows, n_cols = rows.shape
    msg.layout.dim = [
        MultiArrayDimension(label=rows_label, size=n_rows, stride=n_rows * n_cols),
        MultiArrayDimension(label=",".join(columns), size=n_cols, stride=n_cols),
    ]
    msg.layout.data_offset = 0
    msg.data = [float(v) for v in rows.ravel()]
    return msg


def _rows(msg: Float64MultiArray, columns: Sequence[str]) -> np.ndarray:
    """The table's rows; BadMessageError (message_checks) when the layout is not the documented
    one or a value is not finite."""
    dims = [TableDimension(str(d.label), int(d.size), int(d.stride)) for d in msg.layout.dim]
    return table_rows(dims, int(msg.layout.data_offset), msg.data, columns)


def candidates_to_msg(values: CandidateValues) -> Float64MultiArray:
    indices = sorted(values.positions)
    rows = np.zeros((len(indices) + 1, len(CANDIDATE_COLUMNS)))
    rows[0, :4] = (values.time, values.cost, len(indices), values.density_version)
    for row, index in enumerate(indices, start=1):
        rows[row] = (
            index,
            *values.positions[index],
            *values.centroids[index],
            values.masses[index],
        )
    return _table(rows, CANDIDATE_COLUMNS, CANDIDATE_ROWS_LABEL)


def candidates_from_msg(
    msg: Float64MultiArray, roster_size: int | None = None
) -> CandidateValues:
    """The candidates; BadMessageError (message_checks) for a table that is not the documented
    layout, holds a value that is not finite or names a robot outside a roster of
    `roster_size`."""
    rows = _rows(msg, CANDIDATE_COLUMNS)
    if rows[0, 2] != rows.shape[0] - 1:
        raise BadMessageError(BAD_TABLE, "candidate table: the robot count in row 0 does not match")
    body = rows[1:]
    indices = roster_indices(body[:, 0], roster_size)
    return CandidateValues(
        time=float(rows[0, 0]),
        cost=float(rows[0, 1]),
        positions={i: body[k, 1:3].copy() for k, i in enumerate(indices)},
        centroids={i: body[k, 3:5].copy() for k, i in enumerate(indices)},
        masses={i: float(body[k, 5]) for k, i in enumerate(indices)},
        density_version=int(rows[0, 3]),
    )


# --- fleet snapshot (keep-apart) -----------------------------------------------------------


def snapshot_to_msg(snapshot: FleetSnapshot, roster: Sequence[str]) -> Float64MultiArray:
    """The snapshot as a table (layout in the module docstring); robots by their index in
    `roster` (the mission's robot names), in roster order."""
    order = sorted(range(len(snapshot.names)), key=lambda k: roster.index(snapshot.names[k]))
    rows = np.zeros((len(order) + 1, len(SNAPSHOT_COLUMNS)))
    rows[0, :2] = (snapshot.time, len(order))
    for row, k in enumerate(order, start=1):
        rows[row] = (
            roster.index(snapshot.names[k]),
            *snapshot.positions[k],
            snapshot.ages[k],
            snapshot.radii[k],
            snapshot.speed_limits[k],
        )
    return _table(rows, SNAPSHOT_COLUMNS, SNAPSHOT_ROWS_LABEL)


def snapshot_from_msg(msg: Float64MultiArray, roster: Sequence[str]) -> FleetSnapshot:
    """The snapshot; BadMessageError (message_checks) for a table that is not the
    documented layout, holds a value that is not finite, names a robot outside `roster`
    (the mission's robot names) or twice, or gives a negative age, radius or speed."""
    rows = _rows(msg, SNAPSHOT_COLUMNS)
    if rows[0, 1] != rows.shape[0] - 1:
        raise BadMessageError(BAD_TABLE, "snapshot table: the robot count in row 0 does not match")
    body = rows[1:]
    indices = roster_indices(body[:, 0], len(roster))
    negative = [
        f"{SNAPSHOT_COLUMNS[column]} of {roster[indices[k]]} = {body[k, column]:g}"
        for column in (3, 4, 5) for k in range(len(indices)) if body[k, column] < 0
    ]
    if negative:
        raise BadMessageError(BAD_TABLE, f"snapshot table: negative {', '.join(negative)}")
    return FleetSnapshot(
        time=float(rows[0, 0]),
        names=tuple(roster[i] for i in indices),
        positions=body[:, 1:3].copy(),
        ages=body[:, 3].copy(),
        radii=body[:, 4].copy(),
        speed_limits=body[:, 5].copy(),
    )


# --- density raster -----------------------------------------------------------------------


@dataclass(frozen=True)
class OccupancyValues:
    """A nav_msgs/OccupancyGrid as plain values: cells (height, width) int, row 0 at the
    origin; origin corner (m) and yaw (rad) of the grid in `frame_id`."""

    frame_id: str
    cells: np.ndarray
    origin: tuple[float, float]
    yaw: float
    resolution: float


def occupancy_from_msg(msg: OccupancyGrid) -> OccupancyValues:
    """Cells row-major from the origin, as nav_msgs/OccupancyGrid documents. Raises
    ValueError when the data does not fill width x height."""
    info = msg.info
    width, height = int(info.width), int(info.height)
    data = np.asarray(msg.data, dtype=np.int16)
    if width <= 0 or height <= 0 or data.size != width * height:
        raise ValueError(f"the grid is {width} x {height} but holds {data.size} values")
    pose = info.origin
    return OccupancyValues(
        frame_id=msg.header.frame_id,
        cells=data.reshape(height, width),
        origin=(float(pose.position.x), float(pose.position.y)),
        yaw=quaternion_to_yaw(pose.orientation),
        resolution=float(info.resolution),
    )


def occupancy_to_msg(values: OccupancyValues, stamp: Time) -> OccupancyGrid:
    msg = OccupancyGrid()
    msg.header = Header(stamp=stamp, frame_id=values.frame_id)
    height, width = values.cells.shape
    msg.info.resolution = float(values.resolution)
    msg.info.width, msg.info.height = int(width), int(height)
    msg.info.origin = Pose(
        position=Point(x=float(values.origin[0]), y=float(values.origin[1]), z=0.0),
        orientation=yaw_to_quaternion(values.yaw),
    )
    msg.data = [int(v) for v in np.asarray(values.cells).ravel()]
    return msg


# --- gate openings ------------------------------------------------------------------------


@dataclass(frozen=True)
class OpeningValues:
    """One gate opening: the generation it started, when, why, the cost H at the positions
    the targets came from, and per robot (roster index) position, target and distance."""

    generation: int
    time: float
    cost: float
    reason: str
    positions: dict[int, np.ndarray]
    targets: dict[int, np.ndarray]
    distances: dict[int, float]


def opening_to_msg(values: OpeningValues) -> Float64MultiArray:
    indices = sorted(values.targets)
    rows = np.zeros((len(indices) + 1, len(OPENING_COLUMNS)))
    rows[0, :5] = (
        values.generation,
        values.time,
        values.cost,
        OPENING_REASONS.index(values.reason),
        len(indices),
    )
    for row, index in enumerate(indices, start=1):
        rows[row] = (
            index,
            *values.positions[index],
            *values.targets[index],
            values.distances[index],
        )
    return _table(rows, OPENING_COLUMNS, OPENING_ROWS_LABEL)


def opening_from_msg(msg: Float64MultiArray, roster_size: int | None = None) -> OpeningValues:
    """The opening; BadMessageError (message_checks) as for candidates_from_msg, or for an
    unknown reason code."""
    rows = _rows(msg, OPENING_COLUMNS)
    if rows[0, 4] != rows.shape[0] - 1:
        raise BadMessageError(BAD_TABLE, "opening table: the robot count in row 0 does not match")
    if rows[0, 3] not in range(len(OPENING_REASONS)):
        raise BadMessageError(BAD_TABLE, f"opening table: unknown reason code {rows[0, 3]!r}")
    body = rows[1:]
    indices = roster_indices(body[:, 0], roster_size)
    return OpeningValues(
        generation=int(rows[0, 0]),
        time=float(rows[0, 1]),
        cost=float(rows[0, 2]),
        reason=OPENING_REASONS[int(rows[0, 3])],
        positions={i: body[k, 1:3].copy() for k, i in enumerate(indices)},
        targets={i: body[k, 3:5].copy() for k, i in enumerate(indices)},
        distances={i: float(body[k, 5]) for k, i in enumerate(indices)},
    )


# --- plan, markers, diagnostics -----------------------------------------------------------


def plan_to_msg(
    positions: np.ndarray, yaws: Sequence[float], start: float, sample_time: float,
    frame_id: str = MAP_FRAME,
) -> Path:
    """Predicted positions over the horizon; pose k is stamped start + k * sample_time."""
    msg = Path()
    msg.header = Header(stamp=seconds_to_stamp(start), frame_id=frame_id)
    for k, (xy, yaw) in enumerate(zip(np.asarray(positions, float), yaws, strict=True)):
        pose = PoseStamped()
        pose.header = Header(stamp=seconds_to_stamp(start + k * sample_time), frame_id=frame_id)
        pose.pose = Pose(
            position=Point(x=float(xy[0]), y=float(xy[1]), z=0.0),
            orientation=yaw_to_quaternion(float(yaw)),
        )
        msg.poses.append(pose)
    return msg


def plan_positions(msg: Path) -> np.ndarray:
    return np.array([[p.pose.position.x, p.pose.position.y] for p in msg.poses], dtype=float)


#: Marker colours: our own palette, one hue per robot (by roster index), cycling; the RViz
#: configuration (cli/rviz_command.py) draws each robot's plan and odometry in its hue.
MARKER_PALETTE = (
    (0.18, 0.55, 0.34),
    (0.85, 0.47, 0.10),
    (0.26, 0.42, 0.78),
    (0.70, 0.25, 0.55),
    (0.55, 0.55, 0.12),
    (0.15, 0.62, 0.68),
)


def _colour(index: int, alpha: float = 1.0) -> ColorRGBA:
    r, g, b = MARKER_PALETTE[index % len(MARKER_PALETTE)]
    return ColorRGBA(r=r, g=g, b=b, a=alpha)


def partition_markers(
    stamp: Time,
    names: Mapping[int, str],
    cells: Mapping[int, np.ndarray],
    centroids: Mapping[int, np.ndarray],
    targets: Mapping[int, np.ndarray],
    frame_id: str = MAP_FRAME,
) -> MarkerArray:
    """RViz markers: a closed outline per cell (namespace `cells`), a sphere per candidate
    centroid (`centroids`), a cylinder per committed target (`targets`), a label per robot
    (`labels`). A DELETEALL first clears robots that left."""
    header = Header(stamp=stamp, frame_id=frame_id)
    markers = [Marker(header=header, action=Marker.DELETEALL)]
    for index, name in sorted(names.items()):
        if index in cells:
            outline = Marker(header=header, ns="cells", id=index, type=Marker.LINE_STRIP)
            outline.scale.x = 0.05
            outline.color = _colour(index)
            outline.pose.orientation.w = 1.0
            ring = np.vstack([cells[index], cells[index][:1]])
            outline.points = [Point(x=float(x), y=float(y), z=0.0) for x, y in ring]
            markers.append(outline)
        if index in centroids:
            dot = Marker(header=header, ns="centroids", id=index, type=Marker.SPHERE)
            dot.pose.position = Point(x=float(centroids[index][0]), y=float(centroids[index][1]))
            dot.pose.orientation.w = 1.0
            dot.scale = Vector3(x=0.25, y=0.25, z=0.25)
            dot.color = _colour(index, 0.6)
            markers.append(dot)
            label = Marker(header=header, ns="labels", id=index, type=Marker.TEXT_VIEW_FACING)
            label.pose.position = Point(
                x=float(centroids[index][0]), y=float(centroids[index][1]), z=0.5
            )
            label.pose.orientation.w = 1.0
            label.scale.z = 0.4
            label.color = _colour(index)
            label.text = name
            markers.append(label)
        if index in targets:
            post = Marker(header=header, ns="targets", id=index, type=Marker.CYLINDER)
            post.pose.position = Point(x=float(targets[index][0]), y=float(targets[index][1]))
            post.pose.orientation.w = 1.0
            post.scale = Vector3(x=0.15, y=0.15, z=0.6)
            post.color = _colour(index)
            markers.append(post)
    return MarkerArray(markers=markers)


def diagnostic_status(
    name: str, hardware_id: str, level: bytes, message: str, values: Mapping[str, object]
) -> DiagnosticStatus:
    """One diagnostic_msgs/DiagnosticStatus; level is DiagnosticStatus.OK/WARN/ERROR/STALE."""
    return DiagnosticStatus(
        level=level,
        name=name,
        message=message,
        hardware_id=hardware_id,
        values=[KeyValue(key=k, value=str(v)) for k, v in values.items()],
    )


# --- solve outcomes -----------------------------------------------------------------------


@dataclass(frozen=True)
class SolveValues:
    """One MPC solve of a robot's controller (layout in the module docstring)."""

    robot: str
    state_time: float
    solve_time: float
    status: str
    success: bool
    fallback: str
    iterations: int


def solve_to_msg(values: SolveValues) -> DiagnosticStatus:
    level = DiagnosticStatus.OK if values.success else DiagnosticStatus.WARN
    return diagnostic_status(
        f"coverage_fleet/{values.robot}/solve",
        values.robot,
        level,
        values.status,
        {
            "state_time": repr(float(values.state_time)),
            "solve_time": repr(float(values.solve_time)),
            "status": values.status,
            "success": "1" if values.success else "0",
            "fallback": values.fallback,
            "iterations": int(values.iterations),
        },
    )


def solve_from_msg(msg: DiagnosticStatus) -> SolveValues:
    values = {kv.key: kv.value for kv in msg.values}
    return SolveValues(
        robot=msg.hardware_id,
        state_time=float(values["state_time"]),
        solve_time=float(values["solve_time"]),
        status=values.get("status", ""),
        success=values.get("success") == "1",
        fallback=values.get("fallback", ""),
        iterations=int(values.get("iterations", "0")),
    )
