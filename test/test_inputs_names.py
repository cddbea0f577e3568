"""Robot names and mission names: one rule each, used by mission files and the ROS shell.

Reference for robot names: rclpy's own validation (validate_node_name, validate_namespace,
validate_full_topic_name; ROS 2 Kilted wheels). Our rule is the strict side of ROS's: every
name we accept must be accepted by rclpy as node name, namespace and in every robot topic.
"""

from __future__ import annotations

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from rclpy.validate_full_topic_name import validate_full_topic_name
from rclpy.validate_namespace import validate_namespace
from rclpy.validate_node_name import validate_node_name

from coverage_fleet.inputs.names import (
    ROBOT_NAME_MAX,
    file_name_problem,
    is_valid_robot_name,
    robot_name_problem,
)
from coverage_fleet.ros import topics

ROBOT_TOPICS = (topics.ODOM, topics.CMD_VEL, topics.TARGET, topics.PROGRESS, topics.PLAN)


def rclpy_accepts(name: str) -> bool:
    try:
        validate_node_name(name)
        validate_namespace("/" + name)
        for topic in ROBOT_TOPICS:
            # Without a fleet namespace a robot topic resolves to /<robot>/<topic>.
            validate_full_topic_name("/" + topics.robot_topic(name, topic))
    except Exception:
        return False
    return True


@settings(max_examples=300, deadline=None)
@given(st.text(alphabet="ab_Z09-/. ~é", min_size=0, max_size=12))
def test_every_accepted_robot_name_is_a_valid_ros_name(name: str) -> None:
    if robot_name_problem(name) is None:
        assert rclpy_accepts(name), name
    else:
        assert not is_valid_robot_name(name)


@pytest.mark.parametrize("length", [1, ROBOT_NAME_MAX])
def test_longest_accepted_name_fits_every_robot_topic(length: int) -> None:
    name = "r" * length
    assert robot_name_problem(name) is None and rclpy_accepts(name)


@pytest.mark.parametrize(
    ("name", "reason"),
    [
        ("", "is empty"),
        ("rover-b", "may hold only letters, digits and underscores"),
        ("2rover", "starts with a digit"),
        # ROS accepts it, but ROS tools hide names starting with "_" (common practice).
        ("_rover", "starts with an underscore"),
        ("r" * 230, f"is longer than {ROBOT_NAME_MAX} characters"),
    ],
)
def test_refused_robot_names_say_why(name: str, reason: str) -> None:
    problem = robot_name_problem(name)
    assert problem is not None and reason in problem
    assert problem.startswith(f"{name!r} is not a valid ROS name: it ")


def test_a_robot_name_rclpy_refuses_for_its_topics_is_refused() -> None:
    """230 characters pass rclpy's node-name and namespace checks but not its topic length
    limit: a robot with that name could not publish its progress topic."""
    name = "r" * 230
    validate_node_name(name)
    validate_namespace("/" + name)
    assert not rclpy_accepts(name)
    assert robot_name_problem(name) is not None


@pytest.mark.parametrize("name", ["orchard_frost_watch", "trial-2", "v1.2", "A"])
def test_safe_mission_names(name: str) -> None:
    assert file_name_problem(name) is None


@pytest.mark.parametrize("name", ["../../x", "a/b", ".hidden", "..", "", "a b", "x" * 101,
                                  "c:\\x", "-flag"])
def test_unsafe_mission_names_are_refused(name: str) -> None:
    problem = file_name_problem(name)
    assert problem is not None and "is not a safe file name" in problem
