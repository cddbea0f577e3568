"""Every node's front door: messages converted and checked (fleet/message_checks.py) before
they reach the core; bad ones dropped with a throttled warning and counted per robot; the
counts and receive rates go on the node's /diagnostics.

A check that fails raises BadMessageError; so does anything a conversion raises on a malformed
message (ValueError, IndexError, TypeError, KeyError): the node drops it and goes on, so no
message can crash a node.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable
from typing import TypeVar

from diagnostic_msgs.msg import DiagnosticArray
from nav_msgs.msg import Odometry
from rclpy.node import Node

from coverage_fleet.fleet.message_checks import (
    BAD_TABLE,
    EXPECTED_FRAME,
    BadMessageError,
    DropCounter,
    MessageRates,
    StampLimits,
    StateChecks,
    check_odometry,
)
from coverage_fleet.geometry.region import ConvexRegion

from .conversions import diagnostic_status, odometry_from_msg, stamp_to_seconds
from .parameters import declare

Value = TypeVar("Value")

#: What a conversion of a malformed message may raise besides BadMessageError.
MALFORMED = (ValueError, IndexError, TypeError, KeyError, OverflowError)


def declare_state_checks(
    node: Node, region: ConvexRegion, past: float, frame: str = EXPECTED_FRAME
) -> StateChecks:
    """The odometry checks with the node's parameters (`past`: seconds after which a state
    is stale, the node's own state timeout; `frame`: the map frame, the node's `map_frame`
    parameter, ros/frames.py)."""
    future = declare(
        node, "stamp_future_tolerance", 1.0,
        "Seconds a state's stamp may be ahead of this node's clock; a state stamped later "
        "is dropped (a clock fault would otherwise block every later state). On simulated "
        "time a node may read /clock after the odometry of the same step; in lockstep the "
        "simulator never runs more than one step ahead of any node (fleet/lockstep.py).",
        (0.0, 3600.0),
    )
    implausible = declare(
        node, "implausible_distance", 20.0,
        "Metres outside the region beyond which a reported position is a localisation fault "
        "and the state is dropped.", (0.0, 1e6),
    )
    return StateChecks(region, StampLimits(future=future, past=past), implausible, frame)


class Inbox:
    """Received and dropped messages of one node."""

    def __init__(self, node: Node, warn_period: float = 5.0) -> None:
        self.node = node
        self.drops = DropCounter(warn_period)
        self.rates = MessageRates()
        self._reported_drops = 0

    def now(self) -> float:
        return self.node.get_clock().now().nanoseconds * 1e-9

    def drop(self, source: str, error: BadMessageError, what: str) -> None:
        covered = self.drops.drop(source, error.reason, self.now())
        if covered:
            more = f" ({covered} dropped since the last warning)" if covered > 1 else ""
            self.node.get_logger().warning(f"{source}: {what} dropped: {error.detail}{more}")

    def accept(
        self, source: str, what: str, convert: Callable[[], Value]
    ) -> Value | None:
        """`convert()` (conversion and checks) or None when it found the message bad."""
        self.rates.saw(source)
        try:
            return convert()
        except BadMessageError as error:
            self.drop(source, error, what)
        except MALFORMED as error:
            self.drop(source, BadMessageError(BAD_TABLE, f"malformed: {error!r}"), what)
        return None

    def odometry(self, name: str, msg: Odometry, checks: StateChecks):
        """(OdometryValues, stamp in seconds) of a good state, or None (dropped)."""

        def convert():
            values = odometry_from_msg(msg)
            stamp = stamp_to_seconds(msg.header.stamp)
            check_odometry(values, msg.header.frame_id, stamp, self.now(), checks)
            return values, stamp

        return self.accept(name, "odometry", convert)

    def diagnostic_values(self, sources: Iterable[str]) -> dict[str, object]:
        """Messages received (total and per second) and dropped (total and by reason) per
        source (keys `<source>.received`, `<source>.dropped.<reason>`, ...)."""
        rates = self.rates.rates(self.now())
        values: dict[str, object] = {}
        for source in sources:
            values[f"{source}.received"] = self.rates.totals.get(source, 0)
            values[f"{source}.received_per_s"] = f"{rates.get(source, 0.0):.1f}"
            values[f"{source}.dropped"] = self.drops.total(source)
            for reason, count in sorted(self.drops.counts(source).items()):
                values[f"{source}.dropped.{reason}"] = count
        return values

    def new_drops(self) -> int:
        """Messages dropped since the previous call (a diagnostics period)."""
        total = self.drops.total()
        new, self._reported_drops = total - self._reported_drops, total
        return new

    def publish(
        self, publisher, name: str, level: bytes, message: str, values: dict[str, object]
    ) -> None:
        """One DiagnosticArray with this node's status."""
        array = DiagnosticArray()
        array.header.stamp = self.node.get_clock().now().to_msg()
        array.status = [diagnostic_status(name, self.node.get_name(), level, message, values)]
        publisher.publish(array)

