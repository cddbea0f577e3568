"""The lockstep barrier: simulated time advances by one step only when every live
participant has answered the current state.

Participants are the robots' controllers and, as one more participant, the base station
(partition and gate). A controller answers a state by sending a command and a progress
report naming that state's time; the base station answers it once the gate has offered the
candidates partitioned from that state (and published any targets it committed). Each
participant is in one of three conditions:

- waiting: it has never answered; it is waited for up to `startup` wall seconds (solver
  set-up included) from the publication of the current state;
- live: it answered; it is waited for up to `answer` wall seconds per state (counted from
  the state's publication, or from the moment it came back, whichever is later);
- lost: it did not answer in time; a lost controller's robot brakes, a lost base station
  commits nothing new, and the fleet goes on without waiting for it (the simulator reports
  it). It is live again as soon as it answers the current state or any state published
  since it was lost (a late answer brings it back).

Why the base station is a participant. The offline fleet (fleet/step.py) runs each tick in
the order measure, partition, gate, controllers, plants: the base station has acted on the
states of tick t before the plants leave t. A barrier over the controllers alone let the
simulator run ahead of a base station that starts more slowly than the controllers (and
that partitioned on a timer of the simulated clock): at start-up simulated time raced
seconds ahead of the base station, robots looked stale to it (roster leave and rejoin),
odometry arrived "stamped ahead of the clock", and the fleet idled for tens of simulated
seconds with no committed target. With the base station in the barrier no step is taken
before the base station has processed the states of the current step; in particular the
first step waits until the first generation is committed and its targets are on their way
to the controllers.

Of the designs that achieve this, this one keeps the controllers' side unchanged: the
controllers and the base station answer the same state concurrently (each robot's state goes
out once, on the topic every node reads), and the barrier waits for both. The one remaining
difference from the offline order is that a generation committed at step t is used by the
controllers from step t + 1 (offline: at t), a one-step lag, the same on every run. Making
the controllers wait for the gate before answering would remove that lag but put the base
station on every robot's control path, which real robots (with no barrier) never have.

Only wall time during which the simulator itself ran counts against a participant. A gap
between two polls longer than `LockstepTimeouts.pause` means the simulator's process (or the whole
machine) was held; the answers that arrived meanwhile are still queued behind the poll
(rclpy's executor runs a ready timer before ready subscriptions), so without this rule the
first poll after a pause of more than `answer` seconds marked every participant lost, and the
simulator raced ahead of all of them for tens of steps (seen once in CI: 33 of 150 solves
missing on each robot of a 3-robot run). The pause is added to every deadline instead.

While anyone is waited for, the current state is re-published every `republish` wall
seconds, so that a participant that joins late still receives it. An answer to a
re-publication counts as much as one to the first publication. The very first step also
waits (up to `startup`) until every robot's state has its subscribers (`connected`).

Plain object driven by explicit times: `now` is wall-clock seconds, `time` simulated
seconds; the simulator node passes time.monotonic(), tests pass made-up times.
`complete_step` is the partition node's side of the same rule: in lockstep it partitions
once per step, as soon as the state of that step has arrived for every live robot.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
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
    re-publications while waiting, and between two polls beyond which the simulator counts
    itself paused (module docstring; it polls every few milliseconds, so a hundred times that
    is no scheduling jitter; inf: never)."""

    answer: float = 3.0
    startup: float = 120.0
    republish: float = 0.5
    pause: float = 0.25


@dataclass
class _Participant:
    #: A controller answers with a progress report and a command; the base station with
    #: its report alone.
    needs_command: bool = True
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
    #: Participants marked lost by this poll.
    lost: tuple[str, ...] = ()
    #: Participants still waited for.
    waiting: tuple[str, ...] = field(default_factory=tuple)
    #: Wall seconds the simulator was paused before this poll (0: no pause), counted
    #: against nobody.
    paused: float = 0.0


class LockstepBarrier:
    """`names`: the controllers (by robot name); `stations`: participants that answer with a
    report alone (the base station), under the same timeouts and conditions."""

    def __init__(
        self,
        names: Sequence[str],
        timeouts: LockstepTimeouts,
        now: float,
        time: float = 0.0,
        stations: Sequence[str] = (),
    ) -> None:
        self.timeouts = timeouts
        self.time = float(time)
        self.steps = 0
        self._controllers = {name: _Participant() for name in names}
        for name in stations:
            if name in self._controllers:
                raise ValueError(f"{name!r} is both a controller and a station")
            self._controllers[name] = _Participant(needs_command=False)
        self._published_wall = float(now)
        self._republished_wall = float(now)
        self._polled_wall = float(now)

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
        """A progress report from `name`'s controller (or the station `name`'s answer) for
        the state at `state_time`. Returns True when this made the participant live (first
        answer or back from lost)."""
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
        """Check the barrier at wall time `now`; marks late participants lost."""
        pause = now - self._polled_wall
        self._polled_wall = float(now)
        if pause <= self.timeouts.pause:
            pause = 0.0
        else:
            # Nobody's lateness (module docstring): every deadline moves by the pause.
            self._published_wall += pause
            for controller in self._controllers.values():
                controller.revived_wall += pause
        waiting: list[str] = []
        lost: list[str] = []
        for name, controller in self._controllers.items():
            if controller.condition == LOST:
                continue
            answered_state = self._current(controller.answered_time)
            if answered_state and (controller.commands > 0 or not controller.needs_command):
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
            return LockstepDecision(False, republish, tuple(lost), tuple(waiting), pause)
        return LockstepDecision(True, False, tuple(lost), (), pause)

    def advanced(self, time: float, now: float) -> None:
        """The step was taken: the state at `time` was published at wall time `now`."""
        self.time = float(time)
        self.steps += 1
        self._published_wall = self._republished_wall = float(now)
        for controller in self._controllers.values():
            controller.commands = 0


def complete_step(
    state_times: Mapping[str, float], names: Sequence[str], last: float | None
) -> float | None:
    """The step to partition now, or None: the newest state time of `names` (the live
    robots) when every one of them has its newest state at that time and it is newer than
    `last` (the step partitioned last; None: none yet). A robot whose state of the step has
    not arrived yet holds the partition back (the simulator re-publishes it)."""
    if not names or any(name not in state_times for name in names):
        return None
    times = [state_times[name] for name in names]
    newest = max(times)
    if any(newest - t >= SAME_TIME for t in times):
        return None
    if last is not None and newest - last < SAME_TIME:
        return None
    return newest
