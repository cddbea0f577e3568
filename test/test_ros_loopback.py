"""The ROS 2 wheels work here: two processes exchange a message over DDS on loopback."""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap

import pytest

rclpy = pytest.importorskip("rclpy", reason="ROS 2 wheels not installed (scripts/setup_env.sh)")

LISTENER = textwrap.dedent(
    """
    import sys, time, rclpy
    from std_msgs.msg import String
    rclpy.init()
    node = rclpy.create_node("loopback_listener")
    got = []
    node.create_subscription(String, "loopback_probe", lambda m: got.append(m.data), 10)
    deadline = time.monotonic() + 30.0
    while not got and time.monotonic() < deadline:
        rclpy.spin_once(node, timeout_sec=0.1)
    print(got[0] if got else "NOTHING", flush=True)
    rclpy.shutdown()
    sys.exit(0 if got else 1)
    """
)

TALKER = textwrap.dedent(
    """
    import time, rclpy
    from std_msgs.msg import String
    rclpy.init()
    node = rclpy.create_node("loopback_talker")
    pub = node.create_publisher(String, "loopback_probe", 10)
    deadline = time.monotonic() + 30.0
    while time.monotonic() < deadline:
        pub.publish(String(data="hello from the talker"))
        rclpy.spin_once(node, timeout_sec=0.1)
    """
)


def test_environment_keeps_discovery_on_loopback() -> None:
    assert os.environ["ROS_AUTOMATIC_DISCOVERY_RANGE"] == "LOCALHOST"
    assert 0 <= int(os.environ["ROS_DOMAIN_ID"]) <= 101


def test_two_processes_exchange_a_message() -> None:
    listener = subprocess.Popen(
        [sys.executable, "-c", LISTENER], stdout=subprocess.PIPE, text=True
    )
    talker = subprocess.Popen([sys.executable, "-c", TALKER])
    try:
        out, _ = listener.communicate(timeout=45)
    finally:
        talker.kill()
        talker.wait()
    assert listener.returncode == 0, out
    assert out.strip() == "hello from the talker"
