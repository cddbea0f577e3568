"""A robot state from a localization pose (geometry_msgs/PoseWithCovarianceStamped): the pose
gives position and heading in the map frame, but no velocity, which the MPC's dynamic models
need as state. `PoseVelocity` forms it from successive poses.

Rule: backward differences of successive accepted poses (planar velocity in the map frame,
turn rate from the wrapped heading change), passed through a first-order low-pass filter
with time constant `time_constant` (weight dt / (time_constant + dt) on the new difference),
then rotated into the body frame (REP 105: twist in base_link). Why: a difference over one
pose interval amplifies position noise by 1/dt (a 1 cm jitter at 20 Hz reads as 0.2 m/s),
and the filter trades that noise for a lag of about `time_constant` (common practice). The
first pose gives zero velocity; a pose not newer than the previous one is refused
(STAMP_PAST), since a difference over zero or negative time means nothing.

`check_position_covariance` refuses a pose whose localization says the position is too
uncertain: the standard deviation along the worst direction (square root of the largest
eigenvalue of the x-y block of the row-major 6x6 covariance) above `max_position_std`.

Plain Python with explicit times (seconds), so the rules are tested without a ROS graph.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from coverage_fleet.vehicles.base import OdometryValues

from .message_checks import NOT_FINITE, STAMP_PAST, TOO_UNCERTAIN, BadMessageError


def position_std(covariance: Sequence[float]) -> float:
    """Standard deviation (m) of the position along its most uncertain direction: the square
    root of the largest eigenvalue of the x-y block of a row-major 6x6 pose covariance (the
    geometry_msgs/PoseWithCovariance layout: x, y, z, rot x, rot y, rot z)."""
    values = np.asarray(covariance, float)
    if values.size != 36:
        raise BadMessageError(NOT_FINITE, f"covariance of {values.size} values, expected 36")
    block = values.reshape(6, 6)[:2, :2]
    if not np.all(np.isfinite(block)):
        raise BadMessageError(NOT_FINITE, "position covariance is not finite")
    symmetric = 0.5 * (block + block.T)
    return math.sqrt(max(0.0, float(np.linalg.eigvalsh(symmetric)[-1])))


def check_position_covariance(covariance: Sequence[float], max_position_std: float) -> None:
    std = position_std(covariance)
    if std > max_position_std:
        raise BadMessageError(
            TOO_UNCERTAIN,
            f"position standard deviation {std:.3g} m (limit {max_position_std:g} m)",
        )


class PoseVelocity:
    """Successive poses -> odometry values with a filtered finite-difference velocity."""

    def __init__(self, time_constant: float) -> None:
        if not time_constant >= 0.0:
            raise ValueError(f"time_constant must be at least 0, got {time_constant}")
        self.time_constant = float(time_constant)
        self._last: tuple[float, float, float, float] | None = None  # x, y, yaw, stamp
        self._velocity = np.zeros(3)  # vx, vy (map frame), yaw rate

    def update(self, x: float, y: float, yaw: float, stamp: float) -> OdometryValues:
        """The state at this pose (raises BadMessageError for a pose not newer than the
        previous one; the filter then keeps its previous estimate)."""
        if self._last is not None:
            last_x, last_y, last_yaw, last_stamp = self._last
            dt = stamp - last_stamp
            if not dt > 0.0:
                raise BadMessageError(
                    STAMP_PAST, f"pose stamped {-dt:.3g} s before or at the previous pose"
                )
            turn = math.atan2(math.sin(yaw - last_yaw), math.cos(yaw - last_yaw))
            difference = np.array([(x - last_x) / dt, (y - last_y) / dt, turn / dt])
            weight = dt / (self.time_constant + dt)
            self._velocity = self._velocity + weight * (difference - self._velocity)
        self._last = (float(x), float(y), float(yaw), float(stamp))
        vx, vy, yaw_rate = self._velocity
        cos, sin = math.cos(yaw), math.sin(yaw)
        return OdometryValues(
            x=float(x), y=float(y), yaw=float(yaw),
            body_vx=cos * vx + sin * vy, body_vy=-sin * vx + cos * vy, yaw_rate=float(yaw_rate),
        )
