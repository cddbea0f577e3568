"""`coverage-fleet sizing`: a small study over the quick mission writes its table, JSON and
plot; every run's coverage cost respects the lower bounds that geometry puts on it; the
fleet is split among kinds by largest remainder; bad options are reported on the command
line's terms with exit status 2."""

from __future__ import annotations

import json
import math
from pathlib import Path

import pytest
from PIL import Image

from coverage_fleet.cli.main import main
from coverage_fleet.cli.sizing_command import split_fleet

MISSIONS = Path(__file__).resolve().parents[1] / "config" / "missions"
QUICK = MISSIONS / "solar_row_quick_check.yaml"  # 12 m x 8 m, uniform density 1
WIDTH, HEIGHT = 12.0, 8.0
AREA = WIDTH * HEIGHT


def lowest_possible_cost(robots: int) -> float:
    """One robot: the polar moment of the rectangle about its centroid, A (w^2 + h^2) / 12
    (handbook formula, common practice: no point is cheaper than the centroid). More
    robots in a convex polygon of at most six sides: at least n times the polar moment of
    a regular hexagon of area A/n about its centre, 5 (A/n)^2 / (18 sqrt 3) (L. Fejes Toth,
    Lagerungen in der Ebene auf der Kugel und im Raum, 1953; hexagon moment from memory,
    5 sqrt(3) s^4 / 8 for side s)."""
    if robots == 1:
        return AREA * (WIDTH**2 + HEIGHT**2) / 12.0
    return robots * 5.0 * (AREA / robots) ** 2 / (18.0 * math.sqrt(3.0))


def test_split_fleet_by_largest_remainder() -> None:
    # Worked by hand: 5 robots at 2:1 are 3.33 and 1.67; floors 3 and 1; the larger
    # remainder (0.67) gets the fifth robot (Hamilton's method, common practice).
    assert split_fleet(5, {"rover": 2, "drone": 1}) == {"rover": 3, "drone": 2}
    assert split_fleet(1, {"rover": 1, "drone": 1}) == {"rover": 1, "drone": 0}
    assert split_fleet(7, {"a": 1, "b": 1, "c": 1}) == {"a": 3, "b": 2, "c": 2}
    for size in range(1, 12):
        assert sum(split_fleet(size, {"a": 3, "b": 2, "c": 1}).values()) == size


def test_sizing_study_writes_table_json_and_plot(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out = tmp_path / "study"
    status = main(["sizing", str(QUICK), "--sizes", "1,2", "--seeds", "2", "--duration", "3",
                   "--workers", "1", "--out", str(out)])
    captured = capsys.readouterr()
    assert status == 0, captured.err
    lines = captured.out.splitlines()
    assert lines[0].split()[:2] == ["size", "mix"]
    assert [line.split()[:3] for line in lines[1:3]] == [
        ["1", "1", "differential_drive"], ["2", "2", "differential_drive"]]

    document = json.loads((out / "sizing.json").read_text())
    assert document["seeds"] == [0, 1]
    configurations = document["configurations"]
    assert [c["size"] for c in configurations] == [1, 2]
    for configuration in configurations:
        runs, summary = configuration["runs"], configuration["summary"]
        assert configuration["counts"] == {"differential_drive": configuration["size"]}
        assert [run["seed"] for run in runs] == [0, 1]
        for run in runs:
            assert len(run["initial_poses"]) == configuration["size"]
            assert run["final_cost"] >= lowest_possible_cost(configuration["size"]) * (1 - 1e-9)
            assert 0.0 <= run["cvt_gap"] < 1.0
        assert summary["runs"] == 2
        assert summary["final_cost_min"] <= summary["final_cost"] <= summary["final_cost_max"]
        assert summary["solver_failures"] == sum(run["solver_failures"] for run in runs)
        clearances = [r["smallest_clearance_m"] for r in runs
                      if r["smallest_clearance_m"] is not None]
        assert summary["smallest_clearance_m"] == (min(clearances) if clearances else None)
    assert configurations[0]["summary"]["smallest_clearance_m"] is None  # one robot alone

    with Image.open(out / "sizing.png") as image:
        assert image.format == "PNG" and image.width > 600 and image.height > 300
    assert not list(tmp_path.glob(".*partial"))


def test_sizing_with_a_mixed_fleet(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "mixed"
    status = main(["sizing", str(QUICK), "--sizes", "2", "--mix",
                   "differential_drive:1,multirotor:1", "--seeds", "1", "--duration", "2",
                   "--workers", "1", "--out", str(out)])
    assert status == 0, capsys.readouterr().err
    (configuration,) = json.loads((out / "sizing.json").read_text())["configurations"]
    assert configuration["counts"] == {"differential_drive": 1, "multirotor": 1}
    (run,) = configuration["runs"]
    assert sorted(run["initial_poses"]) == ["differential_drive_1", "multirotor_1"]
    assert run["final_cost"] >= lowest_possible_cost(2) * (1 - 1e-9)


@pytest.mark.parametrize(
    ("arguments", "message"),
    [
        (["--sizes", "0"], "command line: --sizes: 0: must be at least 1, got 0"),
        (["--sizes", "2,2"], "command line: --sizes: 2 is listed twice"),
        (["--sizes", "two"], "command line: --sizes: must be whole numbers"),
        (["--sizes", "2", "--mix", "no_such_vehicle"],
         "command line: --mix: 'no_such_vehicle': vehicle file not found"),
        (["--sizes", "2", "--mix", "differential_drive:0"],
         "command line: --mix: 'differential_drive:0': the weight must be a whole number"),
        (["--sizes", "2", "--workers", "0"],
         "command line: --workers: must be at least 1, got 0"),
        (["--sizes", "2", "--seeds", "0"], "command line: --seeds: must be at least 1, got 0"),
    ],
)
def test_sizing_rejects_bad_options(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], arguments: list[str], message: str
) -> None:
    status = main(["sizing", str(QUICK), "--out", str(tmp_path / "study"), *arguments])
    err = capsys.readouterr().err
    assert status == 2
    assert message in err
    assert "Traceback" not in err
    assert not (tmp_path / "study").exists()
