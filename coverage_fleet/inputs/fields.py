"""Field checks, one wording per kind of fault, and the collector of every problem of a file.

Every input (mission, vehicle file, density, raster) is checked here, so the same fault reads
the same in every file: `file: key.path: problem`, every problem of a file at once
(coverage_fleet.errors.ConfigError).

| fault            | wording                                                      |
|------------------|--------------------------------------------------------------|
| missing key      | `is required` (`is required: <what to give>`)                |
| unknown key      | `unknown key (allowed: a, b, c)`                             |
| wrong type       | `must be a number, got 'fast'` (an integer, true or false, ...) |
| not finite       | `must be finite, got inf`                                    |
| below the range  | `must be at least 1, got 0` / `must be greater than 0, got -1` |
| above the range  | `must be at most 500, got 100000` / `must be less than 1, got 1` |
| not an option    | `must be one of 'a', 'b', got 'c'`                           |
| wrong length     | `must be a list of 3 numbers (x, y, heading), got [1, 2]`     |
| duplicate key    | `duplicate key (lines 3 and 7): write each key once`         |
| file faults      | see reader.py (`file not found`, `is a directory, not a file`, ...) |

Why a small hand-written checker and not pydantic v2 (considered; it reports every field
error with its location and can emit a JSON Schema):
1. Wording. pydantic words its own messages ("Input should be greater than 0"); keeping ours
   means a translation table over its error types, as long as this module, which a pydantic
   release may invalidate.
2. Every problem at once. pydantic runs model-level validators only after every field has
   passed, so rules across fields (one weight per state of the chosen model, an ellipsoid
   terminal set on a model that is not stabilisable, a raster's `file` or `values`) would
   come in a second round, or need this collector anyway.
3. The extension point for user vehicle models is "read your `vehicle` section with
   ParameterReader" (a FieldReader); a schema class per model would change it for every
   user model.
4. Deployment. ROS 2 packages take Python dependencies from the OS packages (rosdep key
   python3-pydantic): Debian 12 ships pydantic 1.10 (`apt-cache policy python3-pydantic`:
   1.10.4), as does Ubuntu 24.04 under ROS 2 Jazzy (from memory), and v2 code does not run
   on 1.x.
Given up: a generated JSON Schema for editor completion (the checks here are plain calls,
so a schema would be written by hand if wanted).

Bounds: every number has a range a robotics engineer would accept; the upper bounds refuse
values that would hang or overflow the solver and simulation (they are listed where each
section is read: vehicles/parameters.py, vehicles/settings.py, fleet/mission.py,
geometry/density.py).
"""

from __future__ import annotations

import math
import numbers
from collections.abc import Iterable, Iterator, Mapping, Sequence
from contextlib import contextmanager
from contextvars import ContextVar
from dataclasses import dataclass
from typing import Any

from coverage_fleet.errors import ConfigError, Problem


class _Required:
    def __repr__(self) -> str:
        return "REQUIRED"


#: Marker for "no default: the key is required".
REQUIRED: Any = _Required()

_SHOWN = 60  # characters of a bad value quoted in a message


# --- key paths ---------------------------------------------------------------------------


def join_key(prefix: str, name: str | int) -> str:
    """Dotted key path, list indices as [i]: join_key("roster", 0) -> "roster[0]"."""
    if isinstance(name, int):
        return f"{prefix}[{name}]"
    return f"{prefix}.{name}" if prefix else str(name)


def key_path(parts: Iterable[str | int]) -> str:
    path = ""
    for part in parts:
        path = join_key(path, part)
    return path


# --- the wording of each kind of fault ---------------------------------------------------


def describe(value: Any) -> str:
    """A bad value as quoted in a message (repr, shortened)."""
    text = repr(value)
    return text if len(text) <= _SHOWN else text[: _SHOWN - 3] + "..."


def number_text(value: float | int) -> str:
    return str(value) if isinstance(value, int) else f"{value:g}"


def required_message(hint: str = "") -> str:
    return f"is required: {hint}" if hint else "is required"


def unknown_key_message(allowed: Iterable[str]) -> str:
    return f"unknown key (allowed: {', '.join(allowed)})"


def type_message(expected: str, value: Any) -> str:
    return f"must be {expected}, got {describe(value)}"


def finite_message(value: Any) -> str:
    return f"must be finite, got {describe(value)}"


def below_message(minimum: float, exclusive: bool, value: float) -> str:
    relation = "greater than" if exclusive else "at least"
    return f"must be {relation} {number_text(minimum)}, got {number_text(value)}"


def above_message(maximum: float, exclusive: bool, value: float) -> str:
    relation = "less than" if exclusive else "at most"
    return f"must be {relation} {number_text(maximum)}, got {number_text(value)}"


def choice_message(options: Iterable[Any], value: Any) -> str:
    return f"must be one of {', '.join(repr(o) for o in options)}, got {describe(value)}"


def length_message(length: int, hint: str, value: Any) -> str:
    what = f"a list of {length} numbers" + (f" ({hint})" if hint else "")
    return type_message(what, value)


def duplicate_key_message(first_line: int, second_line: int) -> str:
    return f"duplicate key (lines {first_line} and {second_line}): write each key once"


# --- single values -----------------------------------------------------------------------


def is_number(value: Any) -> bool:
    """A real number (int, float, numpy's), not bool (YAML true is not 1 here)."""
    return isinstance(value, numbers.Real) and not isinstance(value, bool)


def range_fault(
    value: float,
    minimum: float | None = None,
    maximum: float | None = None,
    exclusive_minimum: bool = False,
    exclusive_maximum: bool = False,
) -> str | None:
    """Why a finite number is outside the range, or None."""
    if minimum is not None and (value <= minimum if exclusive_minimum else value < minimum):
        return below_message(minimum, exclusive_minimum, value)
    if maximum is not None and (value >= maximum if exclusive_maximum else value > maximum):
        return above_message(maximum, exclusive_maximum, value)
    return None


def number_fault(value: Any, **bounds: Any) -> str | None:
    """Why `value` is not a finite number in range (bounds as range_fault), or None."""
    if not is_number(value):
        return type_message("a number", value)
    if not math.isfinite(value):
        return finite_message(value)
    return range_fault(value, **bounds)


def integer_fault(value: Any, minimum: int | None = None, maximum: int | None = None
                  ) -> str | None:
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        return type_message("an integer", value)
    return range_fault(value, minimum, maximum)


# --- the ranges read (for the ROS shell) -------------------------------------------------


@dataclass(frozen=True)
class NumberRead:
    """One number a FieldReader read (value in effect, default included) with its range:
    what a ROS node declares as a read-only parameter with the very same range."""

    key: str
    value: float | int
    minimum: float | None = None
    maximum: float | None = None
    exclusive_minimum: bool = False
    exclusive_maximum: bool = False


_number_reads: ContextVar[list[NumberRead] | None] = ContextVar("number_reads", default=None)


@contextmanager
def recording_number_reads() -> Iterator[list[NumberRead]]:
    """Every number FieldReader.number/.integer reads while active (any reader, also the
    ParameterReader inside a user's vehicle model) is appended to the yielded list."""
    reads: list[NumberRead] = []
    token = _number_reads.set(reads)
    try:
        yield reads
    finally:
        _number_reads.reset(token)


def _record(read: NumberRead) -> None:
    reads = _number_reads.get()
    if reads is not None:
        reads.append(read)


# --- collecting --------------------------------------------------------------------------


class Collector:
    """Every problem found in one input file (and the files it names)."""

    def __init__(self, source: str) -> None:
        self.source = source
        self.problems: list[Problem] = []

    def add(self, key: str, message: str) -> None:
        self.problems.append(Problem(self.source, key, message))

    def check(self, key: str, fault: str | None) -> None:
        """Record `fault` (from number_fault, integer_fault, ...) if there is one."""
        if fault:
            self.add(key, fault)

    def extend(self, found: ConfigError | Iterable[Problem]) -> None:
        self.problems.extend(found.problems if isinstance(found, ConfigError) else found)

    def fields(self, value: Any, section: str, *, optional: bool = False) -> FieldReader:
        """A reader over the mapping `value` found at key `section`; its problems land here.
        A value that is not a mapping is a problem (None is an empty mapping if optional)."""
        if value is None and optional:
            value = {}
        if not isinstance(value, Mapping):
            self.add(section, type_message("a mapping", value))
            value = {}
        return FieldReader(value, self.source, section, collector=self)

    def raise_if_any(self) -> None:
        if self.problems:
            raise ConfigError(self.problems)


class FieldReader:
    """Reads the keys of one mapping (a section of a file), checking each value.

    Ask for each key by name with its kind and range; values that fail are recorded as
    problems (keyed `<section>.<name>`) and a placeholder is returned so reading goes on:
    NaN for numbers, 0 for integers, None for lists. check_unknown() reports keys nobody
    asked for; finish() does that and raises every problem of this section.
    """

    def __init__(
        self,
        params: Mapping[str, Any],
        source: str,
        section: str = "",
        *,
        collector: Collector | None = None,
    ) -> None:
        self._params = dict(params)
        self._source = source
        self._section = section
        self._used: set[str] = set()
        self._retired: set[str] = set()
        self._collector = collector
        self.problems: list[Problem] = []

    # -- plumbing
    @property
    def section(self) -> str:
        return self._section

    def key(self, name: str | int) -> str:
        return join_key(self._section, name)

    def problem(self, name: str | int, message: str) -> None:
        found = Problem(self._source, self.key(name), message)
        self.problems.append(found)
        if self._collector is not None:
            self._collector.problems.append(found)

    def has(self, name: str) -> bool:
        """Whether the key is given (asking makes it a known key)."""
        self._used.add(name)
        return name in self._params

    def raw(self, name: str, default: Any = None) -> Any:
        """The value as written (marks the key as known, checks nothing)."""
        self._used.add(name)
        return self._params.get(name, default)

    def _get(self, name: str, default: Any, hint: str = "") -> tuple[bool, Any]:
        self._used.add(name)
        if name in self._params:
            return True, self._params[name]
        if default is REQUIRED:
            self.problem(name, required_message(hint))
        return False, default

    def retired(self, name: str, message: str) -> None:
        """A key that is no longer read: a problem saying what replaced it, when given
        (and not offered as an allowed key)."""
        self._retired.add(name)
        if name in self._params:
            self.problem(name, message)

    def check_unknown(self, also_allowed: Iterable[str] = ()) -> None:
        allowed = sorted((self._used | set(also_allowed)) - self._retired)
        for name in sorted(set(self._params) - set(allowed) - self._retired, key=str):
            self.problem(str(name), unknown_key_message(allowed))

    def finish(self) -> None:
        """Report unknown keys and raise every problem of this section."""
        self.check_unknown()
        if self.problems:
            raise ConfigError(self.problems)

    # -- kinds
    def number(
        self,
        name: str,
        default: Any = REQUIRED,
        *,
        minimum: float | None = None,
        maximum: float | None = None,
        exclusive_minimum: bool = False,
        exclusive_maximum: bool = False,
        nullable: bool = False,
        hint: str = "",
    ) -> Any:
        """A finite real number within the range (either end optional, may be exclusive).
        With nullable, an explicit null gives None. NaN after a problem."""
        present, value = self._get(name, default, hint)
        if not present:
            if is_number(value):
                _record(NumberRead(self.key(name), value, minimum, maximum, exclusive_minimum,
                                   exclusive_maximum))
            return math.nan if value is REQUIRED else value
        if value is None and nullable:
            return None
        fault = number_fault(
            value,
            minimum=minimum,
            maximum=maximum,
            exclusive_minimum=exclusive_minimum,
            exclusive_maximum=exclusive_maximum,
        )
        if fault:
            self.problem(name, fault)
            return math.nan
        _record(NumberRead(self.key(name), float(value), minimum, maximum, exclusive_minimum,
                           exclusive_maximum))
        return float(value)

    def positive(self, name: str, default: Any = REQUIRED, *, maximum: float | None = None,
                 hint: str = "") -> float:
        return self.number(name, default, minimum=0.0, exclusive_minimum=True, maximum=maximum,
                           hint=hint)

    def non_negative(self, name: str, default: Any = REQUIRED, *,
                     maximum: float | None = None, hint: str = "") -> float:
        return self.number(name, default, minimum=0.0, maximum=maximum, hint=hint)

    def integer(self, name: str, default: Any = REQUIRED, *, minimum: int | None = None,
                maximum: int | None = None, hint: str = "") -> int:
        present, value = self._get(name, default, hint)
        if not present:
            if is_number(value):
                _record(NumberRead(self.key(name), value, minimum, maximum))
            return 0 if value is REQUIRED else value
        fault = integer_fault(value, minimum, maximum)
        if fault:
            self.problem(name, fault)
            return 0
        _record(NumberRead(self.key(name), int(value), minimum, maximum))
        return int(value)

    def boolean(self, name: str, default: Any = REQUIRED) -> bool:
        present, value = self._get(name, default)
        if not present:
            return bool(value) if value is not REQUIRED else False
        if not isinstance(value, bool):
            self.problem(name, type_message("true or false", value))
            return False
        return value

    def text(self, name: str, default: Any = REQUIRED, *, hint: str = "") -> str:
        """A non-empty string."""
        present, value = self._get(name, default, hint)
        if not present:
            return "" if value is REQUIRED else value
        if not isinstance(value, str) or not value:
            self.problem(name, type_message("a non-empty string", value))
            return ""
        return value

    def choice(self, name: str, options: Sequence[Any], default: Any = REQUIRED) -> Any:
        present, value = self._get(name, default)
        if not present:
            return options[0] if value is REQUIRED else value
        if isinstance(value, bool) or value not in options:
            self.problem(name, choice_message(options, value))
            return options[0]
        return value

    def mapping(self, name: str, default: Any = REQUIRED) -> dict[str, Any] | None:
        present, value = self._get(name, default)
        if not present:
            return None if value is REQUIRED else value
        if not isinstance(value, Mapping):
            self.problem(name, type_message("a mapping", value))
            return None
        return dict(value)

    def numbers(
        self,
        name: str,
        default: Any = REQUIRED,
        *,
        length: int | None = None,
        hint: str = "",
        minimum: float | None = None,
        exclusive_minimum: bool = False,
        maximum: float | None = None,
    ) -> tuple[float, ...] | None:
        """A list of finite numbers (of `length` entries if given), each within the range;
        a bad entry is reported at `<key>[i]`. None after a problem."""
        present, value = self._get(name, default, hint)
        if not present:
            return None if value is REQUIRED else value
        return self.check_numbers(name, value, length=length, hint=hint, minimum=minimum,
                                  exclusive_minimum=exclusive_minimum, maximum=maximum)

    def check_numbers(
        self,
        name: str,
        value: Any,
        *,
        length: int | None = None,
        hint: str = "",
        minimum: float | None = None,
        exclusive_minimum: bool = False,
        maximum: float | None = None,
    ) -> tuple[float, ...] | None:
        if not isinstance(value, list | tuple) or (length is not None and len(value) != length):
            what = (length_message(length, hint, value) if length is not None
                    else type_message("a list of numbers", value))
            self.problem(name, what)
            return None
        ok = True
        for index, entry in enumerate(value):
            fault = number_fault(entry, minimum=minimum, exclusive_minimum=exclusive_minimum,
                                 maximum=maximum)
            if fault:
                self.problem(f"{name}[{index}]", fault)
                ok = False
        return tuple(float(v) for v in value) if ok else None

    def matrix(self, name: str, rows: int, cols: int, default: Any = REQUIRED, *,
               hint: str = "") -> tuple[tuple[float, ...], ...] | None:
        """rows x cols finite numbers as a list of rows; None after a problem."""
        present, value = self._get(name, default, hint)
        if not present:
            return None if value is REQUIRED else value
        shape_ok = isinstance(value, list | tuple) and len(value) == rows and all(
            isinstance(row, list | tuple) and len(row) == cols for row in value)
        if not shape_ok:
            what = f"a {rows} x {cols} list of rows of numbers" + (f" ({hint})" if hint else "")
            self.problem(name, type_message(what, value))
            return None
        ok = True
        for i, row in enumerate(value):
            for j, entry in enumerate(row):
                fault = number_fault(entry)
                if fault:
                    self.problem(f"{name}[{i}][{j}]", fault)
                    ok = False
        return tuple(tuple(float(v) for v in row) for row in value) if ok else None
