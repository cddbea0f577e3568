"""The QoS profiles of the graph, one per kind of topic (the README's topic table lists them).

Latched topics (committed targets, generation, cells, gate openings) are reliable and
transient-local so that a node that joins late (RViz, a restarted controller, a recorder)
gets the latest value at once. States and commands are keep-last 1: only the newest matters
for control, and a backlog of old states would only add latency (common practice for
feedback loops over DDS). Odometry is subscribed best effort (STATE_IN) so that drivers' best-effort
odometry is received. Progress reports are reliable with a short queue so that the gate
and the lockstep simulator see every report.
"""

from __future__ import annotations

from rclpy.qos import (
    DurabilityPolicy,
    HistoryPolicy,
    QoSProfile,
    ReliabilityPolicy,
)


def _reliable(depth: int, latched: bool = False) -> QoSProfile:
    """Every topic of the graph is reliable keep-last; they differ in depth and latching."""
    return QoSProfile(
        history=HistoryPolicy.KEEP_LAST,
        depth=depth,
        reliability=ReliabilityPolicy.RELIABLE,
        durability=DurabilityPolicy.TRANSIENT_LOCAL if latched else DurabilityPolicy.VOLATILE,
    )


LATCHED = _reliable(1, latched=True)

#: Gate openings: every opening matters to the recorder, and late joiners get the history.
OPENINGS = _reliable(1000, latched=True)

STATE = _reliable(1)

#: Odometry as the graph's nodes subscribe to it: best effort, keep-last 1. A best-effort
#: subscription matches reliable and best-effort publishers alike (robot drivers often
#: publish odometry best effort, rclpy's qos_profile_sensor_data), and only the newest
#: state matters for control. Our own publishers stay reliable (STATE).
STATE_IN = QoSProfile(
    history=HistoryPolicy.KEEP_LAST,
    depth=1,
    reliability=ReliabilityPolicy.BEST_EFFORT,
    durability=DurabilityPolicy.VOLATILE,
)

#: The headless simulator's odometry: reliable, and the last thousand states are kept for a
#: reliable reader that must see every one (the recorder), so that a state lost on the way
#: (a reader's transport queue full on a loaded machine) is sent again. In one full test run
#: the recorder's best-effort subscription missed 3 of a robot's 151 states. Best-effort
#: readers (the controllers, the gate) get only the newest, as before: the history does not
#: delay them.
SIMULATED_STATE = _reliable(1000)

#: The recorder's odometry subscription for a robot whose state comes from elsewhere (a
#: driver, often best effort): best effort for the same reason as STATE_IN, with a queue so
#: that a burst of states is not thinned out.
STATE_RECORDED = QoSProfile(
    history=HistoryPolicy.KEEP_LAST,
    depth=10,
    reliability=ReliabilityPolicy.BEST_EFFORT,
    durability=DurabilityPolicy.VOLATILE,
)

COMMAND = STATE

REPORTS = _reliable(10)
#: A controller's own reports (progress, solve): as REPORTS, and the last thousand are kept
#: for a reader that matches late. Discovery runs per pair of processes and each side
#: matches on its own: in a full test run the recorder had matched a controller's report
#: writers a second before the lockstep simulator started, but the writers matched the
#: recorder only 14 steps into the run (a participant announces itself every few seconds),
#: and the first solves, published to no reader yet, were lost (5 of 151; once 28 of 151
#: with volatile reports). A lockstep run takes 50-100 steps a second, so a thousand
#: samples (a few hundred bytes each) cover a lag of 10 s or more. Readers that ask for
#: volatile durability (the gate, the simulator, the live view) match and get no history.
ROBOT_REPORTS = _reliable(1000, latched=True)

#: Plans, cost, diagnostics: for people and tools watching; losing one is harmless.
DISPLAY = _reliable(1)

#: /clock as rclpy's time source subscribes to it (keep-last 1, best effort is accepted by
#: a reliable publisher).
CLOCK = _reliable(1)
