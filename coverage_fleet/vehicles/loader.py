"""Vehicle parameter files -> VehicleSpec (model + MPC settings), every problem reported.

A vehicle file is a ROS 2 parameter file with one node entry (normally the wildcard `/**`,
so the same file applies to the controller node in any robot namespace):

    /**:
      ros__parameters:
        vehicle: {model: differential_drive, max_speed: 1.0, ...}
        mpc: {horizon: 20, sample_time: 0.1, ...}
        command: {stamped: false}          # optional: TwistStamped etc. instead of Twist

`vehicle.model` is a built-in name (BUILTIN_MODELS) or an import path
"package.module:ClassName" of a VehicleModel subclass, so a user adds a model without
editing this package. The remaining `vehicle` keys go to the model's constructor. `mpc`
fills MpcSettings field by field (unknown keys, wrong types, bad values, the bounds in
settings.py and the rules that depend on the model are problems), so the control layer may
take a VehicleSpec's settings as valid. The model is then checked (checks.check_model:
shapes, steady states, position invariance). File reading, YAML and the wording of every
fault are the package's one path (coverage_fleet.inputs).
"""

from __future__ import annotations

import hashlib
import importlib
import sys
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from coverage_fleet.errors import ConfigError
from coverage_fleet.inputs.fields import (
    REQUIRED,
    Collector,
    FieldReader,
    NumberRead,
    is_number,
    recording_number_reads,
    required_message,
    type_message,
)
from coverage_fleet.inputs.reader import decode_text, parse_yaml, read_yaml_file, require_mapping
from coverage_fleet.vehicles.base import CommandKind, VehicleModel
from coverage_fleet.vehicles.checks import check_model
from coverage_fleet.vehicles.settings import (
    HORIZON_MAX,
    MAX_ITER_MAX,
    QP_PLUGINS,
    SAMPLE_TIME_MAX,
    SAMPLE_TIME_MIN,
    SOLVER_KEYS,
    SOLVER_PATHS,
    SOLVER_PLUGINS,
    SUBSTEPS_MAX,
    TERMINAL_KINDS,
    WEIGHT_MAX,
    MpcSettings,
    not_stabilisable_reason,
)
from coverage_fleet.vehicles.solver_options import solver_option_problems

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
    #: The `ros__parameters` mapping as written (what a controller declares as parameters).
    parameters: dict[str, Any] = field(default_factory=dict)
    #: Every number read, defaults included, with the range it was checked against (keys
    #: `vehicle.<name>`, `mpc.<name>`): the ranges of the declared node parameters.
    number_reads: tuple[NumberRead, ...] = ()
    #: `command.stamped`: send the stamped message (TwistStamped, AccelStamped,
    #: WrenchStamped) instead of the plain one.
    command_stamped: bool = False


def load_vehicle_file(path: str | Path) -> VehicleSpec:
    """Read and check a vehicle file; raises ConfigError listing every problem."""
    source = str(path)
    # Duplicate keys are reported without the node name and `ros__parameters`.
    document, data = read_yaml_file(path, strip_levels=2)
    return vehicle_from_document(document, data, source)


def load_vehicle_bytes(data: bytes, source: str) -> VehicleSpec:
    """Same as load_vehicle_file for content already read (source names it in problems)."""
    document = parse_yaml(decode_text(data, source), source, strip_levels=2)
    return vehicle_from_document(document, data, source)


def vehicle_from_document(document: Any, data: bytes, source: str) -> VehicleSpec:
    parameters = _ros_parameters(document, source)
    with recording_number_reads() as reads:
        return _vehicle_from_parameters(parameters, data, source, reads)


def _vehicle_from_parameters(
    parameters: dict[str, Any], data: bytes, source: str, reads: list[NumberRead]
) -> VehicleSpec:
    out = Collector(source)
    sections = out.fields(parameters, "")
    vehicle = sections.mapping("vehicle", REQUIRED)
    mpc_section = sections.raw("mpc", {})
    command = out.fields(sections.raw("command", {}), "command", optional=True)
    # Stamped commands (TwistStamped, ...) for drivers that want them; plain by default.
    command_stamped = command.boolean("stamped", False)
    command.check_unknown()
    sections.check_unknown()
    if vehicle is None:
        vehicle = {}
    model_name = vehicle.get("model")
    model_class = _model_class(model_name, vehicle, out)
    model = None
    if model_class is not None:
        params = {k: v for k, v in vehicle.items() if k != "model"}
        try:
            model = model_class(params, source)
        except ConfigError as error:
            out.extend(error)
        except Exception as error:  # user code: report, never a traceback
            out.add("vehicle.model", f"{model_name} could not be built: {error!r}")
    mpc = _read_mpc(mpc_section, model_class, out)
    if model is not None and mpc is not None:
        out.extend(check_model(model, mpc.sample_time, mpc.substeps, source))
    out.raise_if_any()
    assert model is not None and mpc is not None
    model.command_period = mpc.sample_time
    return VehicleSpec(
        model=model,
        mpc=mpc,
        source=source,
        content_hash=hashlib.sha256(data).hexdigest(),
        command_kind=model.command_kind,
        model_name=str(model_name),
        cache_key=_cache_key(data, type(model)),
        parameters=parameters,
        number_reads=tuple(reads),
        command_stamped=command_stamped,
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


def _ros_parameters(document: Any, source: str) -> Any:
    layout = "the ROS 2 parameter file layout '/**: {ros__parameters: {...}}'"
    document = require_mapping(document, source, layout)
    if len(document) != 1:
        names = ", ".join(repr(str(k)) for k in document)
        raise ConfigError.single(source, "", f"one node entry expected, found {names}; "
                                 f"expected {layout}")
    node, entry = next(iter(document.items()))
    if not isinstance(entry, dict) or "ros__parameters" not in entry:
        raise ConfigError.single(source, f"{node}", f"has no 'ros__parameters'; expected "
                                 f"{layout}")
    parameters = entry["ros__parameters"]
    if not isinstance(parameters, dict):
        raise ConfigError.single(source, "ros__parameters", type_message("a mapping",
                                                                         parameters))
    return parameters


def _model_class(
    name: Any, vehicle: dict[str, Any], out: Collector
) -> type[VehicleModel] | None:
    key = "vehicle.model"
    if "model" not in vehicle:
        out.add(key, required_message("a built-in name or 'package.module:ClassName'"))
        return None
    if not isinstance(name, str):
        out.add(key, type_message("a string", name))
        return None
    target = BUILTIN_MODELS.get(name, name)
    if ":" not in target:
        builtins = ", ".join(sorted(BUILTIN_MODELS))
        out.add(key, f"unknown model {name!r}: use a built-in ({builtins}) or an import path "
                "'package.module:ClassName'")
        return None
    module_name, _, class_name = target.partition(":")
    try:
        module = importlib.import_module(module_name)
    except ModuleNotFoundError as error:
        out.add(key, f"cannot import module {module_name!r} ({error}); is it installed or on "
                "PYTHONPATH?")
        return None
    except Exception as error:
        out.add(key, f"importing {module_name!r} failed: {error!r}")
        return None
    cls = getattr(module, class_name, None)
    if cls is None:
        out.add(key, f"module {module_name!r} has no {class_name!r}")
        return None
    if not (isinstance(cls, type) and issubclass(cls, VehicleModel)):
        out.add(key, f"{target} is not a subclass of coverage_fleet.vehicles.base.VehicleModel")
        return None
    return cls


# --- mpc section -------------------------------------------------------------------------


def _read_mpc(
    section: Any, model: type[VehicleModel] | None, out: Collector
) -> MpcSettings | None:
    """Every MPC setting checked, including the rules that depend on the model; those read
    only its class attributes (names, heading, whether it is stabilisable), so they are
    reported even when the model's own parameters are bad. None when anything is wrong."""
    before = len(out.problems)
    read = out.fields(section, "mpc", optional=True)
    d = MpcSettings()
    values: dict[str, Any] = {
        "horizon": read.integer("horizon", d.horizon, minimum=1, maximum=HORIZON_MAX),
        "sample_time": read.number("sample_time", d.sample_time, minimum=SAMPLE_TIME_MIN,
                                   maximum=SAMPLE_TIME_MAX),
        "substeps": read.integer("substeps", d.substeps, minimum=1, maximum=SUBSTEPS_MAX),
        "terminal": read.choice("terminal", TERMINAL_KINDS, d.terminal),
        "offset_weight": read.positive("offset_weight", d.offset_weight, maximum=WEIGHT_MAX),
        "steady_state_margin": read.number("steady_state_margin", d.steady_state_margin,
                                           minimum=0.0, maximum=1.0, exclusive_maximum=True),
        "terminal_shrink": read.number("terminal_shrink", d.terminal_shrink, minimum=0.0,
                                       exclusive_minimum=True, maximum=1.0),
        "terminal_decrease_slack": read.non_negative(
            "terminal_decrease_slack", d.terminal_decrease_slack, maximum=10.0),
        "solver": _read_solver(read.raw("solver", {}), out),
    }
    for name, names_attribute, positive in (
        ("state_weights", "state_names", False),
        ("input_weights", "input_names", True),  # R positive definite
    ):
        names = getattr(model, names_attribute, None)
        weights = _ros_list(read, name)
        if weights is None and names is not None and not read.has(name):
            weights = (DEFAULT_WEIGHT,) * len(names)
        elif weights is not None:
            weights = read.check_numbers(
                name, list(weights), length=None if names is None else len(names),
                hint=", ".join(names or ()), minimum=0.0, exclusive_minimum=positive,
                maximum=WEIGHT_MAX)
        values[name] = weights or ()
    read.check_unknown()
    if model is not None:
        _model_rules(values, model, out)
    if len(out.problems) > before:
        return None
    return MpcSettings(**values)


def _ros_list(read: FieldReader, name: str) -> tuple[Any, ...] | None:
    """A list as a ROS 2 parameter file can type it: not empty, one type throughout."""
    value = read.raw(name)
    if value is None:
        return None
    if isinstance(value, list) and not value:
        read.problem(name, "is empty; leave the key out to use the default (a ROS 2 parameter "
                     "file cannot type an empty list)")
        return None
    if isinstance(value, list) and len({type(v) for v in value}) > 1 and all(
            is_number(v) for v in value):
        read.problem(name, "mixes integers and reals; write every entry as a real (1.0): a "
                     "ROS 2 parameter file needs one type per list")
        return None
    if not isinstance(value, list):
        read.problem(name, type_message("a list of numbers", value))
        return None
    return tuple(value)


def _read_solver(value: Any, out: Collector) -> dict[str, Any]:
    read = out.fields(value, "mpc.solver", optional=True)
    solver: dict[str, Any] = {}
    if read.has("plugin"):
        solver["plugin"] = read.choice("plugin", SOLVER_PLUGINS)
    if read.has("max_iter"):
        solver["max_iter"] = read.integer("max_iter", minimum=1, maximum=MAX_ITER_MAX)
    if read.has("compile"):
        solver["compile"] = read.boolean("compile")
    if read.has("path"):
        solver["path"] = read.choice("path", SOLVER_PATHS)
    if read.has("qp"):
        solver["qp"] = read.choice("qp", QP_PLUGINS)
    if read.has("options"):
        options = read.mapping("options")
        if options is not None:
            for key in options:
                if not isinstance(key, str):
                    read.problem("options", f"option names must be strings, got {key!r}")
            solver["options"] = options
    read.check_unknown(SOLVER_KEYS)
    # The first plugin is the default (control/solver_chain.DEFAULT_PLUGIN).
    plugin = solver.get("plugin") if read.has("plugin") else SOLVER_PLUGINS[0]
    options = solver.get("options") or {}
    if plugin in SOLVER_PLUGINS and all(isinstance(key, str) for key in options):
        for name, message in solver_option_problems(plugin, options):
            out.add(f"mpc.solver.options.{name}", message)
    return solver


def _model_rules(values: dict[str, Any], model: type[VehicleModel], out: Collector) -> None:
    if values["terminal"] != "ellipsoid":
        return
    if not model.stabilisable_at_rest:
        out.add("mpc.terminal", f"{not_stabilisable_reason(model.kind)}: use 'equality'")
        return
    weights = values["state_weights"]
    if model.angle_indices and weights:
        i, j = model.position_indices
        if weights[i] != weights[j]:
            out.add(
                "mpc.state_weights",
                "the two position weights must be equal with an ellipsoid terminal set on a "
                "model with a heading (the set is computed once, at heading 0, and rotated; a "
                "cost that prefers one map axis would not rotate with it)",
            )
