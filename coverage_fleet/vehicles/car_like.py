"""Car-like vehicle: kinematic bicycle referenced at the rear axle (Rajamani, "Vehicle
Dynamics and Control", 2nd ed., 2012, sec. 2.2, with the reference point at the rear axle
so the slip angle is zero):

    x' = v cos(yaw),  y' = v sin(yaw),  yaw' = v tan(delta) / L,  v' = a

State (x, y, yaw, v) in `map`; input (a longitudinal acceleration m/s^2, delta front
steering angle rad). At rest the yaw cannot be changed to first order, so the
linearisation is not stabilisable: terminal equality only.

Command: geometry_msgs/Twist, the conventional interface of car-like bases:
    linear.x  = v_cmd = v + a T   (the speed after one command period T, within the speed
                                    limits)
    angular.z = v_cmd tan(delta) / L   (the yaw rate that speed and steering give)
Inverse (what the simulator applies): a = (v_cmd - v) / T and
delta = atan(L angular.z / v_cmd), both clipped to the limits. At |v_cmd| < 1e-6 m/s the
steering angle is undetermined (a car cannot turn on the spot): it is set to 0 (common
practice for Twist-to-steering converters).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import casadi as ca
import numpy as np

from coverage_fleet.vehicles.base import (
    CommandValues,
    OdometryValues,
    SteadyStateFamily,
    VehicleModel,
)
from coverage_fleet.vehicles.parameters import (
    ACCELERATION_MAX,
    LENGTH_MAX,
    SPEED_MAX,
    ParameterReader,
)
from coverage_fleet.vehicles.planar import wrap_angle

#: Below this commanded speed (m/s) the steering angle cannot be read from a Twist.
STANDSTILL_SPEED = 1e-6


class CarLikeModel(VehicleModel):
    kind = "car_like"
    state_names = ("x", "y", "yaw", "speed")
    input_names = ("acceleration", "steering_angle")
    angle_indices = (2,)
    command_kind = "twist"
    stabilisable_at_rest = False

    def __init__(self, params: Mapping[str, Any], source: str) -> None:
        super().__init__(params, source)
        read = ParameterReader(params, source)
        self.wheelbase = read.positive("wheelbase", maximum=LENGTH_MAX)
        self.max_speed = read.positive("max_speed", maximum=SPEED_MAX)
        self.max_reverse_speed = read.non_negative("max_reverse_speed", 0.0, maximum=SPEED_MAX)
        self.max_steering_angle = read.positive("max_steering_angle", maximum=1.4)
        self.max_acceleration = read.positive("max_acceleration", maximum=ACCELERATION_MAX)
        self.max_deceleration = read.positive("max_deceleration", maximum=ACCELERATION_MAX)
        self._footprint_radius = read.positive("footprint_radius", maximum=LENGTH_MAX)
        read.finish()

    @property
    def footprint_radius(self) -> float:
        return self._footprint_radius

    @property
    def max_planar_speed(self) -> float:
        return max(self.max_speed, self.max_reverse_speed)

    def continuous_dynamics(self, x: ca.SX, u: ca.SX) -> ca.SX:
        v = x[3]
        return ca.vertcat(
            v * ca.cos(x[2]), v * ca.sin(x[2]), v * ca.tan(u[1]) / self.wheelbase, u[0]
        )

    def state_bounds(self) -> tuple[np.ndarray, np.ndarray]:
        return (
            np.array([-np.inf, -np.inf, -np.inf, -self.max_reverse_speed]),
            np.array([np.inf, np.inf, np.inf, self.max_speed]),
        )

    def input_bounds(self) -> tuple[np.ndarray, np.ndarray]:
        """a in [-max_deceleration, max_acceleration] whichever way the car moves."""
        return (
            np.array([-self.max_deceleration, -self.max_steering_angle]),
            np.array([self.max_acceleration, self.max_steering_angle]),
        )

    def steady_states(self) -> SteadyStateFamily:
        Mx = np.zeros((4, 3))
        Mx[0, 0] = Mx[1, 1] = Mx[2, 2] = 1.0
        return SteadyStateFamily(("x", "y", "yaw"), Mx, np.zeros(4), np.zeros((2, 3)), np.zeros(2))

    def manoeuvre_inputs(self, horizon: int, sample_time: float) -> list[np.ndarray]:
        """Shunts: half the horizon one way on full lock, the other half back on the
        opposite lock (a parallel shift sideways, common practice), for either lock and
        either direction first. Each leg speeds up and slows down again at the same rate,
        slow enough to stay within the reverse speed limit; none without reversing."""
        leg = horizon // 2
        if self.max_reverse_speed <= 0.0 or leg < 2:
            return []
        ramp = leg // 2
        peak = 0.8 * min(self.max_reverse_speed, self.max_speed)
        rate = min(peak / (ramp * sample_time), self.max_acceleration, self.max_deceleration)
        profile = np.r_[np.full(ramp, rate), np.full(leg - ramp, -rate * ramp / (leg - ramp))]
        sequences = []
        for lock in (self.max_steering_angle, -self.max_steering_angle):
            for first in (1.0, -1.0):
                inputs = np.zeros((horizon, 2))
                inputs[:leg, 0] = first * profile
                inputs[:leg, 1] = lock
                inputs[leg : 2 * leg, 0] = -first * profile
                inputs[leg : 2 * leg, 1] = -lock
                sequences.append(inputs)
        return sequences

    def braking_input(self, x: np.ndarray) -> np.ndarray:
        # Stop within one command period if the limits allow (v' = a exactly), wheels straight.
        lower, upper = self.input_bounds()
        a = float(np.clip(-float(x[3]) / self.command_period, lower[0], upper[0]))
        return np.array([a, 0.0])

    def yaw_rate(self, speed: float, steering_angle: float) -> float:
        return speed * math.tan(steering_angle) / self.wheelbase

    def state_from_odometry(self, odom: OdometryValues) -> np.ndarray:
        return np.array([odom.x, odom.y, odom.yaw, odom.body_vx], dtype=float)

    def odometry_from_state(self, x: np.ndarray, u: np.ndarray | None = None) -> OdometryValues:
        speed = float(x[3])
        return OdometryValues(
            x=float(x[0]),
            y=float(x[1]),
            yaw=wrap_angle(float(x[2])),
            body_vx=speed,
            yaw_rate=0.0 if u is None else self.yaw_rate(speed, float(u[1])),
        )

    def _speed_limits(self, speed: float) -> float:
        return min(max(speed, -self.max_reverse_speed), self.max_speed)

    def command_from_input(self, u: np.ndarray, x: np.ndarray) -> CommandValues:
        speed = self._speed_limits(float(x[3]) + float(u[0]) * self.command_period)
        return CommandValues(
            "twist", (speed, 0.0, 0.0), (0.0, 0.0, self.yaw_rate(speed, float(u[1])))
        )

    def input_from_command(self, command: CommandValues, x: np.ndarray) -> np.ndarray:
        lower, upper = self.input_bounds()
        speed = float(np.nan_to_num(command.linear[0], nan=float(x[3])))
        speed = self._speed_limits(speed)
        yaw_rate = float(np.nan_to_num(command.angular[2], nan=0.0))
        if abs(speed) < STANDSTILL_SPEED:
            steering = 0.0
        else:
            steering = math.atan(self.wheelbase * yaw_rate / speed)
        acceleration = (speed - float(x[3])) / self.command_period
        return np.clip(np.array([acceleration, steering]), lower, upper)
