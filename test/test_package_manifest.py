"""package.xml and the requirements declare every library the package imports.

A ROS 2 user installs dependencies with rosdep from package.xml (REP 149, package format 3:
exec_depend for what runs, test_depend for what only the tests need); a user without a ROS
install gets them from requirements/. Both lists are checked against the imports found in
the source, so a new import without a declaration fails here instead of on a robot.
"""

from __future__ import annotations

import ast
import sys
import xml.etree.ElementTree as ElementTree
from pathlib import Path

import yaml

REPO = Path(__file__).resolve().parents[1]

#: Top-level import name -> rosdep key in package.xml. ROS packages import under their own
#: name; Python libraries use the distribution's python3-* keys (common practice).
ROSDEP_KEY = {
    "numpy": "python3-numpy",
    "scipy": "python3-scipy",
    "yaml": "python3-yaml",
    "matplotlib": "python3-matplotlib",
    "PIL": "python3-pil",
    "shapely": "python3-shapely",
    "casadi": "python3-casadi-pip",
    "pyproj": "python3-pyproj-pip",
    "numba": "python3-numba",
    "dask": "python3-dask-distributed-pip",
    "distributed": "python3-dask-distributed-pip",
    "rich": "python3-rich-pip",
    "mcap": "python3-mcap-pip",
    "mcap_ros2": "python3-mcap-ros2-support-pip",
    "pytest": "python3-pytest",
    "hypothesis": "python3-hypothesis",
}
#: Import name -> distribution name on the package index (requirements/*.txt).
PIP_NAME = {"yaml": "pyyaml", "PIL": "pillow", "mcap_ros2": "mcap-ros2-support"}


def imported_top_level(folder: Path) -> set[str]:
    names: set[str] = set()
    for path in folder.rglob("*.py"):
        for node in ast.walk(ast.parse(path.read_text(), str(path))):
            if isinstance(node, ast.Import):
                names.update(alias.name.split(".")[0] for alias in node.names)
            elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
                names.add(node.module.split(".")[0])
    local = {path.stem for path in folder.glob("*.py")} | {"coverage_fleet"}
    return {n for n in names if n not in sys.stdlib_module_names and n not in local}


def manifest_keys(tag: str) -> set[str]:
    root = ElementTree.parse(REPO / "package.xml").getroot()
    return {element.text.strip() for element in root.iter(tag) if element.text}


def requirement_names(*files: str) -> set[str]:
    names = set()
    for name in files:
        for line in (REPO / "requirements" / name).read_text().splitlines():
            line = line.split("#")[0].strip()
            if line:
                names.add(line.split("=")[0].split(">")[0].split("<")[0].strip().lower())
    return names


def is_ros_interface_or_library(name: str) -> bool:
    return name.endswith(("_msgs", "_srvs", "_interfaces")) or name in {
        "rclpy", "ament_index_python", "launch", "launch_ros",
    }


def test_every_runtime_import_is_an_exec_depend() -> None:
    declared = manifest_keys("exec_depend")
    missing = sorted(
        name for name in imported_top_level(REPO / "coverage_fleet")
        if (name if is_ros_interface_or_library(name) else ROSDEP_KEY.get(name, name))
        not in declared
    )
    assert not missing, f"package.xml lacks an exec_depend for: {missing}"


def test_every_test_import_is_declared_for_tests() -> None:
    declared = manifest_keys("exec_depend") | manifest_keys("test_depend")
    test_only = imported_top_level(REPO / "test") - imported_top_level(REPO / "coverage_fleet")
    missing = sorted(
        name for name in test_only
        if not is_ros_interface_or_library(name) and ROSDEP_KEY.get(name, name) not in declared
    )
    assert not missing, f"package.xml lacks a test_depend for: {missing}"


def test_every_python_library_is_in_the_requirements_with_an_upper_bound() -> None:
    pinned = requirement_names("core.txt", "test.txt")
    used = imported_top_level(REPO / "coverage_fleet") | imported_top_level(REPO / "test")
    python_libraries = {
        PIP_NAME.get(n, n).lower() for n in used if not is_ros_interface_or_library(n)
    }
    assert python_libraries <= pinned, sorted(python_libraries - pinned)
    for name in ("core.txt", "test.txt"):
        for line in (REPO / "requirements" / name).read_text().splitlines():
            line = line.split("#")[0].strip()
            if line:
                assert "<" in line or "==" in line, f"requirements/{name}: {line} unbounded"


def test_the_pip_only_rosdep_key_is_defined_by_the_package() -> None:
    rules = yaml.safe_load((REPO / "config" / "rosdep" / "coverage_fleet.yaml").read_text())
    for platform in ("debian", "ubuntu"):
        assert rules["python3-casadi-pip"][platform]["pip"]["packages"] == ["casadi"]


def test_the_named_licence_ships_with_the_package() -> None:
    license_tag = manifest_keys("license")
    assert license_tag == {"Apache-2.0"}
    text = (REPO / "LICENSE").read_text()
    assert "Apache License" in text and "Version 2.0, January 2004" in text
