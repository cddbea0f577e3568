"""The one way bad input is reported: a list of problems, each naming file, key and fault.

Every loader (regions, densities, vehicle files, mission files) raises ConfigError with all
the problems it found; the CLI prints them and exits with status 2, never a traceback.
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class Problem:
    """One thing wrong with an input: where (file and dotted key path) and what."""

    source: str
    key: str
    message: str

    def __str__(self) -> str:
        where = f"{self.source}: {self.key}" if self.key else self.source
        return f"{where}: {self.message}"


class ConfigError(ValueError):
    """Raised with every problem found in an input, not just the first."""

    def __init__(self, problems: list[Problem] | Problem) -> None:
        self.problems = [problems] if isinstance(problems, Problem) else list(problems)
        if not self.problems:
            raise ValueError("ConfigError needs at least one problem")
        super().__init__("\n".join(str(p) for p in self.problems))

    @classmethod
    def single(cls, source: str, key: str, message: str) -> ConfigError:
        return cls(Problem(source, key, message))
