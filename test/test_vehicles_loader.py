"""Vehicle-file loader: the sample files load, and every kind of bad input is reported as a
ConfigError naming file, key and fault (all problems of a file together)."""

from __future__ import annotations

import hashlib
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import casadi as ca
import numpy as np
import pytest
import yaml

from coverage_fleet.errors import ConfigError
from coverage_fleet.vehicles.base import (
    CommandValues,
    OdometryValues,
    SteadyStateFamily,
    VehicleModel,
)
from coverage_fleet.vehicles.loader import BUILTIN_MODELS, load_vehicle_file
from coverage_fleet.vehicles.settings import MpcSettings

REPO = Path(__file__).resolve().parents[1]
SAMPLES = sorted((REPO / "config" / "vehicles").glob("*.yaml"))

ROVER = {
    "model": "differential_drive",
    "max_speed": 1.0,
    "max_yaw_rate": 1.5,
    "footprint_radius": 0.35,
}


def write_vehicle(tmp_path: Path, vehicle: Any, mpc: Any = None, name: str = "v.yaml") -> Path:
    parameters: dict[str, Any] = {"vehicle": vehicle}
    if mpc is not None:
        parameters["mpc"] = mpc
    path = tmp_path / name
    path.write_text(yaml.safe_dump({"/**": {"ros__parameters": parameters}}))
    return path


def problems_of(path: Path) -> list[tuple[str, str]]:
    with pytest.raises(ConfigError) as caught:
        load_vehicle_file(path)
    for problem in caught.value.problems:
        assert problem.source == str(path)
    return [(p.key, p.message) for p in caught.value.problems]


# --- the sample files -------------------------------------------------------------------


def test_every_builtin_has_a_sample_file() -> None:
    names = {yaml.safe_load(p.read_text())["/**"]["ros__parameters"]["vehicle"]["model"]
             for p in SAMPLES}
    assert names == set(BUILTIN_MODELS) & names  # no sample names an unknown model
    assert len(SAMPLES) >= 2


@pytest.mark.parametrize("path", SAMPLES, ids=lambda p: p.stem)
def test_sample_file_loads_with_consistent_settings(path: Path) -> None:
    spec = load_vehicle_file(path)
    assert spec.content_hash == hashlib.sha256(path.read_bytes()).hexdigest()
    assert spec.command_kind == spec.model.command_kind
    assert len(spec.mpc.state_weights) == spec.model.nx
    assert len(spec.mpc.input_weights) == spec.model.nu
    assert spec.mpc.horizon == 20
    assert spec.model.command_period == spec.mpc.sample_time
    expected_terminal = "ellipsoid" if spec.model.stabilisable_at_rest else "equality"
    assert spec.mpc.terminal == expected_terminal


def test_mpc_section_may_be_left_out_and_defaults_are_documented_values(tmp_path: Path) -> None:
    spec = load_vehicle_file(write_vehicle(tmp_path, ROVER))
    defaults = MpcSettings()
    assert spec.mpc.horizon == defaults.horizon == 20
    assert spec.mpc.sample_time == defaults.sample_time == 0.1
    assert spec.mpc.state_weights == (1.0, 1.0, 1.0)
    assert spec.mpc.input_weights == (1.0, 1.0)
    assert spec.model.max_reverse_speed == 0.0  # documented default


# --- file-level faults ------------------------------------------------------------------


def test_missing_file(tmp_path: Path) -> None:
    assert problems_of(tmp_path / "absent.yaml") == [("", "file not found")]


def test_bad_yaml_names_line(tmp_path: Path) -> None:
    path = tmp_path / "bad.yaml"
    path.write_text("/**:\n  ros__parameters:\n    vehicle: [unclosed\n")
    [(key, message)] = problems_of(path)
    assert key == "" and message.startswith("not valid YAML (line")


def test_missing_ros_parameters(tmp_path: Path) -> None:
    path = tmp_path / "flat.yaml"
    path.write_text(yaml.safe_dump({"/**": {"vehicle": ROVER}}))
    [(key, message)] = problems_of(path)
    assert key == "/**" and "has no 'ros__parameters'" in message


def test_not_a_parameter_file(tmp_path: Path) -> None:
    path = tmp_path / "list.yaml"
    path.write_text("- 1\n- 2\n")
    [(_, message)] = problems_of(path)
    assert "ROS 2 parameter file layout" in message


# --- model selection --------------------------------------------------------------------


def test_unknown_builtin_lists_the_builtins(tmp_path: Path) -> None:
    [(key, message)] = problems_of(write_vehicle(tmp_path, {**ROVER, "model": "hovercraft"}))
    assert key == "vehicle.model"
    assert "unknown model 'hovercraft'" in message and "differential_drive" in message


def test_import_failure_is_reported(tmp_path: Path) -> None:
    path = write_vehicle(tmp_path, {**ROVER, "model": "no_such_pkg.models:Boat"})
    [(key, message)] = problems_of(path)
    assert key == "vehicle.model"
    assert "cannot import module 'no_such_pkg.models'" in message and "PYTHONPATH" in message


def test_import_path_to_missing_class_or_non_model(tmp_path: Path) -> None:
    missing = write_vehicle(tmp_path, {**ROVER, "model": f"{__name__}:Nothing"}, name="a.yaml")
    assert problems_of(missing) == [
        ("vehicle.model", f"module '{__name__}' has no 'Nothing'")
    ]
    not_model = write_vehicle(tmp_path, {**ROVER, "model": f"{__name__}:ROVER"}, name="b.yaml")
    [(_, message)] = problems_of(not_model)
    assert "is not a subclass of coverage_fleet.vehicles.base.VehicleModel" in message


# --- every problem of a file at once ----------------------------------------------------


def test_all_problems_are_collected_together(tmp_path: Path) -> None:
    vehicle = {**ROVER, "max_speed": -1, "max_yaw_rate": "fast", "wheel_count": 4}
    del vehicle["footprint_radius"]
    mpc = {
        "horizon": 0,
        "sample_time": True,
        "terminal": "ellipsoid",
        "state_weights": [1.0, 1.0],
        "input_weights": [1, 0.5],
        "solver_name": "ipopt",
    }
    found = dict(problems_of(write_vehicle(tmp_path, vehicle, mpc)))
    assert found["vehicle.max_speed"] == "must be greater than 0, got -1"
    assert found["vehicle.max_yaw_rate"] == "must be a number, got 'fast'"
    assert found["vehicle.footprint_radius"] == "is required"
    assert found["vehicle.wheel_count"] == (
        "unknown key (allowed: footprint_radius, max_reverse_speed, max_speed, max_yaw_rate)")
    assert found["mpc.horizon"] == "must be at least 1, got 0"
    assert found["mpc.sample_time"] == "must be a number, got True"
    assert "not stabilisable at rest" in found["mpc.terminal"]
    assert "use 'equality'" in found["mpc.terminal"]
    assert found["mpc.state_weights"] == "must be a list of 3 numbers (x, y, yaw), got [1.0, 1.0]"
    assert "mixes integers and reals" in found["mpc.input_weights"]
    assert found["mpc.solver_name"].startswith("unknown key (allowed: horizon, ")
    assert len(found) == 10


def test_mpc_value_rules(tmp_path: Path) -> None:
    mpc = {
        "substeps": 2.5,
        "input_weights": [0.0, 1.0],
        "offset_weight": -3.0,
        "steady_state_margin": 1.0,
        "terminal_shrink": 0.0,
        "solver": [1, 2],
        "state_weights": [],
    }
    found = dict(problems_of(write_vehicle(tmp_path, ROVER, mpc)))
    assert found == {
        "mpc.substeps": "must be an integer, got 2.5",
        "mpc.input_weights[0]": "must be greater than 0, got 0",
        "mpc.offset_weight": "must be greater than 0, got -3",
        "mpc.steady_state_margin": "must be less than 1, got 1",
        "mpc.terminal_shrink": "must be greater than 0, got 0",
        "mpc.solver": "must be a mapping, got [1, 2]",
        "mpc.state_weights": "is empty; leave the key out to use the default (a ROS 2 "
        "parameter file cannot type an empty list)",
    }


def test_model_parameter_kinds_and_ranges(tmp_path: Path) -> None:
    multirotor = {
        "model": "multirotor",
        "max_speed": 3.0,
        "max_acceleration": float("inf"),
        "polygon_sides": 3,
        "polygon_fit": "middle",
        "drag_coefficient": -0.1,
        "footprint_radius": 0.5,
    }
    found = dict(problems_of(write_vehicle(tmp_path, multirotor, name="m.yaml")))
    assert found == {
        "vehicle.max_acceleration": "must be finite, got inf",
        "vehicle.polygon_sides": "must be at least 4, got 3",
        "vehicle.polygon_fit": "must be one of 'inner', 'outer', got 'middle'",
        "vehicle.drag_coefficient": "must be at least 0, got -0.1",
    }
    car = {
        "model": "car_like",
        "wheelbase": 0.3,
        "max_speed": 3.0,
        "max_steering_angle": 1.6,
        "max_acceleration": 2,
        "max_deceleration": 4,
        "footprint_radius": 0.3,
    }
    found = dict(problems_of(write_vehicle(tmp_path, car, name="c.yaml")))
    assert found == {"vehicle.max_steering_angle": "must be at most 1.4, got 1.6"}


def test_any_single_node_entry_is_accepted_but_not_two(tmp_path: Path) -> None:
    path = tmp_path / "named.yaml"
    named = {"coverage_controller": {"ros__parameters": {"vehicle": ROVER}}}
    path.write_text(yaml.safe_dump(named))
    assert load_vehicle_file(path).model.max_speed == 1.0
    path.write_text(
        yaml.safe_dump(
            {
                "/**": {"ros__parameters": {"vehicle": ROVER}},
                "other": {"ros__parameters": {}},
            }
        )
    )
    [(_, message)] = problems_of(path)
    assert message.startswith("one node entry expected, found '/**', 'other'")


def test_unknown_section_and_missing_vehicle(tmp_path: Path) -> None:
    path = tmp_path / "v.yaml"
    path.write_text(yaml.safe_dump({"/**": {"ros__parameters": {"mpc": {}, "robot": {}}}}))
    found = dict(problems_of(path))
    assert found["robot"] == "unknown key (allowed: command, mpc, vehicle)"
    assert found["vehicle"] == "is required"
    assert found["vehicle.model"].startswith("is required")


def test_command_section_chooses_stamped_commands(tmp_path: Path) -> None:
    rover = (REPO / "config" / "vehicles" / "differential_drive.yaml").read_text()
    assert load_vehicle_file(REPO / "config" / "vehicles" / "differential_drive.yaml"
                             ).command_stamped is False
    stamped = tmp_path / "stamped.yaml"
    stamped.write_text(rover + "    command:\n      stamped: true\n")
    assert load_vehicle_file(stamped).command_stamped is True
    bad = tmp_path / "bad.yaml"
    bad.write_text(rover + "    command:\n      stamped: 'yes'\n      frame: x\n")
    found = dict(problems_of(bad))
    assert found["command.stamped"] == "must be true or false, got 'yes'"
    assert found["command.frame"] == "unknown key (allowed: stamped)"


# --- user models through an import path -------------------------------------------------


class PositionDependentCurrentModel(VehicleModel):
    """A point robot in a current that grows with x: deliberately NOT position invariant."""

    kind = "current_point"
    state_names = ("x", "y")
    input_names = ("vx", "vy")
    command_kind = "twist"

    def __init__(self, params: Mapping[str, Any], source: str) -> None:
        super().__init__(params, source)
        self.current_gradient = float(params.get("current_gradient", 0.1))

    @property
    def footprint_radius(self) -> float:
        return 0.2

    def continuous_dynamics(self, x: ca.SX, u: ca.SX) -> ca.SX:
        return ca.vertcat(u[0] + self.current_gradient * x[0], u[1])

    def state_bounds(self) -> tuple[np.ndarray, np.ndarray]:
        return np.full(2, -np.inf), np.full(2, np.inf)

    def input_bounds(self) -> tuple[np.ndarray, np.ndarray]:
        return np.full(2, -1.0), np.full(2, 1.0)

    def steady_states(self) -> SteadyStateFamily:
        # u_s = -gradient * x_s holds the point still against the current.
        Mu = np.array([[-self.current_gradient, 0.0], [0.0, 0.0]])
        return SteadyStateFamily(("x", "y"), np.eye(2), np.zeros(2), Mu, np.zeros(2))

    def braking_input(self, x: np.ndarray) -> np.ndarray:
        return np.zeros(2)

    def state_from_odometry(self, odom: OdometryValues) -> np.ndarray:
        return np.array([odom.x, odom.y])

    def odometry_from_state(self, x: np.ndarray, u: np.ndarray | None = None) -> OdometryValues:
        return OdometryValues(float(x[0]), float(x[1]), 0.0)

    def command_from_input(self, u: np.ndarray, x: np.ndarray) -> CommandValues:
        return CommandValues("twist", (float(u[0]), float(u[1]), 0.0), (0.0, 0.0, 0.0))

    def input_from_command(self, command: CommandValues, x: np.ndarray) -> np.ndarray:
        return np.clip(np.array(command.linear[:2]), -1.0, 1.0)


def test_cache_key_follows_the_model_code_not_only_the_file(tmp_path: Path) -> None:
    """Editing the user model's module changes the cache key while the vehicle file (and so
    its content hash) stays the same; loading twice unchanged gives the same key."""
    module_dir = tmp_path / "models"
    module_dir.mkdir()
    module = module_dir / "user_current.py"
    code = (
        f"from {__name__} import PositionDependentCurrentModel\n"
        "class Model(PositionDependentCurrentModel):\n"
        "    pass\n"
    )
    module.write_text(code)
    path = write_vehicle(tmp_path, {"model": "user_current:Model", "current_gradient": 0.0})
    with pytest.MonkeyPatch.context() as patch:
        patch.syspath_prepend(str(module_dir))
        first, again = load_vehicle_file(path), load_vehicle_file(path)
        module.write_text(code + "# tuned\n")
        edited = load_vehicle_file(path)
    assert first.cache_key == again.cache_key != first.content_hash
    assert edited.content_hash == first.content_hash
    assert edited.cache_key != first.cache_key


def test_non_invariant_user_model_is_refused(tmp_path: Path) -> None:
    path = write_vehicle(tmp_path, {"model": f"{__name__}:PositionDependentCurrentModel"})
    [(key, message)] = problems_of(path)
    assert key == "vehicle.model"
    assert message.startswith("PositionDependentCurrentModel is not position invariant")


def test_same_user_model_without_the_position_dependence_loads(tmp_path: Path) -> None:
    vehicle = {"model": f"{__name__}:PositionDependentCurrentModel", "current_gradient": 0.0}
    spec = load_vehicle_file(write_vehicle(tmp_path, vehicle))
    assert isinstance(spec.model, PositionDependentCurrentModel)
    assert spec.model_name.endswith(":PositionDependentCurrentModel")


class FullThrottleBrakeModel(PositionDependentCurrentModel):
    """Invariant, but its 'braking' input lies outside its own limits."""

    def braking_input(self, x: np.ndarray) -> np.ndarray:
        return np.array([2.0, 0.0])


def test_user_model_braking_outside_limits_is_refused(tmp_path: Path) -> None:
    vehicle = {"model": f"{__name__}:FullThrottleBrakeModel", "current_gradient": 0.0}
    [(key, message)] = problems_of(write_vehicle(tmp_path, vehicle))
    assert key == "vehicle.model"
    assert message.startswith("braking_input(") and "outside the input limits" in message


class UnfinishedModel(VehicleModel):
    kind = "unfinished"
    state_names = ("x", "y")
    input_names = ("vx", "vy")
    command_kind = "twist"


def test_user_model_missing_methods_is_reported_not_raised(tmp_path: Path) -> None:
    path = write_vehicle(tmp_path, {"model": f"{__name__}:UnfinishedModel"})
    [(key, message)] = problems_of(path)
    assert key == "vehicle.model"
    assert "could not be built" in message and "abstract" in message


# --- the describe tool ------------------------------------------------------------------


def test_describe_prints_limits_or_problems(tmp_path: Path, capsys) -> None:
    from coverage_fleet.vehicles.describe import main

    car = REPO / "config" / "vehicles" / "car_like.yaml"
    assert main([str(car)]) == 0
    out = capsys.readouterr().out
    assert "car_like (CarLikeModel)" in out
    assert "steering_angle   [-0.45, 0.45]" in out and "speed            [-0.5, 3]" in out
    assert "stabilisable at rest: no" in out
    bad = write_vehicle(tmp_path, {**ROVER, "max_speed": -1})
    assert main([str(bad)]) == 2
    err = capsys.readouterr().err
    assert f"{bad}: vehicle.max_speed: must be greater than 0, got -1" in err


def test_solver_vocabulary_matches_the_mpc() -> None:
    """The loader checks `mpc.solver` against settings.SOLVER_PLUGINS / SOLVER_KEYS; the MPC
    must offer exactly those, or a file the loader accepts would fail later."""
    from coverage_fleet.control import solver_chain
    from coverage_fleet.vehicles.settings import SOLVER_KEYS, SOLVER_PLUGINS

    assert set(solver_chain.SOLVER_DEFAULTS) == set(SOLVER_PLUGINS)
    assert solver_chain.DEFAULT_PLUGIN in SOLVER_PLUGINS
    assert set(solver_chain.SOLVER_KEYS) == set(SOLVER_KEYS)


def test_fast_path_vocabulary_matches_the_mpc() -> None:
    """`mpc.solver.path` and `mpc.solver.qp` are checked against settings.SOLVER_PATHS /
    QP_PLUGINS; the real-time path must have options for every QP plugin offered."""
    from coverage_fleet.control import rti, solver_chain
    from coverage_fleet.vehicles.settings import QP_PLUGINS, SOLVER_PATHS

    assert set(rti.QP_DEFAULTS) == set(QP_PLUGINS)
    assert solver_chain.DEFAULT_PATH in SOLVER_PATHS and solver_chain.DEFAULT_QP in QP_PLUGINS


@pytest.mark.parametrize("path", sorted((REPO / "config" / "vehicles").glob("*.yaml")), ids=str)
def test_shipped_vehicle_files_run_the_real_time_path_and_say_so(path: Path) -> None:
    """Issue 13: the fastest path is the shipped default, and the start-up line (controller
    node, `coverage-fleet simulate`) names the path that runs. The shipped files set no
    `path`, so they get the default; measured: the real-time path's closed loops match the
    full solve's cost within 0.1 % (README, Performance)."""
    from coverage_fleet.control.solver_chain import configured_path, describe_path

    settings = load_vehicle_file(path).mpc
    assert "path" not in settings.solver
    assert configured_path(settings) == "real_time"
    line = describe_path(settings)
    assert line.startswith("MPC solver path: real-time SQP iteration (hpipm QP)"), line
    assert "full fatrop solve when rejected, ipopt rescue" in line, line
