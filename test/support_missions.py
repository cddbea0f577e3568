"""Short offline missions for fleet tests: the quick check mission with another roster."""

from __future__ import annotations

import copy
from pathlib import Path
from typing import Any

import yaml

from coverage_fleet.fleet.mission import Mission, mission_from_mapping

REPO = Path(__file__).resolve().parents[1]
QUICK = REPO / "config" / "missions" / "solar_row_quick_check.yaml"


def short_quick_mission(roster: list[dict[str, Any]], path: Path) -> Mission:
    """The quick check mission with `roster`, 1.6 s long and little noise (written as
    `path`): long enough for every robot to solve, short enough for a test."""
    raw = yaml.safe_load(QUICK.read_text())
    raw["roster"] = copy.deepcopy(roster)
    raw["simulation"].update(duration=1.6, process_noise_std=0.002,
                             measurement_noise_std=0.003)
    raw["settle"]["speed"] = 0.2  # a few times what noise alone moves (the loader's rule)
    return mission_from_mapping(raw, path)
