"""The simulated robots' plants: integration, process noise and measurement noise, for the
offline simulation and the headless simulator node alike.

Every tick of `step` seconds each plant advances with `substeps` RK4 substeps (finer than
the controllers' own discretisation) under the input it was given, plus process noise on its
position. What a robot's localisation would report is its state plus measurement noise on
the position, drawn once per tick: measuring again within the same tick (the simulator
re-publishing a state while it waits) gives the same values. One numpy generator seeded with
the mission's seed draws all noise in a fixed order (measurement at a tick, robots in roster
order, then process noise of the step, robots in roster order), so both paths see the same
noise for the same seed.

A robot given no input (None) gets its model's braking input: no usable command never means
driving on an old one.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from coverage_fleet.fleet.mission import RobotEntry
from coverage_fleet.vehicles.base import OdometryValues

Pose = tuple[float, float, float]


@dataclass(frozen=True)
class NoiseLevels:
    """Standard deviations (m) added to the positions: per plant step, per measurement."""

    process_std: float = 0.0
    measurement_std: float = 0.0


def initial_state(entry: RobotEntry, start: Pose | OdometryValues) -> np.ndarray:
    """The robot's state at the start: at rest at a pose (x, y, heading), or as given by
    odometry values (pose in `map`, twist in the body frame)."""
    model = entry.vehicle.model
    if not isinstance(start, OdometryValues):
        start = OdometryValues(x=start[0], y=start[1], yaw=start[2])
    return np.asarray(model.state_from_odometry(start), float)


class FleetPlants:
    """The plants of the simulated robots, stepped together."""

    def __init__(
        self,
        entries: Sequence[RobotEntry],
        step: float,
        substeps: int,
        noise: NoiseLevels,
        seed: int,
        starts: Mapping[str, Pose | OdometryValues] | None = None,
        time: float = 0.0,
    ) -> None:
        self.entries = {entry.name: entry for entry in entries}
        self.step = float(step)
        self.noise = noise
        self.rng = np.random.default_rng(seed)
        self.start_time = float(time)
        #: Steps taken: the time is start + ticks * step (no drift from repeated sums).
        self.ticks = 0
        self._dynamics = {
            e.name: e.vehicle.model.discrete_dynamics(step, substeps) for e in entries
        }
        self.states = {
            e.name: initial_state(e, (starts or {}).get(e.name, e.initial_pose)) for e in entries
        }
        self._measured: dict[str, np.ndarray] | None = None

    @property
    def time(self) -> float:
        return self.start_time + self.ticks * self.step

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(self.entries)

    def _positions_noise(self, std: float) -> np.ndarray:
        return self.rng.normal(0.0, std, 2)

    def measure(self) -> dict[str, np.ndarray]:
        """Every robot's measured state at the current time (the same within one tick)."""
        if self._measured is None:
            measured = {}
            for name, x in self.states.items():
                x = x.copy()
                if self.noise.measurement_std > 0:
                    i, j = self.entries[name].vehicle.model.position_indices
                    x[[i, j]] += self._positions_noise(self.noise.measurement_std)
                measured[name] = x
            self._measured = measured
        return {name: x.copy() for name, x in self._measured.items()}

    def braking_input(self, name: str) -> np.ndarray:
        model = self.entries[name].vehicle.model
        return np.asarray(model.braking_input(self.states[name]), float)

    def applied_input(self, name: str, u: np.ndarray | None) -> np.ndarray:
        """The input a robot's plant receives for `u` (braking when there is none)."""
        return self.braking_input(name) if u is None else np.asarray(u, float)

    def advance(self, inputs: Mapping[str, np.ndarray | None]) -> None:
        """Advance every plant by one step; a robot missing from `inputs` or given None
        brakes."""
        for name, x in self.states.items():
            u = self.applied_input(name, inputs.get(name))
            x_next = np.asarray(self._dynamics[name](x, u), float).ravel()
            if self.noise.process_std > 0:
                i, j = self.entries[name].vehicle.model.position_indices
                x_next[[i, j]] += self._positions_noise(self.noise.process_std)
            self.states[name] = x_next
        self.ticks += 1
        self._measured = None
