"""Install script for the coverage_fleet ROS 2 (ament_python) package."""

from glob import glob

from setuptools import find_packages, setup

PACKAGE = "coverage_fleet"

# One line per executable; `ros2 run coverage_fleet <name>` finds them in lib/coverage_fleet.
CONSOLE_SCRIPTS = [
    "coverage-fleet = coverage_fleet.cli.main:main",
    "coverage_fleet_simulator = coverage_fleet.ros.simulator_node:main",
    "coverage_fleet_controller = coverage_fleet.ros.controller_node:main",
    "coverage_fleet_partition = coverage_fleet.ros.partition_node:main",
    "coverage_fleet_gate = coverage_fleet.ros.gate_node:main",
    "coverage_fleet_base_station = coverage_fleet.ros.base_station:main",
    "coverage_fleet_recorder = coverage_fleet.ros.recorder_node:main",
]


def _tree(folder: str) -> list[tuple[str, list[str]]]:
    """data_files entries that install `folder` under share/<package>/ keeping sub-folders."""
    entries: dict[str, list[str]] = {}
    for path in sorted(glob(f"{folder}/**/*", recursive=True)):
        if not path.endswith("/") and "." in path.rsplit("/", 1)[-1]:
            parent = path.rsplit("/", 1)[0]
            entries.setdefault(f"share/{PACKAGE}/{parent}", []).append(path)
    return sorted(entries.items())


setup(
    name=PACKAGE,
    version="0.1.0",
    packages=find_packages(exclude=["test", "test.*", "benchmarks"]),
    data_files=[
        ("share/ament_index/resource_index/packages", [f"resource/{PACKAGE}"]),
        (f"share/{PACKAGE}", ["package.xml"]),
        *_tree("launch"),
        *_tree("config"),
        *_tree("rviz"),
    ],
    install_requires=["setuptools"],
    zip_safe=True,
    maintainer="coverage_fleet developers",
    maintainer_email="coverage-fleet@example.invalid",
    description="Density-weighted coverage with a fleet of MPC-controlled robots on ROS 2.",
    license="Apache-2.0",
    entry_points={"console_scripts": CONSOLE_SCRIPTS},
)
