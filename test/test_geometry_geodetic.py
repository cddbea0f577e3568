"""Geodetic missions: WGS 84 longitude/latitude to the local east-north-up map frame.

Outside reference: the closed-form chain geodetic -> Earth-centred Earth-fixed -> local
east-north-up, written out below with the WGS 84 defining constants a = 6378137 m and
1/f = 298.257223563 (NIMA TR8350.2, "Department of Defense World Geodetic System 1984",
3rd ed., 2000, section 3.2 / table 3.1; the ECEF formulas of its section 4 and the ENU
rotation are common practice, section numbers from memory). The projection library is not
used to check itself.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest
import yaml

from coverage_fleet.cli.main import main
from coverage_fleet.errors import ConfigError
from coverage_fleet.fleet.mission import load_mission, mission_as_run, mission_from_mapping
from coverage_fleet.fleet.simulation import simulate_mission
from coverage_fleet.geometry.geodetic import LocalFrame

REPO = Path(__file__).resolve().parents[1]
PASTURE = REPO / "config" / "missions" / "hillside_pasture_survey.yaml"

A = 6378137.0
INVERSE_FLATTENING = 298.257223563


def ecef(lon_deg: float, lat_deg: float, height: float = 0.0) -> np.ndarray:
    f = 1.0 / INVERSE_FLATTENING
    e2 = f * (2.0 - f)
    lon, lat = math.radians(lon_deg), math.radians(lat_deg)
    n = A / math.sqrt(1.0 - e2 * math.sin(lat) ** 2)
    return np.array([
        (n + height) * math.cos(lat) * math.cos(lon),
        (n + height) * math.cos(lat) * math.sin(lon),
        (n * (1.0 - e2) + height) * math.sin(lat),
    ])


def closed_form_east_north(lon: float, lat: float, lon0: float, lat0: float) -> np.ndarray:
    d = ecef(lon, lat) - ecef(lon0, lat0)
    sl, cl = math.sin(math.radians(lon0)), math.cos(math.radians(lon0))
    sp, cp = math.sin(math.radians(lat0)), math.cos(math.radians(lat0))
    east = -sl * d[0] + cl * d[1]
    north = -sp * cl * d[0] - sp * sl * d[1] + cp * d[2]
    return np.array([east, north])


#: An invented field about 2 km across (made-up coordinates, not a surveyed site), at a
#: latitude where east and north scales differ clearly.
FIELD = [[-71.030, 42.350], [-71.006, 42.352], [-71.004, 42.366], [-71.027, 42.367]]


def geodetic_mission(tmp_path: Path, geojson, origin=None, density=None) -> dict:
    # With the origin at the field's corner, start the robot well inside.
    pose = [0.0, 0.0, 0.0] if origin is None else [300.0, 300.0, 0.0]
    region = {"geojson": geojson}
    if origin is not None:
        region["origin"] = origin
    return {
        "name": "invented_field",
        "region": region,
        "density": density or {"kind": "uniform"},
        "roster": [{"name": "rover_a", "vehicle": "differential_drive",
                    "initial_pose": pose}],
    }


def polygon(ring, holes=()) -> dict:
    closed = [list(p) for p in ring] + [list(ring[0])]
    return {"type": "Polygon", "coordinates": [closed, *holes]}


def test_map_frame_matches_the_closed_form_chain_within_a_centimetre(tmp_path: Path) -> None:
    mission = mission_from_mapping(geodetic_mission(tmp_path, polygon(FIELD)),
                                   tmp_path / "m.yaml")
    frame = mission.frame
    lon0 = (min(p[0] for p in FIELD) + max(p[0] for p in FIELD)) / 2  # the stated default
    lat0 = (min(p[1] for p in FIELD) + max(p[1] for p in FIELD)) / 2
    assert (frame.longitude, frame.latitude) == pytest.approx((lon0, lat0), abs=1e-12)
    expected = np.array([closed_form_east_north(lon, lat, lon0, lat0) for lon, lat in FIELD])
    assert np.ptp(expected[:, 0]) > 1800.0  # the field is about 2 km across
    # Every corner of the region (stored counter-clockwise) is a corner of the field.
    for corner in expected:
        gaps = np.linalg.norm(mission.region.vertices - corner, axis=1)
        assert gaps.min() < 0.01
    assert len(mission.region.vertices) == len(FIELD)


def test_round_trip_within_1e_7_degrees() -> None:
    frame = LocalFrame(-71.017, 42.358)
    rng = np.random.default_rng(4)
    lonlat = np.column_stack([rng.uniform(-71.03, -71.004, 50),
                              rng.uniform(42.35, 42.367, 50)])
    back = frame.to_lonlat(frame.to_map(lonlat))
    assert np.abs(back - lonlat).max() < 1e-7


def test_stated_origin_is_used_and_recorded(tmp_path: Path) -> None:
    (tmp_path / "field.geojson").write_text(json.dumps(
        {"type": "FeatureCollection", "features": [
            {"type": "Feature", "properties": {}, "geometry": polygon(FIELD)}]}))
    origin = [-71.03, 42.35]
    mission = mission_from_mapping(geodetic_mission(tmp_path, "field.geojson", origin),
                                   tmp_path / "m.yaml")
    # The stated origin is the corner FIELD[0]: its map position is (0, 0).
    assert np.linalg.norm(mission.region.vertices, axis=1).min() < 1e-6
    as_run = mission_as_run(mission, seed=0, duration=1.0)
    assert as_run["region"]["origin"] == origin
    again = mission_from_mapping(as_run, tmp_path / "again.yaml")
    np.testing.assert_allclose(again.region.vertices, mission.region.vertices, atol=1e-9)


def test_raster_corner_in_longitude_latitude(tmp_path: Path) -> None:
    density = {"kind": "raster", "origin_lonlat": FIELD[0], "resolution": 500.0,
               "values": [[1.0] * 6] * 5, "fill_value": 0.0}
    mission = mission_from_mapping(
        geodetic_mission(tmp_path, polygon(FIELD), origin=FIELD[0], density=density),
        tmp_path / "m.yaml")
    np.testing.assert_allclose(mission.density.origin, [0.0, 0.0], atol=1e-6)


@pytest.mark.parametrize(
    ("geojson", "key", "fragment"),
    [
        (polygon(FIELD, holes=[[[-71.02, 42.355], [-71.01, 42.355], [-71.01, 42.36],
                                [-71.02, 42.355]]]),
         "region.geojson.coordinates", "hole"),
        ({"type": "MultiPolygon", "coordinates": []}, "region.geojson.type", "'Polygon'"),
        ({"type": "Polygon", "coordinates": [[[-71.03, 42.35], [-71.0, 42.35],
                                              [-71.0, 42.36], [-71.02, 42.36]]]},
         "region.geojson.coordinates[0]", "closed"),
        (polygon([[-71.03, 42.35], [-71.0, 42.35], [-71.0, 95.0]]),
         "region.geojson.coordinates[0][2][1]", "at most 90"),
        (polygon([[-71.03, 42.35], [-71.0, 42.35], [-71.02, 42.352], [-71.0, 42.36],
                  [-71.03, 42.36]]), "region.geojson.coordinates[0]", "convex"),
        (polygon([[-71.0, 42.0], [-70.0, 42.0], [-70.0, 43.0]]),
         "region.geojson.coordinates[0][", "from the origin"),
        ({**polygon(FIELD), "crs": {"type": "name"}}, "region.geojson.crs", "WGS 84"),
    ],
)
def test_bad_geojson_is_refused_with_file_key_problem(
    tmp_path: Path, geojson: dict, key: str, fragment: str
) -> None:
    with pytest.raises(ConfigError) as info:
        mission_from_mapping(geodetic_mission(tmp_path, geojson), tmp_path / "m.yaml")
    problems = info.value.problems
    assert any(p.source == str(tmp_path / "m.yaml") and p.key.startswith(key)
               and fragment in p.message for p in problems), [str(p) for p in problems]


def test_geodetic_demo_mission_settles_offline(tmp_path: Path) -> None:
    """The invented pasture mission (a GeoJSON file and a raster placed by longitude/
    latitude) runs offline and settles; its final positions lie inside the region."""
    mission = load_mission(PASTURE)
    assert mission.frame is not None
    log = simulate_mission(mission, seed=mission.simulation.seed, duration=45.0)
    assert log.outcome == "settled"
    final = np.array([robot.positions()[-1] for robot in log.robots.values()])
    assert mission.region.contains(final, tol=1e-6).all()
    assert yaml.safe_dump(mission_as_run(mission, 0, 1.0))  # writable as run


def test_bad_geojson_file_exits_2_naming_file_and_key(tmp_path: Path, capsys) -> None:
    """Through the command line: a hole in the GeoJSON file is named by that file and its
    key; the raster placed by longitude/latitude adds no follow-on complaint."""
    (tmp_path / "field.geojson").write_text(json.dumps({"type": "Feature", "geometry": polygon(
        FIELD, holes=[[[-71.02, 42.355], [-71.01, 42.355], [-71.01, 42.36],
                       [-71.02, 42.355]]])}))
    density = {"kind": "raster", "origin_lonlat": FIELD[0], "resolution": 500.0,
               "values": [[1.0] * 6] * 5}
    mission = tmp_path / "m.yaml"
    mission.write_text(yaml.safe_dump(
        geodetic_mission(tmp_path, "field.geojson", density=density)))
    assert main(["simulate", str(mission), "--out", str(tmp_path / "trial")]) == 2
    err = capsys.readouterr().err
    problems = [line.strip() for line in err.splitlines() if line.startswith("  ")]
    assert problems == [f"{tmp_path / 'field.geojson'}: geometry.coordinates: the polygon "
                        "has 1 hole(s); holes (keep-out zones) are not supported yet: give "
                        "the outer ring only"], err
    assert "Traceback" not in err
