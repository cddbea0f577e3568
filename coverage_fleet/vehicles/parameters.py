"""Reading a model's `vehicle` section: typed, range-checked, every problem collected.

A model's __init__ asks for each parameter by name, then calls finish(), which raises one
ConfigError listing every bad, missing or unknown key (keys are reported as
`vehicle.<name>`). Built-in models use it; user models may. The checks and their wording
are the package's one set (coverage_fleet.inputs.fields).

Upper bounds of physical parameters: generous for any robot this package is meant for
(small rovers to survey boats and fast multirotors), and small enough that the solver and
the simulation stay finite. Values beyond them are typing mistakes, not vehicles.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from coverage_fleet.inputs.fields import REQUIRED, FieldReader

__all__ = [
    "ACCELERATION_MAX",
    "DAMPING_MAX",
    "FORCE_MAX",
    "INERTIA_MAX",
    "LENGTH_MAX",
    "MASS_MAX",
    "REQUIRED",
    "SPEED_MAX",
    "YAW_RATE_MAX",
    "ParameterReader",
]

#: m/s: 360 km/h, above racing multirotors (about 50 m/s).
SPEED_MAX = 100.0
#: m/s^2: about 10 g.
ACCELERATION_MAX = 100.0
#: rad/s: about 8 turns per second, above racing multirotors' yaw rates.
YAW_RATE_MAX = 50.0
#: m: footprint radius, wheelbase (a 200 m vessel has a 100 m footprint radius).
LENGTH_MAX = 100.0
#: kg: a 10 000 t vessel.
MASS_MAX = 1e7
#: kg m^2: yaw inertia of such a vessel (mass x (length / 3)^2 is about 1e10).
INERTIA_MAX = 1e11
#: N or N m: thrust and moment limits.
FORCE_MAX = 1e8
#: N s/m, N m s/rad: linear damping coefficients.
DAMPING_MAX = 1e9


class ParameterReader(FieldReader):
    """A FieldReader over a model's parameters, keys reported as `vehicle.<name>`."""

    def __init__(self, params: Mapping[str, Any], source: str, section: str = "vehicle") -> None:
        super().__init__(params, source, section)
