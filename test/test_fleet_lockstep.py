"""The lockstep barrier and robot liveness, without a ROS graph: made-up wall and simulated
times drive the same objects the simulator and partition nodes call.

What is checked is the behaviour the README promises for a trial (a fault in one robot never
stalls the fleet; a silent controller's robot brakes; a controller that answers again is
waited for again). Timeouts and the re-publication of an unanswered state are common
practice for barrier synchronisation of distributed simulations (no outside figure exists
for them); the figures below are the ones each test sets.
"""

from __future__ import annotations

import math

import pytest

from coverage_fleet.fleet.liveness import FleetLiveness, LivenessChange, fresh
from coverage_fleet.fleet.lockstep import (
    LIVE,
    LOST,
    WAITING,
    LockstepBarrier,
    LockstepTimeouts,
    complete_step,
)

#: These tests poll only at the moments that matter, as if every poll in between had come on
#: time (the simulator polls every 2 ms), so the pause rule is off here and on in its own tests.
TIMEOUTS = LockstepTimeouts(answer=3.0, startup=20.0, republish=0.5, pause=math.inf)
PAUSING = LockstepTimeouts(answer=3.0, startup=20.0, republish=0.5, pause=0.25)
STEP = 0.1
POLL = 0.002  # the simulator node's poll period (s)


def poll_every(barrier: LockstepBarrier, start: float, end: float, period: float = POLL):
    """Polls at `period` from start to end (wall seconds), as the simulator's timer does;
    the decisions in order."""
    count = round((end - start) / period)
    return [barrier.poll(start + k * period) for k in range(1, count + 1)]


def answer(barrier: LockstepBarrier, name: str, now: float, state_time: float | None = None):
    """A controller's full answer: progress report naming the state, then its command."""
    came_back = barrier.answer(name, barrier.time if state_time is None else state_time, now)
    barrier.command(name)
    return came_back


def take_step(barrier: LockstepBarrier, now: float) -> None:
    decision = barrier.poll(now)
    assert decision.advance, decision
    barrier.advanced(barrier.time + STEP, now)


def test_the_step_waits_for_every_answer_and_then_advances() -> None:
    barrier = LockstepBarrier(["a", "b"], TIMEOUTS, now=0.0)
    assert barrier.condition("a") == WAITING
    assert answer(barrier, "a", now=1.0)
    decision = barrier.poll(now=1.0)
    assert not decision.advance and decision.waiting == ("b",)
    answer(barrier, "b", now=1.2)
    take_step(barrier, now=1.2)
    assert abs(barrier.time - STEP) < 1e-12 and barrier.steps == 1
    # The new state needs new answers: the old ones do not count.
    assert barrier.poll(now=1.3).waiting == ("a", "b")


def test_a_report_without_its_command_is_still_waited_for() -> None:
    barrier = LockstepBarrier(["a"], TIMEOUTS, now=0.0)
    barrier.answer("a", 0.0, now=1.0)
    # Answered this state, command on the way: never timed out, even long after.
    decision = barrier.poll(now=100.0)
    assert not decision.advance and decision.waiting == ("a",) and not decision.lost
    barrier.command("a")
    assert barrier.poll(now=100.0).advance


def test_a_silent_controller_is_marked_lost_and_the_fleet_goes_on() -> None:
    barrier = LockstepBarrier(["a", "b"], TIMEOUTS, now=0.0)
    answer(barrier, "a", now=0.5)
    answer(barrier, "b", now=0.5)
    take_step(barrier, now=0.5)
    answer(barrier, "a", now=0.6)
    # b falls silent: within the answer timeout the barrier waits ...
    assert barrier.poll(now=0.5 + TIMEOUTS.answer - 0.01).waiting == ("b",)
    # ... after it b is lost (its robot brakes) and the step goes ahead without it.
    decision = barrier.poll(now=0.5 + TIMEOUTS.answer + 0.01)
    assert decision.lost == ("b",) and decision.advance
    assert barrier.is_lost("b") and barrier.condition("b") == LOST
    barrier.advanced(barrier.time + STEP, now=3.6)
    answer(barrier, "a", now=3.7)
    assert barrier.poll(now=3.7).advance  # nobody waits for a lost controller


def test_time_the_simulator_was_held_counts_against_nobody() -> None:
    """A held simulator process (or machine) finds the answers of that time queued behind
    its next poll: the pause moves every deadline, so nobody is lost for it."""
    barrier = LockstepBarrier(["a", "b"], PAUSING, now=0.0)
    for name in ("a", "b"):
        answer(barrier, name, now=0.1)
    poll_every(barrier, 0.0, 0.1)
    take_step(barrier, now=0.102)
    # Held for 5 s (more than the 3 s answer timeout) right after publishing the state.
    decision = barrier.poll(now=5.102)
    assert decision.paused == pytest.approx(5.0)
    assert not decision.lost and not decision.advance and decision.waiting == ("a", "b")
    # The answers that arrived meanwhile are read next and the step goes ahead.
    answer(barrier, "a", now=5.103)
    answer(barrier, "b", now=5.103)
    assert barrier.poll(now=5.104).advance


def test_after_a_pause_a_silent_controller_is_still_lost_on_the_running_clock() -> None:
    barrier = LockstepBarrier(["a", "b"], PAUSING, now=0.0)
    for name in ("a", "b"):
        answer(barrier, name, now=0.1)
    poll_every(barrier, 0.0, 0.1)
    take_step(barrier, now=0.102)  # the state of t = 0.1 goes out at 0.102
    answer(barrier, "a", now=0.2)
    decisions = poll_every(barrier, 0.102, 1.0)  # 0.9 s of polling, then held 4 s
    decisions.append(barrier.poll(now=5.0))
    decisions += poll_every(barrier, 5.0, 7.1)
    # 2.998 s of running clock since the state went out (0.898 before the pause, 2.1 after) ...
    assert not any(d.lost for d in decisions)
    lost = [(k, d) for k, d in enumerate(poll_every(barrier, 7.1, 7.3)) if d.lost]
    # ... so b is lost at the first poll past 3 s of it: 7.102 + 0.002.
    assert [(k, d.lost) for k, d in lost] == [(1, ("b",))]
    lost = [d for _, d in lost]
    assert barrier.is_lost("b") and lost[0].advance


def test_polls_at_the_simulator_rate_never_count_as_a_pause() -> None:
    barrier = LockstepBarrier(["a"], PAUSING, now=0.0)
    decisions = poll_every(barrier, 0.0, 3.2, period=0.05)  # 25 times slower than the node
    assert all(d.paused == 0.0 for d in decisions)
    assert not barrier.is_lost("a")  # a first answer has the startup timeout
    answer(barrier, "a", now=3.2)
    take_step(barrier, now=3.2)
    decisions = poll_every(barrier, 3.2, 6.3, period=0.05)
    assert [d.lost for d in decisions if d.lost] == [("a",)]


def test_a_first_answer_gets_the_startup_timeout() -> None:
    barrier = LockstepBarrier(["slow_to_start"], TIMEOUTS, now=0.0)
    assert not barrier.poll(now=TIMEOUTS.answer + 1.0).lost  # solver set-up takes a while
    assert barrier.poll(now=TIMEOUTS.startup + 0.01).lost == ("slow_to_start",)


def test_a_late_answer_to_a_later_state_brings_a_lost_controller_back() -> None:
    barrier = LockstepBarrier(["a", "b"], TIMEOUTS, now=0.0)
    for name in ("a", "b"):
        answer(barrier, name, now=0.1)
    take_step(barrier, now=0.1)  # t = 0.1
    answer(barrier, "a", now=0.2)
    assert barrier.poll(now=5.0).lost == ("b",)
    lost_at = barrier.time
    barrier.advanced(lost_at + STEP, now=5.0)  # t = 0.2
    # A late answer to the state it was lost on does not revive it ...
    assert not barrier.answer("b", lost_at, now=5.1)
    assert barrier.is_lost("b")
    # ... an answer to any state published since does (even one already superseded).
    answer(barrier, "a", now=5.2)
    barrier.advanced(barrier.time + STEP, now=5.2)  # t = 0.3
    assert barrier.answer("b", lost_at + STEP, now=5.3)
    assert barrier.condition("b") == LIVE
    # From now on b is waited for again, with the answer timeout counted from its return.
    answer(barrier, "a", now=5.3)
    assert barrier.poll(now=5.3 + TIMEOUTS.answer - 0.01).waiting == ("b",)
    answer(barrier, "b", now=5.4)
    assert barrier.poll(now=5.4).advance


def test_while_waiting_the_state_is_republished_at_the_set_period() -> None:
    barrier = LockstepBarrier(["a"], TIMEOUTS, now=0.0)
    republished = [now for now in (0.2, 0.4, 0.6, 0.8, 1.0, 1.2) if barrier.poll(now).republish]
    assert republished == [0.6, 1.2]
    # An answer to a re-publication of the current state counts like one to the first.
    answer(barrier, "a", now=1.3)
    assert barrier.poll(now=1.3).advance


def test_the_first_step_waits_until_every_state_has_its_subscribers() -> None:
    barrier = LockstepBarrier(["a"], TIMEOUTS, now=0.0)
    answer(barrier, "a", now=0.1)
    assert not barrier.poll(now=0.2, connected=False).advance
    assert barrier.poll(now=0.3, connected=True).advance
    # Not for ever: after the start-up timeout the run starts anyway.
    late = LockstepBarrier(["a"], TIMEOUTS, now=0.0)
    answer(late, "a", now=0.1)
    assert late.poll(now=TIMEOUTS.startup + 0.1, connected=False).advance


def test_the_base_station_is_waited_for_like_a_controller() -> None:
    """The step also waits for the base station's answer (no command from it): the
    simulator never leaves a state the base station has not processed."""
    barrier = LockstepBarrier(["a"], TIMEOUTS, now=0.0, stations=["base_station"])
    assert barrier.condition("base_station") == WAITING
    answer(barrier, "a", now=0.5)
    decision = barrier.poll(now=0.5)
    assert not decision.advance and decision.waiting == ("base_station",)
    # Its answer to an older state does not count.
    barrier.answer("base_station", -STEP, now=0.6)
    assert barrier.poll(now=0.6).waiting == ("base_station",)
    assert barrier.answer("base_station", 0.0, now=0.7)
    take_step(barrier, now=0.7)
    # The next state needs its answer again, and the controller's.
    assert barrier.poll(now=0.8).waiting == ("a", "base_station")
    answer(barrier, "a", now=0.9)
    barrier.answer("base_station", barrier.time, now=0.9)
    take_step(barrier, now=0.9)


def test_a_silent_base_station_is_reported_lost_and_comes_back() -> None:
    barrier = LockstepBarrier(["a"], TIMEOUTS, now=0.0, stations=["base_station"])
    answer(barrier, "a", now=1.0)
    # Before its first answer it gets the start-up timeout, as a controller does.
    assert barrier.poll(now=TIMEOUTS.startup - 0.01).waiting == ("base_station",)
    decision = barrier.poll(now=TIMEOUTS.startup + 0.01)
    assert decision.lost == ("base_station",) and decision.advance
    barrier.advanced(STEP, now=TIMEOUTS.startup + 0.01)
    # A dead base station does not freeze the simulator: it is not waited for ...
    answer(barrier, "a", now=TIMEOUTS.startup + 0.1)
    assert barrier.poll(now=TIMEOUTS.startup + 0.1).advance
    barrier.advanced(2 * STEP, now=TIMEOUTS.startup + 0.1)
    # ... until it answers a state published since it was lost.
    assert barrier.answer("base_station", 2 * STEP, now=TIMEOUTS.startup + 0.2)
    assert barrier.condition("base_station") == LIVE
    answer(barrier, "a", now=TIMEOUTS.startup + 0.2)
    assert barrier.poll(now=TIMEOUTS.startup + 0.2).advance


def test_a_name_is_either_a_controller_or_a_station() -> None:
    with pytest.raises(ValueError, match="both"):
        LockstepBarrier(["a"], TIMEOUTS, now=0.0, stations=["a"])


def test_the_partition_takes_each_step_once_when_every_live_state_has_arrived() -> None:
    names = ["a", "b"]
    assert complete_step({}, names, None) is None
    assert complete_step({"a": 0.0}, names, None) is None  # b's state not here yet
    assert complete_step({"a": 0.0, "b": 0.0}, names, None) == 0.0
    assert complete_step({"a": 0.0, "b": 0.0}, names, last=0.0) is None  # done already
    assert complete_step({"a": 0.1, "b": 0.0}, names, last=0.0) is None  # half a step
    assert complete_step({"a": 0.1, "b": 0.1 + 1e-9}, names, last=0.0) == 0.1 + 1e-9
    # A robot left out (not live) does not hold the step back.
    assert complete_step({"a": 0.2, "b": 0.1}, ["a"], last=0.1) == 0.2
    assert complete_step({"a": 0.2}, [], last=0.1) is None


# --- liveness ----------------------------------------------------------------------------


def test_fresh_is_inclusive_and_never_for_something_not_seen() -> None:
    assert fresh(1.0, now=3.0, timeout=2.0)
    assert not fresh(1.0, now=3.0001, timeout=2.0)
    assert not fresh(None, now=0.0, timeout=1e9)


def test_a_stale_state_leaves_the_robot_out_and_a_fresh_one_brings_it_back() -> None:
    live = FleetLiveness(["a", "b"], state_timeout=2.0, controller_timeout=2.0)
    for name in ("a", "b"):
        live.saw_state(name, 0.0)
        live.saw_answer(name, 0.0)
    assert live.update(now=1.0) == [LivenessChange("a", True), LivenessChange("b", True)]
    live.saw_state("a", 2.5)
    live.saw_answer("a", 2.5)
    live.saw_answer("b", 2.5)  # b's controller answers, but b's state stopped at 0.0
    assert live.update(now=2.6) == [LivenessChange("b", False)]
    assert live.live == ("a",)
    live.saw_state("b", 2.7)  # rejoin
    assert live.update(now=2.8) == [LivenessChange("b", True)]
    assert live.live == ("a", "b")


def test_a_silent_controller_leaves_the_robot_out() -> None:
    live = FleetLiveness(["a", "b"], state_timeout=2.0, controller_timeout=1.0)
    for name in ("a", "b"):
        live.saw_state(name, 0.0)
        live.saw_answer(name, 0.0)
    live.update(now=0.5)
    live.saw_state("a", 1.5)
    live.saw_state("b", 1.5)
    live.saw_answer("a", 1.5)  # b's state keeps coming, its controller is silent
    assert live.update(now=1.6) == [LivenessChange("b", False)]
    assert live.missing() == ["b"]


def test_the_first_partition_waits_for_the_roster_within_the_grace() -> None:
    live = FleetLiveness(["a", "b"], 2.0, 2.0, startup_grace=5.0)
    live.saw_state("a", 10.0)
    live.saw_answer("a", 10.0)
    live.update(10.0)
    assert not live.may_start(10.0)
    live.update(14.9)
    live.saw_state("a", 14.9)
    assert not live.may_start(14.9)
    live.saw_answer("a", 15.0)
    live.update(15.0)
    assert live.may_start(15.0) and live.missing() == ["b"]
    # Once started it stays started, even with nobody live.
    live.update(100.0)
    assert live.live == () and live.may_start(100.0)


def test_all_live_starts_at_once() -> None:
    live = FleetLiveness(["a"], 2.0, 2.0, startup_grace=5.0)
    live.saw_state("a", 0.0)
    live.saw_answer("a", 0.0)
    live.update(0.0)
    assert live.may_start(0.0)

