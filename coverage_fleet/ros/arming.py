"""Arming controllers from outside: the ROS 2 lifecycle services of each controller node
(`<namespace>/<node>/get_state` and `change_state`, lifecycle_msgs), configure when still
unconfigured, then activate. One short-lived node of this process does it
(`coverage-fleet arm`); any lifecycle client can do the same."""

from __future__ import annotations

from lifecycle_msgs.msg import State, Transition
from lifecycle_msgs.srv import ChangeState, GetState

#: Seconds a configure may take: it builds the MPC (minutes for a large horizon on a loaded
#: machine; normally done at the controller's start already).
CONFIGURE_PATIENCE = 600.0


def arm_controllers(node_paths: dict[str, str], wait: float) -> dict[str, str]:
    """robot -> what happened, for controllers at `node_paths` (robot -> "/ns/node").
    Outcomes start with "armed", "already armed" or "NOT armed"."""
    import rclpy

    rclpy.init(args=["coverage-fleet"])
    try:
        node = rclpy.create_node("arming_request")
        return {robot: _arm(node, path, wait) for robot, path in node_paths.items()}
    finally:
        rclpy.try_shutdown()


def _call(node, client, request, patience: float):
    import rclpy

    future = client.call_async(request)
    rclpy.spin_until_future_complete(node, future, timeout_sec=patience)
    return future.result()


def _arm(node, path: str, wait: float) -> str:
    get_state = node.create_client(GetState, f"{path}/get_state")
    change_state = node.create_client(ChangeState, f"{path}/change_state")
    if not (get_state.wait_for_service(timeout_sec=wait)
            and change_state.wait_for_service(timeout_sec=wait)):
        return f"NOT armed: no controller at {path} answered within {wait:g} s"
    answer = _call(node, get_state, GetState.Request(), wait)
    if answer is None:
        return f"NOT armed: {path} did not report its state"
    state = answer.current_state
    if state.id == State.PRIMARY_STATE_ACTIVE:
        return "already armed"
    steps = []
    if state.id == State.PRIMARY_STATE_UNCONFIGURED:
        steps.append((Transition.TRANSITION_CONFIGURE, "configure", CONFIGURE_PATIENCE))
    elif state.id != State.PRIMARY_STATE_INACTIVE:
        return f"NOT armed: the controller is {state.label!r}"
    steps.append((Transition.TRANSITION_ACTIVATE, "activate", wait))
    for transition, label, patience in steps:
        done = _call(node, change_state,
                     ChangeState.Request(transition=Transition(id=transition)), patience)
        if done is None or not done.success:
            return f"NOT armed: {label} failed (see the controller's log)"
    return "armed"
