"""A child process whose output the test reads while it runs, with waits bounded by a
patience limit (a hang fails the test; nothing here is a timing assertion)."""

from __future__ import annotations

import subprocess
import threading
import time
from collections.abc import Callable, Mapping, Sequence

import pytest


class WatchedProcess:
    def __init__(
        self,
        command: Sequence[str],
        patience: float,
        env: Mapping[str, str] | None = None,
        own_group: bool = False,
    ) -> None:
        self.patience = patience
        self.lines: list[str] = []
        self.process = subprocess.Popen(
            list(command), env=None if env is None else dict(env), stdout=subprocess.PIPE,
            stderr=subprocess.STDOUT, text=True, start_new_session=own_group,
        )
        self._reader = threading.Thread(target=self._read, daemon=True)
        self._reader.start()

    def _read(self) -> None:
        assert self.process.stdout is not None
        for line in self.process.stdout:
            self.lines.append(line.rstrip("\n"))

    @property
    def output(self) -> str:
        return "\n".join(self.lines)

    def cleanup(self) -> None:
        """Kill what is left after a failed wait (subclasses add their children)."""
        if self.process.poll() is None:
            self.process.kill()
            self.process.wait()

    def wait_until(self, condition: Callable[[], bool], what: str) -> None:
        deadline = time.monotonic() + self.patience
        while not condition():
            if self.process.poll() is not None or time.monotonic() > deadline:
                self.cleanup()
                pytest.fail(f"never saw {what}:\n{self.output[-4000:]}")
            time.sleep(0.2)

    def wait(self) -> int:
        try:
            status = self.process.wait(timeout=self.patience)
        except subprocess.TimeoutExpired:
            self.cleanup()
            pytest.fail(f"the process did not end:\n{self.output[-4000:]}")
        self._reader.join(timeout=10)
        return status
