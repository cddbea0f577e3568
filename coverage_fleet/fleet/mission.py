"""Mission files: one YAML file describes a deployment.

    name: orchard_frost_watch          # optional, default: the file name without suffix;
                                       # a safe file name (it names the trial folder)
    description: ...                   # optional free text
    region:   {vertices: [[x, y], ...]}  (metres, map frame, convex), or
              {geojson: file or inline GeoJSON Polygon in WGS 84 longitude/latitude,
               origin: [longitude, latitude]}  (optional; the map frame is east-north-up
              about the origin, default the centre of the polygon's bounding box;
              geometry/geodetic.py)
    density:  the geometry's density mapping (uniform, gaussian bumps, raster file path
              relative to the mission file)
    density_updates:  optional list of {time: s, density: a density mapping}: scripted
              density changes for rehearsal (fleet/density_updates.py); times strictly
              increasing, within the duration
    roster:   list of robots:
        - name: rover_1                # a valid ROS name, also used as the robot's namespace
          vehicle: diff_drive.yaml     # vehicle parameter file, relative to the mission file;
                                       # a bare name is also looked up in the package's
                                       # config/vehicles (with or without .yaml)
          initial_pose: [x, y, heading]  # simulation only (m, m, rad)
          simulated: true              # false: a real robot (its state comes from the robot)
    gate:       {noise_tolerance, progress_tolerance}  (metres)
    settle:     {distance (m), speed (m/s), dwell (s), stuck_timeout (s)}: when the fleet
                counts as settled (fleet/settling.py); distance must be at least
                progress_tolerance + noise_tolerance (+ 4 x measurement_noise_std)
    simulation: {duration, seed, process_noise_std, measurement_noise_std, plant_substeps,
                 step}
    keep_apart: {enabled (default true), margin (m between footprints, default 0.1),
                 neighbours (rows per snapshot, default 6, 1-32), snapshot_period (s,
                 default the longest sample time), latency (s a snapshot may take to reach
                 a controller, default 0), max_age (s; a controller whose newest snapshot
                 is older brakes, default 1)}: buffered cells in every robot's MPC
                 (control/keep_apart.py); `enabled: false` for comparison runs only

Validation collects every problem (file, dotted key path, what is wrong) before raising one
ConfigError; reading, YAML and the wording of each fault are the package's one path
(coverage_fleet.inputs). Bounds (refused beyond; no deployment needs more, and larger values
hang or overflow the simulation): distances of the gate and settle sections up to 1000 m,
settle speed up to 100 m/s, dwell and stuck_timeout up to one day, duration up to one day
(86400 s), step from 0.001 s to 10 s, plant_substeps up to 1000, noise standard deviations
up to 10 (SI units of each state), seed from 0 to 2**32 - 1.

The roster is a list of independent entries so that robots can be marked real or join and
leave later; nothing downstream assumes a fixed roster.
"""

from __future__ import annotations

import copy
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np

from coverage_fleet.control.gate import GateSettings
from coverage_fleet.control.keep_apart import KEEP_APART_NEIGHBOURS_MAX, KeepApartSettings
from coverage_fleet.errors import ConfigError
from coverage_fleet.fleet.density_updates import DensityUpdate
from coverage_fleet.fleet.settling import HeldCells, SettleSettings, settle_problems
from coverage_fleet.geometry.density import Density, density_from_config
from coverage_fleet.geometry.geodetic import (
    LocalFrame,
    check_lonlat,
    default_origin,
    map_vertices,
    polygon_ring,
)
from coverage_fleet.geometry.region import ConvexRegion
from coverage_fleet.inputs.fields import (
    REQUIRED,
    Collector,
    FieldReader,
    required_message,
    type_message,
)
from coverage_fleet.inputs.names import file_name_problem, robot_name_problem
from coverage_fleet.inputs.reader import (
    decode_text,
    parse_yaml,
    read_bytes,
    read_yaml_file,
    require_mapping,
)
from coverage_fleet.vehicles.loader import VehicleSpec, load_vehicle_file

#: Bounds of the gate, settle and simulation sections (see the module docstring).
DISTANCE_MAX = 1000.0
SPEED_MAX = 100.0
DURATION_MAX = 86400.0
STEP_MIN = 0.001
STEP_MAX = 10.0
PLANT_SUBSTEPS_MAX = 1000
NOISE_STD_MAX = 10.0
SEED_MAX = 2**32 - 1


@dataclass(frozen=True)
class SimulationSettings:
    """Offline simulation settings.

    duration: simulated seconds before giving up on convergence.
    seed: seed of the noise generator (the run is deterministic for a given seed).
    process_noise_std: standard deviation added to every state component per plant step of
        `step` seconds (SI units of each state).
    measurement_noise_std: standard deviation added to every state component the
        controllers and the partition see.
    plant_substeps: RK4 substeps of the plant per `step` (finer than the controllers).
    step: the simulation tick in seconds; default (null) the smallest controller sample time.
        Every robot's sample time must be a whole multiple of it.
    """

    duration: float = 120.0
    seed: int = 0
    process_noise_std: float = 0.0
    measurement_noise_std: float = 0.0
    plant_substeps: int = 10
    step: float | None = None


@dataclass(frozen=True)
class RobotEntry:
    """One robot of the roster."""

    name: str
    vehicle_path: Path
    vehicle: VehicleSpec
    initial_pose: tuple[float, float, float]
    simulated: bool = True

    @property
    def footprint_radius(self) -> float:
        return float(self.vehicle.model.footprint_radius)


@dataclass(frozen=True)
class Mission:
    """A validated mission. `raw` is the parsed file, kept to write the mission as run."""

    name: str
    source: Path
    region: ConvexRegion
    density: Density
    roster: tuple[RobotEntry, ...]
    gate: GateSettings
    simulation: SimulationSettings
    description: str = ""
    raw: dict[str, Any] = field(default_factory=dict)
    settle: SettleSettings = field(default_factory=SettleSettings)
    #: The map frame's geodetic origin when the region was given in longitude/latitude.
    frame: LocalFrame | None = None
    #: Scripted density changes (the `density_updates` section), by time.
    density_updates: tuple[DensityUpdate, ...] = ()
    keep_apart: KeepApartSettings = field(default_factory=KeepApartSettings)

    @property
    def robot_names(self) -> tuple[str, ...]:
        return tuple(r.name for r in self.roster)


def package_config_dir() -> Path | None:
    """The package's config/ folder (source checkout or installed share/ folder)."""
    here = Path(__file__).resolve()
    candidates = [here.parents[2] / "config"]
    try:
        from ament_index_python.packages import get_package_share_directory

        candidates.append(Path(get_package_share_directory("coverage_fleet")) / "config")
    except Exception:
        pass
    for candidate in candidates:
        if (candidate / "vehicles").is_dir():
            return candidate
    return None


def resolve_vehicle_path(value: str, base_dir: Path) -> Path | None:
    """A vehicle file relative to the mission, else a bare name in config/vehicles. A path
    that exists but is no regular file is returned too when it names a .yaml file, so the
    reader reports what it is (a directory, ...) instead of "not found"."""
    direct = (base_dir / value).expanduser()
    if direct.is_file() or (direct.exists() and value.endswith((".yaml", ".yml"))):
        return direct.resolve()
    config = package_config_dir()
    if config is not None and "/" not in value:
        for name in (value, f"{value}.yaml"):
            candidate = config / "vehicles" / name
            if candidate.is_file():
                return candidate.resolve()
    return None


def _read_gate(read: FieldReader) -> GateSettings:
    d = GateSettings()
    settings = GateSettings(
        noise_tolerance=read.non_negative("noise_tolerance", d.noise_tolerance,
                                          maximum=DISTANCE_MAX),
        progress_tolerance=read.positive("progress_tolerance", d.progress_tolerance,
                                         maximum=DISTANCE_MAX),
    )
    # Its meaning changed (distance to the current cell's centroid, not to the target):
    # refused with a pointer rather than silently reinterpreted.
    read.retired("settle_distance", "moved to settle.distance (now measured from the "
                 "centroid of the robot's current cell)")
    read.check_unknown()
    return settings


def _read_settle(read: FieldReader) -> SettleSettings:
    d = SettleSettings()
    settings = SettleSettings(
        distance=read.positive("distance", d.distance, maximum=DISTANCE_MAX),
        speed=read.positive("speed", d.speed, maximum=SPEED_MAX),
        dwell=read.non_negative("dwell", d.dwell, maximum=DURATION_MAX),
        stuck_timeout=read.positive("stuck_timeout", d.stuck_timeout, maximum=DURATION_MAX),
    )
    read.check_unknown()
    return settings


def _read_keep_apart(read: FieldReader) -> KeepApartSettings:
    d = KeepApartSettings()
    settings = KeepApartSettings(
        enabled=read.boolean("enabled", d.enabled),
        margin=read.non_negative("margin", d.margin, maximum=DISTANCE_MAX),
        neighbours=read.integer("neighbours", d.neighbours, minimum=1,
                                maximum=KEEP_APART_NEIGHBOURS_MAX),
        snapshot_period=read.number("snapshot_period", d.snapshot_period, minimum=STEP_MIN,
                                    maximum=STEP_MAX, nullable=True),
        latency=read.non_negative("latency", d.latency, maximum=STEP_MAX),
        max_age=read.positive("max_age", d.max_age, maximum=DURATION_MAX),
    )
    read.check_unknown()
    return settings


def _read_simulation(read: FieldReader) -> SimulationSettings:
    d = SimulationSettings()
    settings = SimulationSettings(
        duration=read.positive("duration", d.duration, maximum=DURATION_MAX),
        seed=read.integer("seed", d.seed, minimum=0, maximum=SEED_MAX),
        process_noise_std=read.non_negative("process_noise_std", d.process_noise_std,
                                            maximum=NOISE_STD_MAX),
        measurement_noise_std=read.non_negative(
            "measurement_noise_std", d.measurement_noise_std, maximum=NOISE_STD_MAX),
        plant_substeps=read.integer("plant_substeps", d.plant_substeps, minimum=1,
                                    maximum=PLANT_SUBSTEPS_MAX),
        step=read.number("step", d.step, minimum=STEP_MIN, maximum=STEP_MAX, nullable=True),
    )
    read.check_unknown()
    return settings


def load_mission(path: str | Path) -> Mission:
    """Read and validate a mission file; raises ConfigError listing every problem."""
    path = Path(path)
    raw, _ = read_yaml_file(path)
    return mission_from_mapping(raw, path)


def load_mission_with(path: str | Path, options: Collector) -> Mission:
    """load_mission, raising the problems already in `options` (a command line's) together
    with the mission's, so every problem is reported at once."""
    try:
        mission = load_mission(path)
    except ConfigError as error:
        options.extend(error)
    options.raise_if_any()
    return mission


def mission_from_mapping(raw: Any, path: Path) -> Mission:
    """Validate an already parsed mission (`path` names it and anchors relative paths)."""
    source = str(path)
    base_dir = path.resolve().parent
    raw = require_mapping(raw, source, "a mission: region, density, roster, ...")
    out = Collector(source)
    top = out.fields(raw, "")

    name = top.text("name", path.stem)
    fault = file_name_problem(name) if name else None
    if fault:
        top.problem("name", fault if "name" in raw else
                    f"{fault} (the default is the file name; give a `name`)")
    description = raw.get("description", "")
    top.raw("description")
    if not isinstance(description, str):
        top.problem("description", type_message("a string", description))
        description = ""

    region, frame = (_load_region(top.raw("region"), base_dir, out) if top.has("region")
                     else (None, None))
    geodetic = isinstance(raw.get("region"), Mapping) and "geojson" in raw["region"]
    # A geodetic region that failed has no frame; a stand-in lets the densities' own
    # checks run (the mission is refused anyway) instead of a misleading "needs a region
    # given in longitude/latitude" on top of the region's problem.
    density_frame = frame if frame is not None or not geodetic else LocalFrame(0.0, 0.0)
    density = None
    if top.has("density"):
        try:
            density = density_from_config(
                top.raw("density"), source, base_dir, region=region, key="density",
                frame=density_frame,
            )
        except ConfigError as error:
            out.extend(error)
    updates = (_load_density_updates(top.raw("density_updates"), base_dir, region,
                                     density_frame, out)
               if top.has("density_updates") else [])
    gate = _read_gate(out.fields(top.raw("gate"), "gate", optional=True))
    settle = _read_settle(out.fields(top.raw("settle"), "settle", optional=True))
    simulation = _read_simulation(out.fields(top.raw("simulation"), "simulation",
                                             optional=True))
    keep_apart = _read_keep_apart(out.fields(top.raw("keep_apart"), "keep_apart",
                                             optional=True))
    roster = (_load_roster(top.raw("roster"), base_dir, region, out)
              if top.has("roster") else [])
    for key in ("region", "density", "roster"):
        if not top.has(key):
            top.problem(key, required_message())
    top.check_unknown()
    if updates and updates[-1].time > simulation.duration:
        out.add(f"density_updates[{len(updates) - 1}].time",
                f"must be at most the simulation duration {simulation.duration:g} s, got "
                f"{updates[-1].time:g}")
    if roster and not out.problems:
        _check_sample_times(roster, simulation, out)
    if roster and not out.problems:
        for key, message in mission_settle_problems(roster, gate, settle, simulation):
            out.add(f"settle.{key}", message)

    out.raise_if_any()
    assert region is not None and density is not None
    return Mission(
        name=name,
        source=path.resolve(),
        region=region,
        density=density,
        roster=tuple(roster),
        gate=gate,
        simulation=simulation,
        description=description,
        raw=dict(raw),
        settle=replace(settle, cells=held_cells(region, roster, keep_apart)),
        frame=frame,
        density_updates=tuple(updates),
        keep_apart=keep_apart,
    )


class RestingHoldBacks(Mapping[str, float]):
    """By robot: how far inside its cell rows its MPC keeps a resting robot (m): the larger
    of the pad v_max * sample_time / 2 (every predicted position) and the terminal set's
    position extent (the steady state), control/mpc.py. The terminal ingredients are
    computed (or read from their cache) on first use, not when the mission loads."""

    def __init__(self, roster: Sequence[RobotEntry]) -> None:
        self._roster = tuple(roster)
        self._values: dict[str, float] | None = None

    def _computed(self) -> dict[str, float]:
        if self._values is None:
            from coverage_fleet.control.terminal import terminal_for_vehicle

            values = {}
            for entry in self._roster:
                model, mpc = entry.vehicle.model, entry.vehicle.mpc
                terminal, _ = terminal_for_vehicle(entry.vehicle)
                values[entry.name] = max(float(model.max_planar_speed) * mpc.sample_time / 2.0,
                                         float(terminal.position_extent))
            self._values = values
        return self._values

    def __getitem__(self, name: str) -> float:
        return self._computed()[name]

    def __iter__(self):
        return iter(entry.name for entry in self._roster)

    def __len__(self) -> int:
        return len(self._roster)


def held_cells(
    region: ConvexRegion, roster: Sequence[RobotEntry], keep_apart: KeepApartSettings
) -> HeldCells | None:
    """The buffered cells the settle monitor measures "near" in (fleet/settling.py); None
    with keep-apart off. Each robot's cell is pulled in by what its MPC keeps clear at rest
    (`RestingHoldBacks`)."""
    if not keep_apart.enabled:
        return None
    return HeldCells(
        region=region,
        radii={e.name: e.footprint_radius for e in roster},
        pads=RestingHoldBacks(roster),
        margin=keep_apart.margin,
    )


def with_roster(mission: Mission, roster: Sequence[RobotEntry]) -> Mission:
    """The mission with another roster (a sizing study's fleet), its settle cells rebuilt
    for those robots (not checked as a file is: the caller builds valid entries)."""
    return replace(
        mission,
        roster=tuple(roster),
        settle=replace(mission.settle,
                       cells=held_cells(mission.region, roster, mission.keep_apart)),
    )


def with_keep_apart(mission: Mission, enabled: bool) -> Mission:
    """The mission with keep-apart turned on or off (a study's comparison, `batch
    --keep-apart`): its settings, the settle monitor's cells and the mission as run."""
    keep_apart = replace(mission.keep_apart, enabled=bool(enabled))
    raw = dict(mission.raw)
    raw["keep_apart"] = {**(raw.get("keep_apart") or {}), "enabled": bool(enabled)}
    return replace(
        mission,
        keep_apart=keep_apart,
        raw=raw,
        settle=replace(mission.settle,
                       cells=held_cells(mission.region, mission.roster, keep_apart)),
    )


def _load_density_updates(
    value: Any, base_dir: Path, region: ConvexRegion | None, frame: LocalFrame | None,
    out: Collector,
) -> list[DensityUpdate]:
    """The `density_updates` section: [{time, density}], times strictly increasing."""
    if not isinstance(value, list) or not value:
        out.add("density_updates", type_message("a non-empty list of {time, density}", value))
        return []
    updates: list[DensityUpdate] = []
    for index, item in enumerate(value):
        where = f"density_updates[{index}]"
        before = len(out.problems)
        read = out.fields(item, where)
        if len(out.problems) > before:
            continue
        time = read.positive("time", maximum=DURATION_MAX)
        mapping = read.raw("density", REQUIRED)
        read.check_unknown()
        if mapping is REQUIRED:
            read.problem("density", required_message("a density mapping (as `density`)"))
            continue
        try:
            density = density_from_config(mapping, out.source, base_dir, region=region,
                                          key=f"{where}.density", frame=frame)
        except ConfigError as error:
            out.extend(error)
            continue
        if time is None or len(out.problems) > before:
            continue
        if updates and time <= updates[-1].time:
            read.problem("time", f"must be later than the previous update's "
                         f"{updates[-1].time:g} s, got {time:g}")
            continue
        updates.append(DensityUpdate(time, density))
    return updates


def _load_region(
    value: Any, base_dir: Path, out: Collector
) -> tuple[ConvexRegion | None, LocalFrame | None]:
    """The region from `vertices` (map frame, metres) or from `geojson` (WGS 84, converted
    to the map frame about `origin`); the frame is None for a region in metres."""
    read = out.fields(value, "region")
    if read.has("geojson"):
        return _load_geodetic_region(read, base_dir, out)
    vertices = read.raw("vertices", REQUIRED)
    read.check_unknown()
    if vertices is REQUIRED:
        read.problem("vertices", required_message(
            "polygon vertices [[x, y], ...] in metres (or `geojson` in longitude/latitude)"))
        return None, None
    try:
        return ConvexRegion.from_vertices(vertices, source=out.source,
                                          key="region.vertices"), None
    except ConfigError as error:
        out.extend(error)
    return None, None


def _load_geodetic_region(
    read: FieldReader, base_dir: Path, out: Collector
) -> tuple[ConvexRegion | None, LocalFrame | None]:
    document = read.raw("geojson")
    origin = read.raw("origin")
    if read.has("vertices"):
        read.raw("vertices")
        out.add("region", "give exactly one of 'vertices' (metres, map frame) or 'geojson' "
                "(WGS 84 longitude/latitude)")
    read.check_unknown()
    where = "region.geojson"
    source = out.source
    if isinstance(document, str):
        path = Path(document).expanduser()
        path = path if path.is_absolute() else base_dir / path
        try:
            document = parse_yaml(decode_text(read_bytes(path, source=source, key=where),
                                              source, where), str(path))
        except ConfigError as error:
            out.extend(error)
            return None, None
        # Faults inside the GeoJSON file name that file and their key in it.
        source, where = str(path), ""
    if origin is not None:
        problems = check_lonlat(origin, out.source, "region.origin")
        if problems:
            out.extend(problems)
            return None, None
    try:
        ring, ring_key = polygon_ring(document, source, where)
        frame = LocalFrame(*(origin if origin is not None else default_origin(ring)))
        vertices = map_vertices(ring, frame, source, ring_key)
        # Convexity and the other region rules, judged in the map frame.
        region = ConvexRegion.from_vertices(vertices, source=source, key=ring_key)
    except ConfigError as error:
        out.extend(error)
        return None, None
    return region, frame


def _load_roster(
    value: Any, base_dir: Path, region: ConvexRegion | None, out: Collector
) -> list[RobotEntry]:
    if not isinstance(value, list) or not value:
        out.add("roster", type_message("a non-empty list of robots", value))
        return []
    entries: list[RobotEntry] = []
    seen: dict[str, int] = {}
    for index, item in enumerate(value):
        where = f"roster[{index}]"
        before = len(out.problems)
        read = out.fields(item, where)
        if len(out.problems) > before:
            continue

        name = read.raw("name", REQUIRED)
        if name is REQUIRED:
            read.problem("name", required_message())
        else:
            fault = robot_name_problem(name)
            if fault:
                read.problem("name", fault)
            elif name in seen:
                read.problem("name", f"duplicate robot name {name!r} (also roster[{seen[name]}])")
            else:
                seen[name] = index
        simulated = read.boolean("simulated", True)
        pose = read.numbers("initial_pose", length=3, hint="x, y, heading in metres and radians")
        spec, vehicle_path = _load_vehicle(read.raw("vehicle", REQUIRED), f"{where}.vehicle",
                                           base_dir, out)
        read.check_unknown()
        if pose is not None and region is not None:
            radius = float(spec.model.footprint_radius) if spec is not None else 0.0
            if not inside_with_footprint(region, pose[:2], radius):
                read.problem(
                    "initial_pose",
                    f"position ({pose[0]:g}, {pose[1]:g}) is outside the region"
                    + (f" (the footprint, radius {radius:g} m, must fit inside)" if radius else ""),
                )
        if len(out.problems) == before and spec is not None and pose is not None:
            entries.append(
                RobotEntry(
                    name=name,
                    vehicle_path=vehicle_path,
                    vehicle=spec,
                    initial_pose=(pose[0], pose[1], pose[2]),
                    simulated=simulated,
                )
            )
    if len(entries) == len(value):
        _check_separation(entries, out)
    return entries


def inside_with_footprint(region: ConvexRegion, point, radius: float) -> bool:
    """True when a disc of `radius` about `point` lies inside the region (the MPC keeps the
    footprint inside the region, so a robot must start that way too)."""
    A, b = region.halfspaces()
    return bool(np.all(A @ np.asarray(point, float) <= b - radius + 1e-9))


def _load_vehicle(
    value: Any, where: str, base_dir: Path, out: Collector
) -> tuple[VehicleSpec | None, Path | None]:
    if value is REQUIRED:
        out.add(where, required_message("path of a vehicle parameter file"))
        return None, None
    if not isinstance(value, str) or not value:
        out.add(where, type_message("a file path", value))
        return None, None
    path = resolve_vehicle_path(value, base_dir)
    if path is None:
        out.add(where, f"file not found ({value!r}; looked in {base_dir} and the package's "
                "config/vehicles)")
        return None, None
    try:
        return load_vehicle_file(path), path
    except ConfigError as error:
        out.add(
            where, f"vehicle file {path} does not load ({len(error.problems)} problem(s) below)"
        )
        out.extend(error)
    return None, path


def _check_separation(entries: list[RobotEntry], out: Collector) -> None:
    """Two robots whose footprints overlap at their initial poses cannot both be there."""
    for i, first in enumerate(entries):
        for j in range(i + 1, len(entries)):
            second = entries[j]
            gap = math.dist(first.initial_pose[:2], second.initial_pose[:2])
            needed = first.footprint_radius + second.footprint_radius
            if gap < needed:
                out.add(
                    f"roster[{j}].initial_pose",
                    f"{second.name!r} is {gap:.3g} m from {first.name!r} (roster[{i}]); their "
                    f"footprints need at least {needed:.3g} m",
                )


def _check_sample_times(
    roster: list[RobotEntry], simulation: SimulationSettings, out: Collector
) -> None:
    step = simulation_step(roster, simulation)
    for index, entry in enumerate(roster):
        ratio = entry.vehicle.mpc.sample_time / step
        if abs(ratio - round(ratio)) > 1e-6 or round(ratio) < 1:
            out.add(
                f"roster[{index}].vehicle",
                f"sample time {entry.vehicle.mpc.sample_time:g} s of {entry.name!r} is not a "
                f"whole multiple of the simulation step {step:g} s",
            )


def mission_settle_problems(
    roster: tuple[RobotEntry, ...] | list[RobotEntry],
    gate: GateSettings,
    settle: SettleSettings,
    simulation: SimulationSettings,
) -> list[tuple[str, str]]:
    """settle_problems (fleet/settling.py) with the mission's gate, noise and sample times."""
    return settle_problems(
        settle, gate.noise_tolerance, gate.progress_tolerance,
        measurement_noise_std=simulation.measurement_noise_std,
        process_noise_std=simulation.process_noise_std,
        sample_time=min(entry.vehicle.mpc.sample_time for entry in roster),
    )


def simulation_step(
    roster: tuple[RobotEntry, ...] | list[RobotEntry], settings: SimulationSettings
) -> float:
    """The simulation tick: the configured step or the smallest controller sample time."""
    if settings.step is not None:
        return settings.step
    return min(entry.vehicle.mpc.sample_time for entry in roster)


def _resolve_paths(value: Any, base_dir: Path) -> Any:
    """Copy of a parsed mapping with every string naming an existing file (relative to the
    mission) replaced by its absolute path, so the copy works from anywhere."""
    if isinstance(value, Mapping):
        return {k: _resolve_paths(v, base_dir) for k, v in value.items()}
    if isinstance(value, list):
        return [_resolve_paths(v, base_dir) for v in value]
    if isinstance(value, str) and value and (base_dir / value).is_file():
        return str((base_dir / value).resolve())
    return value


def mission_as_run(
    mission: Mission,
    seed: int,
    duration: float,
    initial_poses: Mapping[str, tuple[float, float, float]] | None = None,
) -> dict[str, Any]:
    """The mission mapping a run used: resolved file paths, the seed and duration actually
    used and the initial poses (which batch runs draw at random). Loading it again with
    load_mission reproduces the run."""
    base_dir = mission.source.parent
    raw = {k: _resolve_paths(v, base_dir) for k, v in mission.raw.items()}
    raw["name"] = mission.name
    if mission.frame is not None:
        # The origin actually used, so that the map frame of the run is on record.
        raw["region"] = {**raw["region"], "origin": [mission.frame.longitude,
                                                     mission.frame.latitude]}
    roster = []
    for entry, item in zip(mission.roster, raw["roster"], strict=True):
        item = dict(item)
        item["vehicle"] = str(entry.vehicle_path)
        pose = (initial_poses or {}).get(entry.name, entry.initial_pose)
        item["initial_pose"] = [float(v) for v in pose]
        roster.append(item)
    raw["roster"] = roster
    simulation = dict(raw.get("simulation") or {})
    simulation["seed"] = int(seed)
    simulation["duration"] = float(duration)
    raw["simulation"] = simulation
    return raw


#: Where a self-contained trial or recording keeps the copies of the mission's data files.
DATA_FOLDER = "data"


def bundle_data_files(as_run: dict[str, Any]) -> dict[str, Path]:
    """Make a mission as run name copies of its data files (raster densities, GeoJSON
    regions, the densities of scheduled updates): every absolute path of an existing file
    outside the roster (whose vehicle files have their own folder) becomes
    `data/<file name>`, changed in place. Returns {copy name: file read}; loading the
    mission as run from a folder holding the copies reproduces the run without the
    originals."""
    copies: dict[str, Path] = {}
    by_source: dict[Path, str] = {}

    def replace(value: Any) -> Any:
        if isinstance(value, Mapping):
            return {k: replace(v) for k, v in value.items()}
        if isinstance(value, list):
            return [replace(v) for v in value]
        if isinstance(value, str) and Path(value).is_absolute() and Path(value).is_file():
            source = Path(value)
            if source not in by_source:
                name = f"{DATA_FOLDER}/{source.name}"
                # Two files of one name from different folders: number the later ones.
                count = 1
                while name in copies:
                    count += 1
                    name = f"{DATA_FOLDER}/{source.stem}-{count}{source.suffix}"
                by_source[source] = name
                copies[name] = source
            return by_source[source]
        return value

    for key in list(as_run):
        if key != "roster":
            as_run[key] = replace(as_run[key])
    return copies


def with_vehicle_overrides(
    mission: Mission, overrides: Mapping[str, str | Path], options: Collector
) -> Mission:
    """The mission with some robots' vehicle files replaced (the launcher's `--vehicle
    ROBOT=FILE`), checked exactly as a mission file is (vehicle file, sample time against the
    simulation step, footprints at the initial poses, settle tolerances), before anything
    starts. Problems land in `options` (the command line's) and are raised together. The
    returned mission's `raw` names the files actually used, so the mission as run
    reproduces the run."""
    if not overrides:
        options.raise_if_any()
        return mission
    raw = copy.deepcopy(mission.raw)
    names = list(mission.robot_names)
    for robot, path in overrides.items():
        if robot not in names:
            options.add("--vehicle", f"{robot!r} is not in the roster ({', '.join(names)})")
            continue
        raw["roster"][names.index(robot)]["vehicle"] = str(Path(path).resolve())
    try:
        changed = mission_from_mapping(raw, mission.source)
    except ConfigError as error:
        options.extend(error)
    options.raise_if_any()
    return changed
