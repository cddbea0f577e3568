"""Which robots take part: a robot is live while its state is fresh and its controller
answers.

The partition leaves out a robot that is not live, so the live robots share its cell and a
fault in one robot never stalls the fleet; the gate follows (a roster change). Times are
explicit arguments (seconds on whatever clock the caller runs: simulated time offline, the
ROS clock in the nodes), so the rules are tested with made-up times.

- fresh state: the newest state of the robot is at most `state_timeout` old;
- fresh controller: its controller answered (sent a progress report) at most
  `controller_timeout` ago;
- the first partition waits up to `startup_grace` for the whole roster to be live, so that
  the first generation is not followed at once by a roster change when a slower robot
  appears; after that it starts with the live ones and the others join when they are live.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np


def fresh(seen_at: float | None, now: float, timeout: float) -> bool:
    """Something seen at `seen_at` (None: never) is still fresh at `now`."""
    return seen_at is not None and now - seen_at <= timeout


@dataclass(frozen=True)
class LivenessChange:
    robot: str
    live: bool


class FleetLiveness:
    """Fresh state and fresh controller for every robot of a roster."""

    def __init__(
        self,
        names: Sequence[str],
        state_timeout: float,
        controller_timeout: float,
        startup_grace: float = 0.0,
    ) -> None:
        self.names = tuple(names)
        self.state_timeout = float(state_timeout)
        self.controller_timeout = float(controller_timeout)
        self.startup_grace = float(startup_grace)
        self.state_times: dict[str, float] = {}
        self.answer_times: dict[str, float] = {}
        self._live: tuple[str, ...] = ()
        self._first_check: float | None = None
        self.started = False

    def saw_state(self, name: str, time: float) -> None:
        self.state_times[name] = float(time)

    def saw_answer(self, name: str, time: float) -> None:
        self.answer_times[name] = float(time)

    def is_live(self, name: str, now: float) -> bool:
        return fresh(self.state_times.get(name), now, self.state_timeout) and fresh(
            self.answer_times.get(name), now, self.controller_timeout
        )

    @property
    def live(self) -> tuple[str, ...]:
        """The live robots (roster order) as of the last update."""
        return self._live

    def update(self, now: float) -> list[LivenessChange]:
        """Re-evaluate at `now`; returns who joined or left since the last update."""
        live = tuple(n for n in self.names if self.is_live(n, now))
        changes = [
            LivenessChange(n, n in live) for n in self.names if (n in live) != (n in self._live)
        ]
        self._live = live
        return changes

    def may_start(self, now: float) -> bool:
        """Whether the first partition may go ahead at `now` (call after update): the whole
        roster is live, or the start-up grace has passed. Stays true once it was."""
        if not self.started:
            self._first_check = now if self._first_check is None else self._first_check
            waited = now - self._first_check
            self.started = len(self._live) == len(self.names) or waited >= self.startup_grace
        return self.started

    def missing(self) -> list[str]:
        """Roster robots not live as of the last update."""
        return [n for n in self.names if n not in self._live]

    def newest_state_time(self, names: Sequence[str]) -> float:
        """The newest state time among `names` (-inf for none)."""
        return max((self.state_times[n] for n in names if n in self.state_times), default=-np.inf)
