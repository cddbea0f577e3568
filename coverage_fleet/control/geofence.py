"""The geofence around the region: brake when outside, then return when safe.

A robot can end up outside the region (pushed, blown by wind or current, a localisation
jump). The tracking MPC keeps the predicted positions inside the region as hard
constraints, so from outside it is infeasible and its fallbacks only brake: the robot would
sit outside for good. The geofence decides per state:

- inside:    the robot is inside, or outside by no more than `margin` (position noise at
             the boundary); normal tracking.
- braking:   it is more than `margin` outside: braking input until it is slower than
             `rest_speed` (no return manoeuvre at speed).
- returning: outside and at rest: a return plan drives it back in. The return plan is the
             same MPC on a shifted problem: the dynamics do not depend on where the robot
             is (position invariance), so the robot's state is moved by a shift that puts
             it just inside the boundary, and the target by the same shift from the return
             point (`inset` metres inside, beside the nearest boundary point). The MPC's
             first input then drives the real robot towards the return point, with every
             input and speed limit of the vehicle in force. Once inside it is back to
             normal tracking.

This is software on top of the robot's own geofence, never instead of it (README, Safety).
Plain Python on numpy: the controller node calls it per state.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from coverage_fleet.geometry.region import ConvexRegion

INSIDE = "inside"
BRAKING = "braking"
RETURNING = "returning"


@dataclass(frozen=True)
class GeofenceSettings:
    """margin: metres outside the region tolerated before braking; rest_speed: m/s below
    which a braking robot may start its return; inset: metres inside the boundary the return
    plan aims for."""

    margin: float = 0.5
    rest_speed: float = 0.05
    inset: float = 0.5


@dataclass(frozen=True)
class ReturnProblem:
    """The shifted problem: add `shift` to the robot's position, track `target`."""

    shift: np.ndarray
    target: np.ndarray


class Geofence:
    def __init__(self, region: ConvexRegion, settings: GeofenceSettings) -> None:
        self.region = region
        self.settings = settings
        self.mode = INSIDE
        #: Metres outside the region at the last update (0 inside).
        self.outside = 0.0

    def distance_outside(self, xy: Sequence[float]) -> float:
        point = np.asarray(xy, float).reshape(1, 2)
        return float(np.linalg.norm(point - self.region.project(point)))

    def update(self, xy: Sequence[float], speed: float) -> str:
        """The mode for the robot at `xy` moving at planar `speed` (m/s)."""
        self.outside = distance = self.distance_outside(xy)
        if self.mode == INSIDE and distance > self.settings.margin:
            self.mode = BRAKING
        elif self.mode != INSIDE and distance == 0.0:
            self.mode = INSIDE
        if self.mode == BRAKING and speed <= self.settings.rest_speed:
            self.mode = RETURNING
        return self.mode

    def return_problem(self, xy: Sequence[float]) -> ReturnProblem:
        """The shifted problem of a robot outside at `xy` (see the module docstring)."""
        position = np.asarray(xy, float).reshape(2)
        nearest = self.region.project(position.reshape(1, 2))[0]
        towards = nearest - position
        distance = float(np.linalg.norm(towards))
        if distance == 0.0:
            return ReturnProblem(np.zeros(2), position.copy())
        # The return point, `inset` inside beside the nearest boundary point; the shifted
        # robot stands on it, so the shifted target lies as far beyond it (inwards) as it
        # lies from the real robot (kept inside where the region is too shallow there).
        goal = nearest + self.settings.inset * towards / distance
        shift = goal - position
        target = self.region.project((goal + shift).reshape(1, 2))[0]
        return ReturnProblem(shift, target)
