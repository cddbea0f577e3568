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

How close the robots came is measured on the plants' own paths, at every RK4 substep (not
only at the ticks the controllers see): after each step `last_clearance` holds the smallest
clearance between two footprint discs (centre distance minus both radii, metres; negative:
the footprints overlapped) over that step's substeps, the pair and the substep's time. The
last substep is the state after process noise (the state the next tick starts from); the
substeps before it are the noise-free integration under the held input.
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


@dataclass(frozen=True)
class StepClearance:
    """The smallest footprint clearance (m; negative: overlap) of any two plants over one
    plant step, at its substeps: when (s, on the run's clock) and which pair."""

    time: float
    clearance: float
    robots: tuple[str, str]


def smallest_clearance(
    names: Sequence[str], paths: np.ndarray, radii: np.ndarray
) -> tuple[int, float, tuple[str, str]] | None:
    """The smallest footprint clearance over paths (n robots, S samples, 2): (sample index,
    clearance, pair); None with fewer than two robots."""
    n = len(names)
    if n < 2:
        return None
    gaps = np.linalg.norm(paths[:, None, :, :] - paths[None, :, :, :], axis=-1)
    clearance = gaps - (radii[:, None] + radii[None, :])[:, :, None]
    first, second = np.triu_indices(n, k=1)
    pairs = clearance[first, second]  # (pairs, S)
    pair, sample = np.unravel_index(int(np.argmin(pairs)), pairs.shape)
    return int(sample), float(pairs[pair, sample]), (names[first[pair]], names[second[pair]])


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
        self.substeps = int(substeps)
        # One substep function per vehicle (model class and file contents), mapped over
        # its robots: one casadi call per vehicle and step instead of two per robot. Its
        # last column is the next state, the same numbers as discrete_dynamics bit for bit
        # (one expression graph), and casadi's map evaluates it column by column, so every
        # robot's arithmetic is what a call of its own does.
        by_vehicle: dict[tuple[type, str], list[str]] = {}
        models = {}
        for e in entries:
            key = (type(e.vehicle.model), e.vehicle.cache_key)
            by_vehicle.setdefault(key, []).append(e.name)
            models.setdefault(key, e.vehicle.model)
        self._vehicle_groups = []
        for key, names in by_vehicle.items():
            function = models[key].substep_states(step, substeps)
            self._vehicle_groups.append(
                (names, function.map(len(names)) if len(names) > 1 else function)
            )
        self._radii = np.array([e.footprint_radius for e in entries], dtype=float)
        #: The smallest footprint clearance over the last step's substeps (None before the
        #: first step, or with one robot).
        self.last_clearance: StepClearance | None = None
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
        started = self.time
        applied = {name: self.applied_input(name, inputs.get(name)) for name in self.states}
        substep_paths: dict[str, np.ndarray] = {}
        for names, function in self._vehicle_groups:
            out = np.asarray(
                function(np.column_stack([self.states[n] for n in names]),
                         np.column_stack([applied[n] for n in names])),
                float,
            )
            for k, name in enumerate(names):
                substep_paths[name] = out[:, k * self.substeps : (k + 1) * self.substeps]
        paths = np.empty((len(self.states), self.substeps, 2))
        for index, name in enumerate(self.states):
            path = substep_paths[name]
            x_next = path[:, -1].copy()
            i, j = self.entries[name].vehicle.model.position_indices
            if self.noise.process_std > 0:
                x_next[[i, j]] += self._positions_noise(self.noise.process_std)
            paths[index, :, 0] = path[i]
            paths[index, :, 1] = path[j]
            paths[index, -1] = x_next[[i, j]]
            self.states[name] = x_next
        self.ticks += 1
        self._measured = None
        found = smallest_clearance(list(self.states), paths, self._radii)
        if found is not None:
            sample, clearance, pair = found
            self.last_clearance = StepClearance(
                started + (sample + 1) * self.step / self.substeps, clearance, pair
            )
