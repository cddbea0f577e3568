"""The fleet-wide software stop: one latched topic and one service.

- `/coverage/fleet_stop` (std_msgs/Bool, reliable + transient-local): true = stopped. Every
  controller, the reference gate and the simulator listen to it; a late joiner gets the
  current state at once. Any tool may publish on it (`ros2 topic pub`), but the value only
  lasts as long as its publisher: the gate node holds the fleet's state.
- `/coverage/set_fleet_stop` (std_srvs/SetBool, data true = stop, false = release), served by
  the reference gate. The gate takes the new state before it answers, so once the answer
  arrives the gate commits nothing more; then it publishes the state on the topic.

While stopped every controller sends its robot's braking input (the first command after
the stop arrives, and every one after until release), the gate commits no generation, and
the simulator brakes every simulated robot whatever commands arrive.

This is a software stop: it needs working nodes and a working network. It does NOT replace
each robot's own emergency stop (STOP_CAUTION), which the operator must keep within reach.
"""

from __future__ import annotations

from collections.abc import Callable

from rclpy.node import Node
from std_msgs.msg import Bool
from std_srvs.srv import SetBool

from . import qos, topics

STOP_CAUTION = (
    "This software stop needs working nodes and a working network; it does NOT replace the "
    "robots' own emergency stops: keep them within reach."
)


def listen_to_fleet_stop(
    node: Node, on_change: Callable[[bool], None], fleet_namespace: str | None = None
):
    """Subscribe `node` to the fleet stop; `on_change(stopped)` is called for every message
    (a repeated value is harmless: the handlers are idempotent). A node in a robot's
    namespace (a controller) names its fleet's namespace (topics.fleet_namespace_of)."""
    topic = topics.FLEET_STOP
    if fleet_namespace is not None:
        topic = topics.in_namespace(fleet_namespace, topic)
    return node.create_subscription(
        Bool, topic, lambda msg: on_change(bool(msg.data)), qos.LATCHED
    )


class FleetStopService:
    """The service and the latched state, hosted by one node (the reference gate).
    `on_change(stopped)` is called before the answer goes out."""

    def __init__(self, node: Node, on_change: Callable[[bool], None]) -> None:
        self._node = node
        self._on_change = on_change
        self.stopped = False
        self._publisher = node.create_publisher(Bool, topics.FLEET_STOP, qos.LATCHED)
        self._publisher.publish(Bool(data=False))
        node.create_service(SetBool, topics.FLEET_STOP_SERVICE, self._on_request)

    def _on_request(self, request: SetBool.Request, response: SetBool.Response):
        stopped = bool(request.data)
        changed = stopped != self.stopped
        self.stopped = stopped
        self._on_change(stopped)
        self._publisher.publish(Bool(data=stopped))
        if stopped:
            response.message = (
                "fleet stopped: every controller sends its braking input until release; "
                + STOP_CAUTION
            )
            self._node.get_logger().warning("fleet stop requested: braking every robot")
        else:
            response.message = "fleet released: controllers track their targets again"
            self._node.get_logger().info("fleet stop released")
        if not changed:
            response.message += " (no change: it already was)"
        response.success = True
        return response


def request_fleet_stop(stopped: bool, wait: float, namespace: str = "") -> str | None:
    """Call the stop service of the fleet under `namespace` ("" or "/yard_b") from a
    short-lived node of this process (rclpy initialised and shut down here); returns the
    service's answer, or None when nobody answered in `wait` seconds."""
    import rclpy

    rclpy.init(args=["coverage-fleet"])
    try:
        # In the fleet's namespace, so the relative service name is that fleet's.
        node = rclpy.create_node("fleet_stop_request", namespace=namespace or None)
        client = node.create_client(SetBool, topics.FLEET_STOP_SERVICE)
        if not client.wait_for_service(timeout_sec=wait):
            return None
        future = client.call_async(SetBool.Request(data=stopped))
        rclpy.spin_until_future_complete(node, future, timeout_sec=wait)
        result = future.result()
        return None if result is None else str(result.message)
    finally:
        rclpy.try_shutdown()
