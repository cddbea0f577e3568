"""The last check before an input leaves the controller: an explicit check (kept under
python -O, which strips `assert`), falling back to braking and logging, exercised by real
cases: odometry that is not finite, and a model whose rest input lies outside its own
input polytope, where clipping towards the rest input cannot reach the limits."""

from __future__ import annotations

import logging
import subprocess
import sys
from pathlib import Path

import numpy as np
from support_control import ORCHARD_BLOCK, DoubleIntegratorModel, polygon_halfspaces

from coverage_fleet.control.controller import (
    FALLBACK_BRAKING,
    FALLBACK_PREVIOUS_PLAN,
    RobotController,
)
from coverage_fleet.control.limits import input_limits
from coverage_fleet.vehicles.base import SteadyStateFamily
from coverage_fleet.vehicles.loader import load_vehicle_file
from coverage_fleet.vehicles.settings import MpcSettings

REPO = Path(__file__).resolve().parents[1]
REGION = polygon_halfspaces(ORCHARD_BLOCK)
LOGGER = "coverage_fleet.control.controller"


class RestOutsidePolytopeModel(DoubleIntegratorModel):
    """A double integrator with an extra input row a_x + a_y <= 0.5 whose steady family
    names a rest input (0.8, 0.8) beyond that row: a model that breaks the premise of the
    clipping (rest input inside the limits). The vehicle-file loader does not test the rest
    input against the limits, so such a user model reaches the controller."""

    kind = "test_rest_outside_polytope"

    def input_polytope(self) -> tuple[np.ndarray, np.ndarray]:
        return np.array([[1.0, 1.0]]), np.array([0.5])

    def steady_states(self) -> SteadyStateFamily:
        family = super().steady_states()
        return SteadyStateFamily(
            family.parameter_names, family.Mx, family.x0, family.Mu, np.array([0.8, 0.8])
        )


def _inside(model, u: np.ndarray) -> bool:
    limits = input_limits(model)
    return bool(np.all(np.isfinite(u)) and np.all(limits.G @ u <= limits.g + 1e-9))


def test_clipping_that_cannot_reach_the_limits_falls_back_to_braking(caplog):
    model = RestOutsidePolytopeModel()
    controller = RobotController(model, MpcSettings(), REGION)
    x = np.array([5.0, 5.0, -0.02, -0.02])  # slow: braking (0.2, 0.2) is admissible
    wanted = np.array([0.5, 0.9])  # inside the box, beyond a_x + a_y <= 0.5
    clipped = controller.admissible(wanted)
    assert not _inside(model, clipped)  # the case the check exists for
    with caplog.at_level(logging.WARNING, logger=LOGGER):
        sent, replaced = controller.command(wanted, x)
    np.testing.assert_allclose(sent, model.braking_input(x))
    assert _inside(model, sent)
    assert "input polytope row 0" in replaced and "braking" in replaced
    assert any("braking" in r.getMessage() for r in caplog.records)


def test_odometry_that_is_not_finite_brakes_and_is_logged(caplog):
    """A sensor fault: odometry with NaN velocity. No solve is attempted (a NaN reaching
    fatrop from a cold start can keep it iterating for minutes); with no plan to fly, the
    braking input of a NaN state is NaN, so the rest input is sent, inside the limits."""
    spec = load_vehicle_file(REPO / "config" / "vehicles" / "multirotor.yaml")
    model = spec.model
    controller = RobotController(model, spec.mpc, REGION)
    x = np.array([5.0, 5.0, 0.5, np.nan])
    with caplog.at_level(logging.WARNING, logger=LOGGER):
        step = controller.step(x, np.array([6.0, 6.0]))
    assert not step.success and step.used_fallback and step.fallback == FALLBACK_BRAKING
    assert _inside(model, step.input)
    np.testing.assert_allclose(step.input, model.steady_states().u0)
    assert "not finite" in step.status
    assert any("not finite" in r.getMessage() for r in caplog.records)


def test_odometry_that_is_not_finite_flies_the_previous_plan():
    spec = load_vehicle_file(REPO / "config" / "vehicles" / "multirotor.yaml")
    controller = RobotController(spec.model, spec.mpc, REGION)
    target = np.array([6.0, 6.0])
    good = controller.step(np.array([5.0, 5.0, 0.5, 0.2]), target)
    assert good.success
    step = controller.step(np.array([5.0, 5.0, 0.5, np.nan]), target)
    assert step.fallback == FALLBACK_PREVIOUS_PLAN
    assert _inside(spec.model, step.input)


OPTIMISED_SCRIPT = """
import sys
sys.path.insert(0, sys.argv[1])
import numpy as np
from test_control_command import RestOutsidePolytopeModel, REGION
from coverage_fleet.control.controller import RobotController
from coverage_fleet.vehicles.settings import MpcSettings
assert False, "python -O must strip this"
controller = RobotController(RestOutsidePolytopeModel(), MpcSettings(), REGION)
sent, replaced = controller.command(np.array([0.5, 0.9]), np.array([5.0, 5.0, -0.02, -0.02]))
print("braking" in replaced, float(sent.sum()) <= 0.5 + 1e-9)
"""


def test_the_check_survives_python_optimisation():
    done = subprocess.run(
        [sys.executable, "-O", "-c", OPTIMISED_SCRIPT, str(Path(__file__).parent)],
        capture_output=True, text=True, cwd=REPO, timeout=300,
    )
    assert done.returncode == 0, done.stderr[-3000:]
    assert done.stdout.split() == ["True", "True"]
