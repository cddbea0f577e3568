"""The QoS profiles of the graph, one per kind of topic (the README's topic table lists them).

Latched topics (committed targets, generation, cells, gate openings) are reliable and
transient-local so that a node that joins late (RViz, a restarted controller, a recorder)
gets the latest value at once. States and commands are keep-last 1: only the newest matters
for control, and a backlog of old states would only add latency (common practice for
feedback loops over DDS). Progress reports are reliable with a short queue so that the gate
and the lockstep simulator see every report.
"""

from __future__ import annotations

from rclpy.qos import (
    DurabilityPolicy,
    HistoryPolicy,
    QoSProfile,
    ReliabilityPolicy,
)

LATCHED = QoSProfile(
    history=HistoryPolicy.KEEP_LAST,
    depth=1,
    reliability=ReliabilityPolicy.RELIABLE,
    durability=DurabilityPolicy.TRANSIENT_LOCAL,
)

#: Gate openings: every opening matters to the recorder, and late joiners get the history.
OPENINGS = QoSProfile(
    history=HistoryPolicy.KEEP_LAST,
    depth=1000,
    reliability=ReliabilityPolicy.RELIABLE,
    durability=DurabilityPolicy.TRANSIENT_LOCAL,
)

STATE = QoSProfile(
    history=HistoryPolicy.KEEP_LAST,
    depth=1,
    reliability=ReliabilityPolicy.RELIABLE,
    durability=DurabilityPolicy.VOLATILE,
)

COMMAND = STATE

REPORTS = QoSProfile(
    history=HistoryPolicy.KEEP_LAST,
    depth=10,
    reliability=ReliabilityPolicy.RELIABLE,
    durability=DurabilityPolicy.VOLATILE,
)

#: Plans, cost, diagnostics: for people and tools watching; losing one is harmless.
DISPLAY = QoSProfile(
    history=HistoryPolicy.KEEP_LAST,
    depth=1,
    reliability=ReliabilityPolicy.RELIABLE,
    durability=DurabilityPolicy.VOLATILE,
)

#: /clock as rclpy's time source subscribes to it (keep-last 1, best effort is accepted by
#: a reliable publisher).
CLOCK = QoSProfile(
    history=HistoryPolicy.KEEP_LAST,
    depth=1,
    reliability=ReliabilityPolicy.RELIABLE,
    durability=DurabilityPolicy.VOLATILE,
)
