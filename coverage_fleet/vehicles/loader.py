"""Vehicle parameter files -> VehicleSpec (model + MPC settings), every problem reported.

A vehicle file is a ROS 2 parameter file with one node entry (normally the wildcard `/**`,
so the same file applies to the controller node in any robot namespace):

    /**:
      ros__parameters:
        vehicle: {model: differential_drive, max_speed: 1.0, ...}
        mpc: {horizon: 20, sample_time: 0.1, ...}

`vehicle.model` is a built-in name (BUILTIN_MODELS) or an import path
"package.module:ClassName" of a VehicleModel subclass, so a user adds a model without
editing this package. The remaining `vehicle` keys go to the model's constructor. `mpc`
fills MpcSettings field by field (unknown keys, wrong types and bad values are problems).
The model is then checked (checks.check_model: shapes, steady states, position invariance).
"""

from __future__ import annotations

import dataclasses
import hashlib
import importlib
import math
import sys
import typing
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import yaml

from coverage_fleet.errors import ConfigError, Problem
from coverage_fleet.vehicles.base import CommandKind, VehicleModel
from coverage_fleet.vehicles.checks import check_model
from coverage_fleet.vehicles.settings import MpcSettings

BUILTIN_MODELS: dict[str, str] = {
    "differential_drive": "coverage_fleet.vehicles.differential_drive:DifferentialDriveModel",
    "car_like": "coverage_fleet.vehicles.car_like:CarLikeModel",
    "multirotor": "coverage_fleet.vehicles.multirotor:MultirotorModel",
    "surface_vessel": "coverage_fleet.vehicles.surface_vessel:SurfaceVesselModel",
}

#: Default weight of each state and input when the file leaves state_weights/input_weights out.
DEFAULT_WEIGHT = 1.0


@dataclass(frozen=True)
class VehicleSpec:
    model: VehicleModel
    mpc: MpcSettings
    source: str
    #: sha256 of the file's bytes (hex): identifies the vehicle for caches and trial logs.
    content_hash: str
    command_kind: CommandKind
    #: The `vehicle.model` value as written (built-in name or import path).
    model_name: str
    #: sha256 over the file's bytes and the source of the module defining the model class:
    #: what caches of derived data (terminal ingredients) should key on, so editing a user
    #: model's code, not only its vehicle file, invalidates them.
    cache_key: str


def load_vehicle_file(path: str | Path) -> VehicleSpec:
    source = str(path)
    try:
        data = Path(path).read_bytes()
    except FileNotFoundError:
        raise ConfigError.single(source, "", "vehicle file not found") from None
    except OSError as error:
        raise ConfigError.single(source, "", f"cannot read vehicle file: {error}") from None
    return load_vehicle_bytes(data, source)


def load_vehicle_bytes(data: bytes, source: str) -> VehicleSpec:
    """Same as load_vehicle_file for content already read (source names it in problems)."""
    parameters = _ros_parameters(data, source)
    problems: list[Problem] = []
    for key in sorted(set(parameters) - {"vehicle", "mpc"}):
        problems.append(Problem(source, key, "unknown section (expected 'vehicle' and 'mpc')"))
    vehicle = parameters.get("vehicle")
    if not isinstance(vehicle, dict):
        problems.append(Problem(source, "vehicle", "missing section (needs at least 'model')"))
        vehicle = {}
    mpc_section = parameters.get("mpc", {})
    if not isinstance(mpc_section, dict):
        problems.append(Problem(source, "mpc", "must be a mapping of MPC settings"))
        mpc_section = {}

    model_name = vehicle.get("model")
    model_class = _model_class(model_name, source, problems)
    model = None
    if model_class is not None:
        params = {k: v for k, v in vehicle.items() if k != "model"}
        try:
            model = model_class(params, source)
        except ConfigError as error:
            problems.extend(error.problems)
        except Exception as error:  # user code: report, never a traceback
            problems.append(
                Problem(source, "vehicle.model", f"{model_name} could not be built: {error!r}")
            )
    mpc_values = _mpc_values(mpc_section, model_class, source, problems)
    if model is not None:
        sample_time = mpc_values.get("sample_time", MpcSettings.sample_time)
        substeps = mpc_values.get("substeps", MpcSettings.substeps)
        if not _is_number(sample_time) or sample_time <= 0:
            sample_time = MpcSettings.sample_time
        if isinstance(substeps, bool) or not isinstance(substeps, int) or substeps < 1:
            substeps = MpcSettings.substeps
        problems += check_model(model, float(sample_time), substeps, source)
    if problems:
        raise ConfigError(problems)
    assert model is not None
    mpc = MpcSettings(**mpc_values)
    model.command_period = mpc.sample_time
    return VehicleSpec(
        model=model,
        mpc=mpc,
        source=source,
        content_hash=hashlib.sha256(data).hexdigest(),
        command_kind=model.command_kind,
        model_name=str(model_name),
        cache_key=_cache_key(data, type(model)),
    )


def _cache_key(data: bytes, model_class: type[VehicleModel]) -> str:
    """File bytes plus the source of every module the model class inherits code from."""
    digest = hashlib.sha256(data)
    modules = dict.fromkeys(cls.__module__ for cls in model_class.__mro__)
    for name in modules:
        module_file = getattr(sys.modules.get(name), "__file__", None)
        try:
            digest.update(Path(module_file).read_bytes() if module_file else name.encode())
        except OSError:
            digest.update(name.encode())
    return digest.hexdigest()


def _ros_parameters(data: bytes, source: str) -> dict[str, Any]:
    try:
        document = yaml.safe_load(data)
    except yaml.YAMLError as error:
        mark = getattr(error, "problem_mark", None)
        where = f" (line {mark.line + 1}, column {mark.column + 1})" if mark else ""
        reason = getattr(error, "problem", None) or str(error)
        raise ConfigError.single(source, "", f"not valid YAML{where}: {reason}") from None
    layout = "expected the ROS 2 parameter file layout '/**: {ros__parameters: {...}}'"
    if not isinstance(document, dict) or not document:
        raise ConfigError.single(source, "", f"empty or not a mapping; {layout}")
    if len(document) != 1:
        names = ", ".join(repr(str(k)) for k in document)
        raise ConfigError.single(source, "", f"one node entry expected, found {names}; {layout}")
    node, entry = next(iter(document.items()))
    if not isinstance(entry, dict) or "ros__parameters" not in entry:
        raise ConfigError.single(source, f"{node}", f"has no 'ros__parameters'; {layout}")
    parameters = entry["ros__parameters"]
    if not isinstance(parameters, dict):
        raise ConfigError.single(source, "ros__parameters", "must be a mapping")
    return parameters


def _model_class(name: Any, source: str, problems: list[Problem]) -> type[VehicleModel] | None:
    key = "vehicle.model"
    if name is None:
        problems.append(Problem(source, key, "is required (a built-in name or 'module:Class')"))
        return None
    if not isinstance(name, str):
        problems.append(Problem(source, key, f"must be a string, got {name!r}"))
        return None
    target = BUILTIN_MODELS.get(name, name)
    if ":" not in target:
        builtins = ", ".join(sorted(BUILTIN_MODELS))
        problems.append(
            Problem(
                source,
                key,
                f"unknown model {name!r}: use a built-in ({builtins}) or an import path "
                "'package.module:ClassName'",
            )
        )
        return None
    module_name, _, class_name = target.partition(":")
    try:
        module = importlib.import_module(module_name)
    except ModuleNotFoundError as error:
        problems.append(
            Problem(
                source,
                key,
                f"cannot import module {module_name!r} ({error}); is it installed or on "
                "PYTHONPATH?",
            )
        )
        return None
    except Exception as error:
        problems.append(Problem(source, key, f"importing {module_name!r} failed: {error!r}"))
        return None
    cls = getattr(module, class_name, None)
    if cls is None:
        problems.append(Problem(source, key, f"module {module_name!r} has no {class_name!r}"))
        return None
    if not (isinstance(cls, type) and issubclass(cls, VehicleModel)):
        problems.append(
            Problem(
                source,
                key,
                f"{target} is not a subclass of coverage_fleet.vehicles.base.VehicleModel",
            )
        )
        return None
    return cls


# --- mpc section -------------------------------------------------------------------------


def _is_number(value: Any) -> bool:
    return isinstance(value, int | float) and not isinstance(value, bool) and math.isfinite(value)


def _parse_typed(value: Any, hint: Any) -> tuple[Any, str | None]:
    """(parsed value, None) or (None, what is wrong), by the dataclass field's type hint."""
    origin = typing.get_origin(hint)
    if hint is int:
        if isinstance(value, int) and not isinstance(value, bool):
            return value, None
        return None, f"must be an integer, got {value!r}"
    if hint is float:
        if _is_number(value):
            return float(value), None
        return None, f"must be a finite number, got {value!r}"
    if hint is str:
        if isinstance(value, str):
            return value, None
        return None, f"must be a string, got {value!r}"
    if origin is typing.Literal:
        options = typing.get_args(hint)
        if value in options:
            return value, None
        return None, f"must be one of {', '.join(repr(o) for o in options)}, got {value!r}"
    if origin is tuple:
        if not isinstance(value, list):
            return None, f"must be a list of numbers, got {value!r}"
        if not value:
            return None, (
                "is empty; leave the key out to use the default (a ROS 2 parameter file "
                "cannot type an empty list)"
            )
        if not all(_is_number(v) for v in value):
            return None, f"must be a list of finite numbers, got {value!r}"
        if len({type(v) for v in value}) > 1:
            return None, (
                "mixes integers and reals; write every entry as a real (1.0): a ROS 2 "
                "parameter file needs one type per list"
            )
        return tuple(float(v) for v in value), None
    if origin is dict:
        if isinstance(value, dict) and all(isinstance(k, str) for k in value):
            return dict(value), None
        return None, f"must be a mapping, got {value!r}"
    return value, None


def _mpc_values(
    section: dict[str, Any],
    model: type[VehicleModel] | None,
    source: str,
    problems: list[Problem],
) -> dict[str, Any]:
    """Checks that depend on the model read only its class attributes (names, whether it is
    stabilisable), so they are reported even when the model's own parameters are bad."""
    hints = typing.get_type_hints(MpcSettings)
    names = [f.name for f in dataclasses.fields(MpcSettings)]
    values: dict[str, Any] = {}
    for key in sorted(set(section) - set(names)):
        problems.append(
            Problem(source, f"mpc.{key}", f"unknown MPC setting (known: {', '.join(names)})")
        )
    for name in names:
        if name not in section:
            continue
        parsed, fault = _parse_typed(section[name], hints[name])
        if fault is None:
            fault = _RULES[name](parsed, model) if name in _RULES else None
        if fault is None:
            values[name] = parsed
        else:
            problems.append(Problem(source, f"mpc.{name}", fault))
    if model is not None:
        values.setdefault("state_weights", (DEFAULT_WEIGHT,) * len(model.state_names))
        values.setdefault("input_weights", (DEFAULT_WEIGHT,) * len(model.input_names))
    return values


def _at_least(low: float) -> Any:
    return lambda v, _m: None if v >= low else f"must be at least {low:g}, got {v:g}"


def _positive(v: float, _m: Any) -> str | None:
    return None if v > 0 else f"must be a positive number, got {v:g}"


def _weights(names_attribute: str, minimum_positive: bool) -> Any:
    def rule(v: tuple[float, ...], model: type[VehicleModel] | None) -> str | None:
        names = getattr(model, names_attribute, None)
        if names is not None and len(v) != len(names):
            return f"needs {len(names)} entries ({', '.join(names)}), got {len(v)}"
        if minimum_positive and min(v) <= 0:
            return f"every entry must be positive (R must be positive definite), got {list(v)}"
        if min(v) < 0:
            return f"every entry must be zero or positive, got {list(v)}"
        return None

    return rule


def _terminal(v: str, model: type[VehicleModel] | None) -> str | None:
    if v == "ellipsoid" and model is not None and not model.stabilisable_at_rest:
        return (
            f"'ellipsoid' needs a linearisation that is stabilisable at rest, which "
            f"{model.__name__} is not; use 'equality'"
        )
    return None


_RULES: dict[str, Any] = {
    "horizon": _at_least(1),
    "sample_time": _positive,
    "substeps": _at_least(1),
    "terminal": _terminal,
    "state_weights": _weights("state_names", minimum_positive=False),
    "input_weights": _weights("input_names", minimum_positive=True),
    "offset_weight": _positive,
    "steady_state_margin": lambda v, _m: None if 0 <= v < 1 else f"must be in [0, 1), got {v:g}",
    "terminal_shrink": lambda v, _m: None if 0 < v <= 1 else f"must be in (0, 1], got {v:g}",
}
