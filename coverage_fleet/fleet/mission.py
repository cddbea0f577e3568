"""Mission files: one YAML file describes a deployment.

    name: orchard_frost_watch          # optional, default: the file name without suffix
    description: ...                   # optional free text
    region:   {vertices: [[x, y], ...]}  (metres, map frame, convex)
    density:  the geometry's density mapping (uniform, gaussian bumps, raster file path
              relative to the mission file)
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

Validation collects every problem (file, dotted key path, what is wrong) before raising one
ConfigError. The roster is a list of independent entries so that robots can be marked real
or join and leave later; nothing downstream assumes a fixed roster.
"""

from __future__ import annotations

import math
import re
from collections.abc import Mapping
from dataclasses import dataclass, field, fields
from pathlib import Path
from typing import Any

import numpy as np
import yaml

from coverage_fleet.control.gate import GateSettings
from coverage_fleet.errors import ConfigError, Problem
from coverage_fleet.fleet.settling import SettleSettings, settle_problems
from coverage_fleet.geometry.density import Density, density_from_config
from coverage_fleet.geometry.region import ConvexRegion
from coverage_fleet.vehicles.loader import VehicleSpec, load_vehicle_file

TOP_LEVEL_KEYS = (
    "name", "description", "region", "density", "roster", "gate", "settle", "simulation"
)
ROBOT_KEYS = ("name", "vehicle", "initial_pose", "simulated")
REGION_KEYS = ("vertices",)

# ROS 2 names (rmw name validation, as rclpy.validate_node_name / validate_namespace apply
# it): a robot name is used as node name and as namespace token, so it holds only letters,
# digits and underscores, does not start with a digit, and "/" + name fits the namespace
# length limit (245 characters in Kilted; test_fleet_mission checks this against rclpy).
_ROS_TOKEN = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")
_ROS_NAME_MAX = 244


def ros_name_problem(name: str) -> str | None:
    """Why `name` cannot be a ROS node name and namespace, or None when it can."""
    if not name:
        return "is empty"
    if len(name) > _ROS_NAME_MAX:
        return f"is longer than {_ROS_NAME_MAX} characters"
    if name[0].isdigit():
        return "starts with a digit"
    if not _ROS_TOKEN.match(name):
        return "may hold only letters, digits and underscores"
    return None


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
    """A vehicle file relative to the mission, else a bare name in config/vehicles."""
    direct = (base_dir / value).expanduser()
    if direct.is_file():
        return direct.resolve()
    config = package_config_dir()
    if config is not None and "/" not in value:
        for name in (value, f"{value}.yaml"):
            candidate = config / "vehicles" / name
            if candidate.is_file():
                return candidate.resolve()
    return None


class _Collector:
    """Gathers problems against one source file."""

    def __init__(self, source: str) -> None:
        self.source = source
        self.problems: list[Problem] = []

    def add(self, key: str, message: str) -> None:
        self.problems.append(Problem(self.source, key, message))

    def extend(self, error: ConfigError, prefix: str = "") -> None:
        for p in error.problems:
            key = p.key
            if prefix and p.source == self.source and not key.startswith(prefix):
                key = f"{prefix}.{key}" if key else prefix
            self.problems.append(Problem(p.source, key, p.message))

    def unknown_keys(self, mapping: Mapping[str, Any], allowed: tuple[str, ...], where: str):
        for key in mapping:
            if key not in allowed:
                path = f"{where}.{key}" if where else str(key)
                self.add(path, f"unknown key (allowed: {', '.join(allowed)})")


def _is_number(value: Any) -> bool:
    return isinstance(value, int | float) and not isinstance(value, bool) and math.isfinite(value)


def _settings_from(
    cls: type,
    mapping: Any,
    where: str,
    out: _Collector,
    checks: Mapping[str, tuple[type, str]],
) -> Any:
    """Fill a frozen settings dataclass from a mapping, checking each value.

    checks: key -> (type, condition) where condition is one of "positive", "non-negative",
    "any", "positive-or-null".
    """
    if mapping is None:
        return cls()
    if not isinstance(mapping, Mapping):
        out.add(where, f"must be a mapping, got {type(mapping).__name__}")
        return cls()
    allowed = tuple(f.name for f in fields(cls))
    out.unknown_keys(mapping, allowed, where)
    values = {}
    for key, (kind, condition) in checks.items():
        if key not in mapping:
            continue
        value = mapping[key]
        path = f"{where}.{key}"
        if value is None and condition == "positive-or-null":
            values[key] = None
            continue
        if kind is int:
            if not isinstance(value, int) or isinstance(value, bool):
                out.add(path, f"must be an integer, got {value!r}")
                continue
        elif not _is_number(value):
            out.add(path, f"must be a number, got {value!r}")
            continue
        if condition.startswith("positive") and value <= 0:
            out.add(path, f"must be > 0, got {value!r}")
            continue
        if condition == "non-negative" and value < 0:
            out.add(path, f"must be >= 0, got {value!r}")
            continue
        values[key] = kind(value)
    return cls(**values)


GATE_CHECKS = {
    "noise_tolerance": (float, "non-negative"),
    "progress_tolerance": (float, "positive"),
}
SETTLE_CHECKS = {
    "distance": (float, "positive"),
    "speed": (float, "positive"),
    "dwell": (float, "non-negative"),
    "stuck_timeout": (float, "positive"),
}
SIMULATION_CHECKS = {
    "duration": (float, "positive"),
    "seed": (int, "non-negative"),
    "process_noise_std": (float, "non-negative"),
    "measurement_noise_std": (float, "non-negative"),
    "plant_substeps": (int, "positive"),
    "step": (float, "positive-or-null"),
}


def load_mission(path: str | Path) -> Mission:
    """Read and validate a mission file; raises ConfigError listing every problem."""
    path = Path(path)
    source = str(path)
    try:
        text = path.read_text()
    except OSError as error:
        raise ConfigError.single(
            source, "", f"cannot read mission file: {error.strerror}"
        ) from None
    try:
        raw = yaml.safe_load(text)
    except yaml.YAMLError as error:
        mark = getattr(error, "problem_mark", None)
        where = f" (line {mark.line + 1}, column {mark.column + 1})" if mark else ""
        problem = getattr(error, "problem", None) or "invalid YAML"
        raise ConfigError.single(source, "", f"not valid YAML{where}: {problem}") from None
    return mission_from_mapping(raw, path)


def mission_from_mapping(raw: Any, path: Path) -> Mission:
    """Validate an already parsed mission (`path` names it and anchors relative paths)."""
    source = str(path)
    base_dir = path.resolve().parent
    out = _Collector(source)
    if not isinstance(raw, Mapping):
        raise ConfigError.single(source, "", "a mission file must be a mapping of keys")
    out.unknown_keys(raw, TOP_LEVEL_KEYS, "")
    for key in ("region", "density", "roster"):
        if key not in raw:
            out.add(key, "missing (required)")

    name = raw.get("name", path.stem)
    if not isinstance(name, str) or not name:
        out.add("name", f"must be a non-empty string, got {name!r}")
        name = path.stem
    description = raw.get("description", "")
    if not isinstance(description, str):
        out.add("description", "must be a string")
        description = ""

    region = _load_region(raw.get("region"), out) if "region" in raw else None
    density = None
    if "density" in raw:
        try:
            density = density_from_config(
                raw["density"], source, base_dir, region=region, key="density"
            )
        except ConfigError as error:
            out.extend(error, prefix="density")

    gate_raw = raw.get("gate")
    if isinstance(gate_raw, Mapping) and "settle_distance" in gate_raw:
        # Its meaning changed (distance to the current cell's centroid, not to the target):
        # refused with a pointer rather than silently reinterpreted.
        out.add("gate.settle_distance", "moved to settle.distance (now measured from the "
                "centroid of the robot's current cell)")
        gate_raw = {k: v for k, v in gate_raw.items() if k != "settle_distance"}
    gate = _settings_from(GateSettings, gate_raw, "gate", out, GATE_CHECKS)
    settle = _settings_from(SettleSettings, raw.get("settle"), "settle", out, SETTLE_CHECKS)
    simulation = _settings_from(
        SimulationSettings, raw.get("simulation"), "simulation", out, SIMULATION_CHECKS
    )
    roster = _load_roster(raw.get("roster"), base_dir, region, out) if "roster" in raw else ()
    if roster and not out.problems:
        _check_sample_times(roster, simulation, out)
    if roster and not out.problems:
        for key, message in mission_settle_problems(roster, gate, settle, simulation):
            out.add(f"settle.{key}", message)

    if out.problems:
        raise ConfigError(out.problems)
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
        settle=settle,
    )


def _load_region(value: Any, out: _Collector) -> ConvexRegion | None:
    if not isinstance(value, Mapping):
        out.add("region", "must be a mapping with key 'vertices'")
        return None
    out.unknown_keys(value, REGION_KEYS, "region")
    if "vertices" not in value:
        out.add("region.vertices", "missing (required): polygon vertices [[x, y], ...] in metres")
        return None
    try:
        return ConvexRegion.from_vertices(
            value["vertices"], source=out.source, key="region.vertices"
        )
    except ConfigError as error:
        out.extend(error, prefix="region.vertices")
    except (TypeError, ValueError) as error:
        out.add("region.vertices", f"not a list of [x, y] points: {error}")
    return None


def _load_roster(
    value: Any, base_dir: Path, region: ConvexRegion | None, out: _Collector
) -> list[RobotEntry]:
    if not isinstance(value, list) or not value:
        out.add("roster", "must be a non-empty list of robots")
        return []
    entries: list[RobotEntry] = []
    seen: dict[str, int] = {}
    for index, item in enumerate(value):
        where = f"roster[{index}]"
        if not isinstance(item, Mapping):
            out.add(where, "must be a mapping with keys name, vehicle, initial_pose")
            continue
        out.unknown_keys(item, ROBOT_KEYS, where)
        entry_ok = True

        name = item.get("name")
        if name is None:
            out.add(f"{where}.name", "missing (required)")
            entry_ok = False
        elif not isinstance(name, str):
            out.add(f"{where}.name", f"must be a string, got {name!r}")
            entry_ok = False
        else:
            reason = ros_name_problem(name)
            if reason:
                out.add(f"{where}.name", f"{name!r} is not a valid ROS name: it {reason}")
                entry_ok = False
            elif name in seen:
                out.add(
                    f"{where}.name", f"duplicate robot name {name!r} (also roster[{seen[name]}])"
                )
                entry_ok = False
            else:
                seen[name] = index

        simulated = item.get("simulated", True)
        if not isinstance(simulated, bool):
            out.add(f"{where}.simulated", f"must be true or false, got {simulated!r}")
            entry_ok = False

        pose = _load_pose(item.get("initial_pose"), f"{where}.initial_pose", out)
        spec, vehicle_path = _load_vehicle(item.get("vehicle"), f"{where}.vehicle", base_dir, out)
        if pose is None or spec is None:
            entry_ok = False
        if pose is not None and region is not None:
            radius = float(spec.model.footprint_radius) if spec is not None else 0.0
            if not inside_with_footprint(region, pose[:2], radius):
                out.add(
                    f"{where}.initial_pose",
                    f"position ({pose[0]:g}, {pose[1]:g}) is outside the region"
                    + (f" (the footprint, radius {radius:g} m, must fit inside)" if radius else ""),
                )
                entry_ok = False

        if entry_ok:
            entries.append(
                RobotEntry(
                    name=name,
                    vehicle_path=vehicle_path,
                    vehicle=spec,
                    initial_pose=pose,
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


def _load_pose(value: Any, where: str, out: _Collector) -> tuple[float, float, float] | None:
    if value is None:
        out.add(where, "missing (required): [x, y, heading] in metres and radians")
        return None
    if (
        not isinstance(value, list | tuple)
        or len(value) != 3
        or not all(_is_number(v) for v in value)
    ):
        out.add(where, f"must be [x, y, heading] (three numbers), got {value!r}")
        return None
    return (float(value[0]), float(value[1]), float(value[2]))


def _load_vehicle(
    value: Any, where: str, base_dir: Path, out: _Collector
) -> tuple[VehicleSpec | None, Path | None]:
    if value is None:
        out.add(where, "missing (required): path of a vehicle parameter file")
        return None, None
    if not isinstance(value, str) or not value:
        out.add(where, f"must be a file path, got {value!r}")
        return None, None
    path = resolve_vehicle_path(value, base_dir)
    if path is None:
        out.add(
            where,
            f"vehicle file {value!r} not found (looked in {base_dir} and the package's "
            "config/vehicles)",
        )
        return None, None
    try:
        return load_vehicle_file(path), path
    except ConfigError as error:
        out.add(
            where, f"vehicle file {path} does not load ({len(error.problems)} problem(s) below)"
        )
        out.problems.extend(error.problems)
    return None, path


def _check_separation(entries: list[RobotEntry], out: _Collector) -> None:
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
    roster: list[RobotEntry], simulation: SimulationSettings, out: _Collector
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
