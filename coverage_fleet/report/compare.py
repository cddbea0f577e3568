"""Two trials side by side: their metrics (with the difference B - A where both are
numbers), what differs in their provenance, and their coverage cost against time overlaid.
Reads only the trial directories' own files (report/metrics.json, fleet.csv), so trials of
the offline simulation and of the ROS graph, old and new, compare alike."""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from coverage_fleet.errors import ConfigError
from coverage_fleet.fleet.trial import read_csv

METRICS_FILE = Path("report") / "metrics.json"
#: Metrics too long or too nested for a table row (the figures show them).
LEFT_OUT = {"opening_costs", "provenance", "solve_time", "final_distance_to_centroid_m"}


@dataclass(frozen=True)
class Trial:
    path: Path
    metrics: dict[str, Any]
    time: list[float]
    cost: list[float]

    @property
    def label(self) -> str:
        return self.path.name


def load_trial(path: str | Path) -> Trial:
    """A trial directory's metrics and cost curve (bad input: file: key: problem)."""
    path = Path(path)
    metrics_file = path / METRICS_FILE
    if not path.is_dir():
        raise ConfigError.single(str(path), "TRIAL", "is not a trial directory")
    if not metrics_file.is_file():
        raise ConfigError.single(
            str(path), str(METRICS_FILE), "not found (not a trial directory with a report)"
        )
    try:
        metrics = json.loads(metrics_file.read_text())
    except (json.JSONDecodeError, UnicodeDecodeError) as error:
        raise ConfigError.single(str(metrics_file), "", f"is not valid JSON: {error}") from None
    if not isinstance(metrics, dict):
        raise ConfigError.single(str(metrics_file), "", "must hold a JSON object")
    rows = read_csv(path / "fleet.csv") if (path / "fleet.csv").is_file() else []
    return Trial(
        path, metrics, [float(r["time"]) for r in rows], [float(r["cost"]) for r in rows]
    )


def _is_number(value: Any) -> bool:
    return isinstance(value, int | float) and not isinstance(value, bool)


def flat_metrics(metrics: dict[str, Any]) -> dict[str, Any]:
    """Table rows: scalar metrics, and per robot its solve-time figures and final distance
    to its centroid (as `solve_time.<robot>.<figure>`)."""
    rows = {k: v for k, v in metrics.items() if k not in LEFT_OUT and not isinstance(v, dict)}
    for robot, figures in (metrics.get("solve_time") or {}).items():
        for figure, value in (figures or {}).items():
            rows[f"solve_time.{robot}.{figure}"] = value
    for robot, value in (metrics.get("final_distance_to_centroid_m") or {}).items():
        rows[f"final_distance_to_centroid_m.{robot}"] = value
    return rows


def compare_metrics(a: dict[str, Any], b: dict[str, Any]) -> list[tuple[str, Any, Any, Any]]:
    """(metric, A, B, B - A or None) for every metric of either trial, in A's order."""
    flat_a, flat_b = flat_metrics(a), flat_metrics(b)
    keys = list(flat_a) + [k for k in flat_b if k not in flat_a]
    rows = []
    for key in keys:
        value_a, value_b = flat_a.get(key), flat_b.get(key)
        both = _is_number(value_a) and _is_number(value_b)
        rows.append((key, value_a, value_b, value_b - value_a if both else None))
    return rows


def provenance_differences(a: dict[str, Any], b: dict[str, Any]) -> list[tuple[str, Any, Any]]:
    """(item, A, B) for each provenance item that differs (vehicle files by sha256)."""
    prov_a, prov_b = a.get("provenance") or {}, b.get("provenance") or {}

    def flat(prov: dict[str, Any]) -> dict[str, Any]:
        found = {k: v for k, v in prov.items() if k not in ("vehicles", "recording")}
        for robot, vehicle in (prov.get("vehicles") or {}).items():
            found[f"vehicle {robot} sha256"] = (vehicle or {}).get("sha256")
        return found

    flat_a, flat_b = flat(prov_a), flat(prov_b)
    keys = list(flat_a) + [k for k in flat_b if k not in flat_a]
    return [(k, flat_a.get(k), flat_b.get(k)) for k in keys if flat_a.get(k) != flat_b.get(k)]


def _cell(value: Any) -> str:
    if value is None:
        return "-"
    if isinstance(value, float):
        return f"{value:.6g}"
    return str(value)


def comparison_lines(first: Trial, second: Trial) -> list[str]:
    rows = compare_metrics(first.metrics, second.metrics)
    width = max([len(r[0]) for r in rows] + [6])
    lines = [
        f"A: {first.path}",
        f"B: {second.path}",
        f"{'metric':<{width}}  {'A':>14}  {'B':>14}  {'B - A':>12}",
    ]
    for key, value_a, value_b, difference in rows:
        lines.append(
            f"{key:<{width}}  {_cell(value_a):>14}  {_cell(value_b):>14}  "
            f"{_cell(difference):>12}"
        )
    differences = provenance_differences(first.metrics, second.metrics)
    if differences:
        lines.append("provenance differs:")
        lines += [f"  {k}: A {_cell(a)} | B {_cell(b)}" for k, a, b in differences]
    else:
        lines.append("provenance: same package, commit, libraries and vehicle files")
    return lines


def plot_cost_overlay(path: Path, first: Trial, second: Trial) -> None:
    """Coverage cost against time of both trials on one axis."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from coverage_fleet.report.figures import DPI, robot_colour

    fig, ax = plt.subplots(figsize=(8, 4), dpi=DPI)
    for index, (tag, trial) in enumerate((("A", first), ("B", second))):
        ax.plot(trial.time, trial.cost, color=robot_colour(index + 1), linewidth=1.4,
                linestyle="-" if index == 0 else "--", label=f"{tag}: {trial.label}")
    if min(first.cost + second.cost, default=0.0) > 0:
        ax.set_yscale("log")
    ax.set_xlabel("time (s)")
    ax.set_ylabel("coverage cost H")
    ax.set_title("coverage cost against time, two trials", fontsize=10)
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8)
    fig.tight_layout()
    fig.savefig(path)
    plt.close(fig)
