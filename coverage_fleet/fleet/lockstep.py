"""The lockstep barrier: simulated time advances by one step only when every live controller
has answered the current state.

A controller answers a state by sending a command and a progress report naming that state's
time. Each controller is in one of three conditions:

- waiting: it has never answered; it is waited for up to `startup` wall seconds (solver
  set-up included) from the publication of the current state;
- live: it answered; it is waited for up to `answer` wall seconds per state (counted from
  the state's publication, or from the moment it came back, whichever is later);
- lost: it did not answer in time; its robot brakes and the fleet goes on without waiting
  for it. It is live again as soon as it answers the current state or any state published
  since it was lost (a late answer brings it back).

While anyone is waited for, the current state is re-published every `republish` wall
seconds, so that a controller that joins late still receives it. An answer to a
re-publication counts as much as one to the first publication. The very first step also
waits (up to `startup`) until every robot's state has its subscribers (`connected`).

Plain object driven by explicit times: `now` is wall-clock seconds, `time` simulated
seconds; the simulator node passes time.monotonic(), tests pass made-up times.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

WAITING = "waiting"
LIVE = "live"
LOST = "lost"
#: Two state times closer than this are the same step (far below any sample time).
SAME_TIME = 1e-6


@dataclass(frozen=True)
class LockstepTimeouts:
    """Wall seconds: per answer of a live controller, for a first answer, between
    re-publications while waiting."""

    answer: float = 3.0
    startup: float = 120.0
    republish: float = 0.5


@dataclass
class _Controller:
    condition: str = WAITING
    answered_time: float = -np.inf
    commands: int = 0
    lost_at: float = np.inf
    revived_wall: float = -np.inf


@dataclass(frozen=True)
class LockstepDecision:
    """What the simulator does after a poll."""

    #: Everyone live has answered: take the step.
    advance: bool
    #: Still waiting and due to re-publish the current state.
    republish: bool = False
    #: Controllers marked lost by this poll.
    lost: tuple[str, ...] = ()
    #: Controllers still waited for.
    waiting: tuple[str, ...] = field(default_factory=tuple)


class LockstepBarrier:
    def __init__(
        self, names: Sequence[str], timeouts: LockstepTimeouts, now: float, time: float = 0.0
    ) -> None:
        self.timeouts = timeouts
        self.time = float(time)
        self.steps = 0
        self._controllers = {name: _Controller() for name in names}
        self._published_wall = float(now)
        self._republished_wall = float(now)

    def condition(self, name: str) -> str:
        return self._controllers[name].condition

    def is_lost(self, name: str) -> bool:
        return self._controllers[name].condition == LOST

    def _current(self, state_time: float) -> bool:
        return abs(state_time - self.time) < SAME_TIME

    # --- what arrives -------------------------------------------------------------------

    def command(self, name: str) -> None:
        """A command from `name`'s controller arrived (it answers the newest state)."""
        self._controllers[name].commands += 1

    def answer(self, name: str, state_time: float, now: float) -> bool:
        """A progress report from `name`'s controller for the state at `state_time`.
        Returns True when this made the controller live (first answer or back from lost)."""
        controller = self._controllers[name]
        current = self._current(state_time)
        if current:
            controller.answered_time = state_time
        back = controller.condition == LOST and state_time > controller.lost_at
        if (current or back) and controller.condition != LIVE:
            controller.condition = LIVE
            controller.revived_wall = float(now)
            return True
        return False

    # --- stepping -----------------------------------------------------------------------

    def poll(self, now: float, connected: bool = True) -> LockstepDecision:
        """Check the barrier at wall time `now`; marks late controllers lost."""
        waiting: list[str] = []
        lost: list[str] = []
        for name, controller in self._controllers.items():
            if controller.condition == LOST:
                continue
            answered_state = self._current(controller.answered_time)
            if answered_state and controller.commands > 0:
                continue
            if answered_state:
                waiting.append(name)  # it answered this state; its command is on the way
                continue
            limit = (
                self.timeouts.startup if controller.condition == WAITING else self.timeouts.answer
            )
            if now - max(self._published_wall, controller.revived_wall) > limit:
                controller.condition = LOST
                controller.lost_at = self.time
                lost.append(name)
            else:
                waiting.append(name)
        held = (
            self.steps == 0
            and not connected
            and now - self._published_wall <= self.timeouts.startup
        )
        if waiting or held:
            republish = now - self._republished_wall > self.timeouts.republish
            if republish:
                self._republished_wall = float(now)
            return LockstepDecision(False, republish, tuple(lost), tuple(waiting))
        return LockstepDecision(True, False, tuple(lost), ())

    def advanced(self, time: float, now: float) -> None:
        """The step was taken: the state at `time` was published at wall time `now`."""
        self.time = float(time)
        self.steps += 1
        self._published_wall = self._republished_wall = float(now)
        for controller in self._controllers.values():
            controller.commands = 0
