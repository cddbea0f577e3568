"""`colcon build` of a copy of the package installs the layout a ROS 2 workspace expects:
the ament index entry, share/coverage_fleet/{package.xml, launch/, config/, rviz/} and every
console script under lib/coverage_fleet/ (where `ros2 run` looks; common practice for
ament_python packages, see setup.cfg)."""

from __future__ import annotations

import ast
import subprocess
from pathlib import Path

import pytest
from support_colcon import REPO, colcon_install


def console_script_names() -> list[str]:
    tree = ast.parse((REPO / "setup.py").read_text())
    for node in tree.body:
        if isinstance(node, ast.Assign) and getattr(node.targets[0], "id", "") == "CONSOLE_SCRIPTS":
            return [entry.split("=")[0].strip() for entry in ast.literal_eval(node.value)]
    raise AssertionError("setup.py defines no CONSOLE_SCRIPTS list")


def tracked_files(folder: str) -> list[Path]:
    out = subprocess.run(
        ["git", "ls-files", folder], cwd=REPO, capture_output=True, text=True, check=False
    )
    if out.returncode == 0 and out.stdout.strip():
        return [Path(line) for line in out.stdout.split()]
    return [p.relative_to(REPO) for p in (REPO / folder).rglob("*") if p.is_file()]


@pytest.fixture(scope="module")
def install_dir(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return colcon_install(tmp_path_factory.mktemp("colcon_ws"))


def test_ament_index_marker(install_dir: Path) -> None:
    marker = install_dir / "share/ament_index/resource_index/packages/coverage_fleet"
    assert marker.is_file()


def test_share_holds_package_xml_launch_config_and_rviz(install_dir: Path) -> None:
    share = install_dir / "share/coverage_fleet"
    assert (share / "package.xml").is_file()
    expected = tracked_files("launch") + tracked_files("config") + tracked_files("rviz")
    assert any(str(p).startswith("config") for p in expected), "config/ has no files"
    assert Path("rviz/coverage_fleet_demo.rviz") in expected
    missing = [str(p) for p in expected if not (share / p).is_file()]
    assert not missing, f"not installed under share/coverage_fleet: {missing}"


def test_every_console_script_is_under_lib(install_dir: Path) -> None:
    lib = install_dir / "lib/coverage_fleet"
    names = console_script_names()
    assert names
    missing = [n for n in names if not (lib / n).is_file()]
    assert not missing, f"not installed under lib/coverage_fleet: {missing}"
