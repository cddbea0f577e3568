"""When is the fleet done? The settle monitor: "settled", "stuck" or still "moving".

The reference gate (control/gate.py) only says whether the fleet may get new targets; a shut
gate alone does not mean the fleet has reached a centroidal Voronoi configuration (CVT):
right after an opening every robot may already be near its new target and nobody can yet be
closer by the progress tolerance. So "settled" is judged on what the fleet is doing now:

    settled: every robot within `distance` of the centroid of its *current* cell (the
             partition at the positions now, not the committed target) and slower than
             `speed`, with the gate shut, all of it held without a break for `dwell` seconds;
    stuck:   the gate shut and every robot slower than `speed` for `stuck_timeout` seconds
             without a break, yet not settled: nobody moves, so nobody will get closer and
             the gate will not open again (a robot cannot reach its target, or the
             tolerances leave a robot short of its centroid);
    moving:  anything else.

Keeping apart (the mission's `keep_apart`): a robot's MPC holds it inside its buffered cell
(geometry/buffered_cells.py), so a robot whose centroid lies beyond its cell comes to rest
at the best admissible point short of it (the offset cost's steady state, control/mpc.py)
and never within `distance` of the centroid. With `SettleSettings.cells` set, "near" is
measured from the point of the robot's buffered cell nearest the centroid of its current
cell instead (cells of the positions now, ages 0, the mission's margin, each robot's cell
pulled in by what its MPC keeps clear of the rows at rest: the larger of the pad
v_max * sample_time / 2 and the terminal set's position extent, fleet/mission.py
RestingHoldBacks): a robot held at its cell boundary is settled, a robot that could still
get closer is not. A robot whose pulled-in cell is empty has no admissible rest at all (its
MPC rests where the soft rows' violation is least, control/mpc.py): it counts as near where
it stands, and only its speed decides. Where the cell does not bind, that point is the
centroid itself, so nothing changes for robots far apart. How much coverage avoidance costs
at such a rest is the report's `held_cvt_gap` (report/metrics.py: Lloyd's iteration
constrained to the same cells).

A robot of the roster that is not taking part (its state or controller not live, so the
partition left it out) is not near its centroid: the fleet is never "settled" without it,
only "stuck" once the rest has been still for `stuck_timeout` (`absent` in `update`).

How the tolerances must relate. The gate opens only when some robot is closer than at the
commit by `progress_tolerance` while no robot is farther by more than `noise_tolerance`. A
fleet can therefore come to a stop with the gate shut for good while a robot is still up to
about progress_tolerance + noise_tolerance from the centroid of its current cell (its target
was within progress_tolerance of where it stood at the commit, it may have slipped back by
noise_tolerance, and the cell moved a little with its neighbours). Measured positions add
their noise to every distance the monitor sees. A settle distance below

    progress_tolerance + noise_tolerance + MEASUREMENT_NOISE_MARGIN * measurement_noise_std

can leave the fleet stopped short of it forever, so such settings are refused
(`settle_problems`). The margin of 4 standard deviations: the distance error of a 2-D
Gaussian position error exceeds k sigma with probability exp(-k^2 / 2) (Rayleigh tail,
common practice), 3e-4 for k = 4, so a dwell of some tens of ticks over a handful of robots
is rarely broken by noise alone. Process noise pushes robots about between controller
samples; give it room on top (not checked: it depends on the vehicles' response).

Noise moves robots too: a controller that sees its position jump by about sigma each
sample and corrects it within a sample drives at about (measurement_noise_std +
process_noise_std) / sample_time. A speed tolerance below that is refused; in practice
a few times it is needed (measured: three rovers with 4 mm measurement and 2 mm process
noise at 0.1 s samples jitter at up to 0.12 m/s, twice that figure).

Speeds are planar speeds of each robot's reference point, |(vx, vy)| of its odometry twist
(offline: the model's odometry of the state and the input being applied; in the ROS graph:
the robot's `odom` twist). A robot turning on the spot counts as slow: coverage depends on
positions only.

Plain Python: the offline simulation and the ROS gate node call the same object.
"""

from __future__ import annotations

from collections.abc import Collection, Mapping
from dataclasses import dataclass
from typing import Literal

import numpy as np

from coverage_fleet.geometry.buffered_cells import admissible_points
from coverage_fleet.geometry.region import ConvexRegion

SettleStatus = Literal["moving", "settled", "stuck"]

#: Standard deviations of measurement noise a settle distance must allow for (see above).
MEASUREMENT_NOISE_MARGIN = 4.0


@dataclass(frozen=True)
class HeldCells:
    """The buffered cells the robots' MPCs hold them to (keep-apart on): the region, every
    robot's footprint radius, how far inside its rows its MPC keeps it at rest (`pads`,
    m, by name) and the margin between footprints (m)."""

    region: ConvexRegion
    radii: Mapping[str, float]
    pads: Mapping[str, float]
    margin: float

    def admissible_targets(
        self, positions: Mapping[str, np.ndarray], targets: Mapping[str, np.ndarray]
    ) -> dict[str, np.ndarray]:
        """By robot (those in `positions`): the point of its buffered cell nearest its
        target (its own position where its cell is empty: no admissible rest exists)."""
        names = tuple(positions)
        A, b = self.region.halfspaces()
        at = np.array([positions[n] for n in names], float).reshape(-1, 2)
        points, has_cell = admissible_points(
            names,
            np.array([positions[n] for n in names], float).reshape(-1, 2),
            np.array([targets[n] for n in names], float).reshape(-1, 2),
            np.array([self.radii[n] for n in names], float),
            self.margin,
            self.region.vertices,
            A,
            b,
            np.array([self.pads[n] for n in names], float),
        )
        points = np.where(has_cell[:, None], points, at)
        return {n: points[k] for k, n in enumerate(names)}


@dataclass(frozen=True)
class SettleSettings:
    """Tolerances of the settle monitor.

    distance: metres from the centroid of its current cell within which a robot counts as
        settled; at least progress_tolerance + noise_tolerance of the gate (see above).
    speed: metres per second below which a robot counts as still.
    dwell: seconds the settled condition must hold without a break.
    stuck_timeout: seconds of a shut gate and a still fleet, not settled, before the run
        is reported stuck; at least `dwell`.
    cells: the buffered cells the robots are held to (None: keep-apart off); "near" is then
        measured from the point of the robot's cell nearest its centroid (see above). Set
        by the mission loader from the mission's keep_apart section, not read from a file.
    """

    distance: float = 0.2
    speed: float = 0.02
    dwell: float = 2.0
    stuck_timeout: float = 10.0
    cells: HeldCells | None = None


def settle_problems(
    settings: SettleSettings,
    noise_tolerance: float,
    progress_tolerance: float,
    measurement_noise_std: float = 0.0,
    process_noise_std: float = 0.0,
    sample_time: float = 0.1,
) -> list[tuple[str, str]]:
    """Why these settings can never (or never reliably) report the fleet settled, as
    (setting name, message) pairs; empty when they are consistent. `sample_time` is the
    shortest controller sample time of the fleet (s). The caller names the file and key
    (mission `settle.<name>`, or the gate node's parameter)."""
    problems = []
    jitter = (measurement_noise_std + process_noise_std) / sample_time
    if settings.speed < jitter:
        problems.append((
            "speed",
            f"{settings.speed:g} m/s is below the speed at which controllers chase the "
            f"noise, (measurement {measurement_noise_std:g} + process {process_noise_std:g} "
            f"m) / sample time {sample_time:g} s = {jitter:g} m/s; use a few times that",
        ))
    needed = (
        progress_tolerance + noise_tolerance + MEASUREMENT_NOISE_MARGIN * measurement_noise_std
    )
    if settings.distance < needed:
        noise = (
            f" + {MEASUREMENT_NOISE_MARGIN:g} x measurement noise std {measurement_noise_std:g}"
            if measurement_noise_std > 0
            else ""
        )
        problems.append((
            "distance",
            f"{settings.distance:g} m can never be reached for sure: the gate may stay shut "
            f"with a robot up to progress tolerance {progress_tolerance:g} + noise tolerance "
            f"{noise_tolerance:g}{noise} = {needed:g} m from its centroid; use at least "
            f"{needed:g} m",
        ))
    if settings.stuck_timeout < settings.dwell:
        problems.append((
            "stuck_timeout",
            f"{settings.stuck_timeout:g} s is shorter than the dwell {settings.dwell:g} s: a "
            "fleet on its way to settling would be reported stuck first",
        ))
    return problems


class SettleMonitor:
    """Tells settled, stuck and moving apart, tick by tick (see the module docstring).

    Call `update` once per partition with the robots taking part (keyed by name); a change
    of that set restarts both clocks (the cells changed, so nothing held before counts).
    """

    def __init__(self, settings: SettleSettings) -> None:
        self.settings = settings
        self._robots: frozenset[str] | None = None
        self._still_since: float | None = None  # gate shut and every robot slow
        self._near_since: float | None = None  # ... and every robot near its centroid
        self.status: SettleStatus = "moving"
        #: The largest speed of a robot, last update.
        self.largest_speed: float = float("nan")
        #: The last update's (positions, centroids, absent) until `largest_distance` is
        #: measured from them (None: measured, in _largest_distance).
        self._unmeasured: tuple[Mapping[str, np.ndarray], Mapping[str, np.ndarray], bool] | None
        self._unmeasured = None
        self._largest_distance = float("nan")

    @property
    def largest_distance(self) -> float:
        """The largest distance of a robot to the centroid of its current cell (under
        keep-apart: to the point of its buffered cell nearest it), last update; inf while
        roster robots are absent."""
        if self._unmeasured is not None:
            self._largest_distance = self._measure(*self._unmeasured)
            self._unmeasured = None
        return self._largest_distance

    def _measure(
        self,
        positions: Mapping[str, np.ndarray],
        centroids: Mapping[str, np.ndarray],
        absent: bool,
    ) -> float:
        targets = (
            centroids if self.settings.cells is None
            else self.settings.cells.admissible_targets(positions, centroids)
        )
        distances = [
            float(np.linalg.norm(np.asarray(positions[n], float) - np.asarray(targets[n], float)))
            for n in positions
        ]
        return np.inf if absent else max(distances)

    def update(
        self,
        time: float,
        positions: Mapping[str, np.ndarray],
        speeds: Mapping[str, float],
        centroids: Mapping[str, np.ndarray],
        gate_shut: bool,
        absent: Collection[str] = (),
    ) -> SettleStatus:
        """The status after this tick. `positions` and `centroids` (of each robot's current
        cell) in metres, `speeds` in m/s; all three must name the same robots. `absent`:
        roster robots not taking part (never settled while there are any)."""
        robots = frozenset(positions)
        if set(speeds) != robots or set(centroids) != robots:
            raise ValueError(
                "positions, speeds and centroids must name the same robots; got "
                f"{sorted(positions)}, {sorted(speeds)} and {sorted(centroids)}"
            )
        if robots != self._robots:
            self._robots = robots
            self._still_since = self._near_since = None
        if not robots:
            self._unmeasured = None
            self._largest_distance = self.largest_speed = float("nan")
            self.status = "moving"
            return self.status
        # The distances are measured only when asked for: a moving fleet's status does not
        # depend on them, and under keep-apart they cost a buffered cell per robot (16
        # robots: 18 ms a tick, 16 % of the offline tick loop, measured with
        # benchmarks/fleet_sim_benchmark.py).
        self._unmeasured = (dict(positions), dict(centroids), bool(absent))
        self.largest_speed = max(float(speeds[n]) for n in robots)
        still = gate_shut and self.largest_speed <= self.settings.speed
        near = still and self.largest_distance <= self.settings.distance
        if not still:
            self._still_since = None
        elif self._still_since is None:
            self._still_since = float(time)
        if not near:
            self._near_since = None
        elif self._near_since is None:
            self._near_since = float(time)

        if near and time - self._near_since >= self.settings.dwell - 1e-9:
            self.status = "settled"
        elif (
            still
            and not near
            and time - self._still_since >= self.settings.stuck_timeout - 1e-9
        ):
            self.status = "stuck"
        else:
            self.status = "moving"
        return self.status
