"""Reading a model's `vehicle` section: typed, range-checked, every problem collected.

A model's __init__ asks for each parameter by name, then calls finish(), which raises one
ConfigError listing every bad, missing or unknown key (keys are reported as
`vehicle.<name>`). Built-in models use it; user models may.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

from coverage_fleet.errors import ConfigError, Problem

#: Marker for "no default: the key is required".
REQUIRED: Any = object()


class ParameterReader:
    def __init__(self, params: Mapping[str, Any], source: str, section: str = "vehicle") -> None:
        self._params = dict(params)
        self._source = source
        self._section = section
        self._used: set[str] = set()
        self.problems: list[Problem] = []

    def key(self, name: str) -> str:
        return f"{self._section}.{name}" if self._section else name

    def problem(self, name: str, message: str) -> None:
        self.problems.append(Problem(self._source, self.key(name), message))

    def _raw(self, name: str, default: Any) -> tuple[bool, Any]:
        self._used.add(name)
        if name in self._params:
            return True, self._params[name]
        if default is REQUIRED:
            self.problem(name, "is required")
            return False, None
        return True, default

    def number(
        self,
        name: str,
        default: Any = REQUIRED,
        *,
        minimum: float | None = None,
        maximum: float | None = None,
        exclusive_minimum: bool = False,
        exclusive_maximum: bool = False,
    ) -> float:
        """A finite real number within [minimum, maximum] (bounds optional, either end may be
        exclusive). Returns NaN after recording a problem so reading can go on."""
        present, value = self._raw(name, default)
        if not present:
            return math.nan
        positive = minimum == 0.0 and exclusive_minimum
        kind = "a positive number" if positive else "a number"
        if isinstance(value, bool) or not isinstance(value, int | float):
            self.problem(name, f"must be {kind}, got {value!r}")
            return math.nan
        value = float(value)
        if not math.isfinite(value):
            self.problem(name, f"must be finite, got {value!r}")
            return math.nan
        if positive and value <= 0.0:
            self.problem(name, f"must be a positive number, got {value:g}")
            return math.nan
        if minimum is not None and (value <= minimum if exclusive_minimum else value < minimum):
            relation = "greater than" if exclusive_minimum else "at least"
            self.problem(name, f"must be {relation} {minimum:g}, got {value:g}")
            return math.nan
        if maximum is not None and (value >= maximum if exclusive_maximum else value > maximum):
            relation = "less than" if exclusive_maximum else "at most"
            self.problem(name, f"must be {relation} {maximum:g}, got {value:g}")
            return math.nan
        return value

    def positive(
        self, name: str, default: Any = REQUIRED, *, maximum: float | None = None
    ) -> float:
        return self.number(name, default, minimum=0.0, exclusive_minimum=True, maximum=maximum)

    def non_negative(self, name: str, default: Any = REQUIRED) -> float:
        return self.number(name, default, minimum=0.0)

    def integer(self, name: str, default: Any = REQUIRED, *, minimum: int | None = None) -> int:
        present, value = self._raw(name, default)
        if not present:
            return 0
        if isinstance(value, bool) or not isinstance(value, int):
            self.problem(name, f"must be an integer, got {value!r}")
            return 0
        if minimum is not None and value < minimum:
            self.problem(name, f"must be at least {minimum}, got {value}")
            return 0
        return value

    def choice(self, name: str, options: Sequence[str], default: Any = REQUIRED) -> str:
        present, value = self._raw(name, default)
        if not present:
            return options[0]
        if value not in options:
            listed = ", ".join(repr(o) for o in options)
            self.problem(name, f"must be one of {listed}, got {value!r}")
            return options[0]
        return value

    def finish(self) -> None:
        """Report unknown keys and raise every problem found so far."""
        for name in sorted(set(self._params) - self._used):
            self.problem(name, "unknown key for this model")
        if self.problems:
            raise ConfigError(self.problems)
