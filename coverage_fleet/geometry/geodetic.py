"""Geodetic areas: WGS 84 longitude/latitude to the local east-north-up `map` frame.

Field areas come from GIS tools and survey devices as longitude/latitude. The mission then
works in a flat local frame: the east-north-up (ENU) frame tangent to the WGS 84 ellipsoid
at a stated origin (longitude, latitude, ellipsoidal height 0): x east, y north, metres,
as REP 103 and REP 105 want the `map` frame. A point given by longitude/latitude is taken
at ellipsoidal height 0 and its map position is the east and north components of its ENU
coordinates (the up component, the drop of the ellipsoid below the tangent plane, is
dropped: -0.31 m at 2 km, and the region is flat by assumption).

The conversion is PROJ's (through pyproj): geodetic -> Earth-centred Earth-fixed (`cart`)
-> topocentric (`topocentric`), the closed-form chain; test_geometry_geodetic checks it
against that chain written out with the WGS 84 defining constants.

Flatness: the east/north components understate the distance along the ellipsoid by about
d^3 / (6 R^2) at distance d from the origin (0.5 m at 50 km), so points farther than
MAX_DISTANCE_FROM_ORIGIN from the origin are refused.

Default origin (a stated rule, so that a mission without one is reproducible): the centre
of the polygon's longitude/latitude bounding box. The origin used is recorded in the
mission as run (`region.origin`).
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property
from typing import Any

import numpy as np

from coverage_fleet.errors import ConfigError, Problem
from coverage_fleet.inputs.fields import (
    describe,
    join_key,
    length_message,
    number_fault,
    type_message,
)

#: Points farther than this from the origin are refused (see the module docstring), metres.
MAX_DISTANCE_FROM_ORIGIN = 50_000.0


@dataclass(frozen=True)
class LocalFrame:
    """The ENU `map` frame tangent to the WGS 84 ellipsoid at (longitude, latitude, 0),
    degrees."""

    longitude: float
    latitude: float

    @cached_property
    def _transformer(self) -> Any:
        from pyproj import Transformer

        return Transformer.from_pipeline(
            "+proj=pipeline +step +proj=unitconvert +xy_in=deg +xy_out=rad "
            "+step +proj=cart +ellps=WGS84 "
            f"+step +proj=topocentric +ellps=WGS84 +lon_0={self.longitude!r} "
            f"+lat_0={self.latitude!r} +h_0=0"
        )

    def describe(self) -> str:
        """The origin as people write it: '46.000050° N, 11.000100° E (WGS 84)'."""
        north = "N" if self.latitude >= 0 else "S"
        east = "E" if self.longitude >= 0 else "W"
        return (f"{abs(self.latitude):.6f}° {north}, {abs(self.longitude):.6f}° {east} "
                "(WGS 84)")

    def to_map(self, lonlat: np.ndarray) -> np.ndarray:
        """(M, 2) longitude/latitude (degrees, height 0) -> (M, 2) east/north (m)."""
        points = np.atleast_2d(np.asarray(lonlat, dtype=float))
        east, north, _ = self._transformer.transform(
            points[:, 0], points[:, 1], np.zeros(len(points))
        )
        return np.column_stack([east, north])

    def to_lonlat(self, xy: np.ndarray) -> np.ndarray:
        """(M, 2) east/north (m) -> (M, 2) longitude/latitude (degrees) of the point at
        height 0 with those east/north components (inverse of to_map)."""
        points = np.atleast_2d(np.asarray(xy, dtype=float))
        east, north = points[:, 0], points[:, 1]
        inverse = self._transformer.transform
        # Two passes: the up component of the height-0 point is not known in advance; the
        # first guess (up = 0) gives a point a fraction of a metre high whose up component
        # is then used (the second pass is exact to rounding for fields within the limit).
        up = np.zeros(len(points))
        for _ in range(2):
            lon, lat, _ = inverse(east, north, up, direction="INVERSE")
            up = self._transformer.transform(lon, lat, np.zeros(len(points)))[2]
        lon, lat, _ = inverse(east, north, up, direction="INVERSE")
        return np.column_stack([lon, lat])


def default_origin(lonlat: np.ndarray) -> tuple[float, float]:
    """The centre of the points' longitude/latitude bounding box (the default origin)."""
    low, high = lonlat.min(axis=0), lonlat.max(axis=0)
    return float((low[0] + high[0]) / 2.0), float((low[1] + high[1]) / 2.0)


def check_lonlat(value: Any, source: str, key: str) -> list[Problem]:
    """Problems of one [longitude, latitude] pair in degrees."""
    if not isinstance(value, list | tuple) or len(value) != 2:
        return [Problem(source, key, length_message(2, "longitude, latitude in degrees",
                                                    value))]
    problems = []
    for index, (entry, limit) in enumerate(zip(value, (180.0, 90.0), strict=True)):
        fault = number_fault(entry, minimum=-limit, maximum=limit)
        if fault:
            problems.append(Problem(source, f"{key}[{index}]", fault))
    return problems


def polygon_ring(document: Any, source: str, key: str) -> tuple[np.ndarray, str]:
    """The outer ring of a GeoJSON Polygon (RFC 7946, section 3.1.6), a Feature holding one
    (3.2), or a FeatureCollection of exactly one such Feature (3.3), as (N, 2) longitude/
    latitude without the closing repeat, and the ring's key path. Heights (third numbers)
    are ignored: the region is flat. Refused: holes (keep-out zones do not exist yet),
    other geometry types, open rings, fewer than 4 positions, coordinates outside
    [-180, 180] x [-90, 90], a `crs` member (RFC 7946 GeoJSON is always WGS 84
    longitude/latitude, section 4)."""

    def fail(where: str, message: str) -> ConfigError:
        return ConfigError.single(source, where, message)

    if not isinstance(document, dict):
        raise fail(key, type_message("a GeoJSON object (Polygon, Feature or "
                                     "FeatureCollection)", document))
    if "crs" in document:
        raise fail(join_key(key, "crs"), "GeoJSON (RFC 7946) is always WGS 84 longitude/latitude; "
                   "remove 'crs' and convert other coordinate systems before use")
    kind = document.get("type")
    if kind == "FeatureCollection":
        features = document.get("features")
        if not isinstance(features, list) or len(features) != 1:
            raise fail(join_key(key, "features"), "must hold exactly one Feature (the region), got "
                       f"{len(features) if isinstance(features, list) else describe(features)}")
        return polygon_ring(features[0], source, join_key(join_key(key, "features"), 0))
    if kind == "Feature":
        return polygon_ring(document.get("geometry"), source, join_key(key, "geometry"))
    if kind != "Polygon":
        raise fail(join_key(key, "type"), f"must be 'Polygon' (or a Feature holding one), got "
                   f"{describe(kind)}")
    rings = document.get("coordinates")
    if not isinstance(rings, list) or not rings:
        raise fail(join_key(key, "coordinates"), type_message("a list of linear rings", rings))
    if len(rings) > 1:
        raise fail(join_key(key, "coordinates"), f"the polygon has {len(rings) - 1} hole(s); holes "
                   "(keep-out zones) are not supported yet: give the outer ring only")
    ring = rings[0]
    where = join_key(join_key(key, "coordinates"), 0)
    if not isinstance(ring, list) or len(ring) < 4:
        raise fail(where, type_message("a closed ring of at least 4 positions "
                                       "[longitude, latitude]", ring))
    problems: list[Problem] = []
    for index, position in enumerate(ring):
        pair = position[:2] if isinstance(position, list) and len(position) == 3 else position
        problems.extend(check_lonlat(pair, source, f"{where}[{index}]"))
    if problems:
        raise ConfigError(problems)
    points = np.array([[float(p[0]), float(p[1])] for p in ring])
    if not np.array_equal(points[0], points[-1]):
        raise fail(where, "the ring must be closed: its last position repeats the first "
                   "(RFC 7946, section 3.1.6)")
    return points[:-1], where


def map_vertices(
    lonlat: np.ndarray, frame: LocalFrame, source: str, key: str
) -> np.ndarray:
    """The ring's vertices in the map frame; refused beyond MAX_DISTANCE_FROM_ORIGIN."""
    xy = frame.to_map(lonlat)
    far = np.hypot(xy[:, 0], xy[:, 1])
    worst = int(np.argmax(far))
    if far[worst] > MAX_DISTANCE_FROM_ORIGIN:
        raise ConfigError.single(
            source, f"{key}[{worst}]",
            f"is {far[worst] / 1000:.3g} km from the origin; the flat map frame allows at most "
            f"{MAX_DISTANCE_FROM_ORIGIN / 1000:g} km (split the area or move the origin)")
    return xy
