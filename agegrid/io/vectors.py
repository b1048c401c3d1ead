"""GeoJSON lines (ridges, isochrons, barriers) and polygons (the oceanic domain)."""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from agegrid.errors import BadInput
from agegrid.io.points import load_geojson

LINE_TYPES = ("LineString", "MultiLineString")
POLYGON_TYPES = ("Polygon", "MultiPolygon")


@dataclass
class LineFeature:
    """One line of a GeoJSON file: vertices (lon, lat) and the feature's properties."""

    index: int
    lonlat: np.ndarray
    properties: dict


def _coordinates(coords, path, where) -> np.ndarray:
    try:
        array = np.asarray([[float(c[0]), float(c[1])] for c in coords], dtype=float)
    except (TypeError, ValueError, IndexError):
        raise BadInput("coordinates must be [lon, lat] number pairs", path, where) from None
    if not np.isfinite(array).all():
        raise BadInput("coordinates must be finite", path, where)
    if (np.abs(array[:, 1]) > 90).any():
        raise BadInput("latitude outside [-90, 90]", path, where)
    if (np.abs(array[:, 0]) > 360).any():
        raise BadInput("longitude outside [-360, 360]", path, where)
    return array


def _features(path, wanted: tuple[str, str], other: tuple[str, str], noun: str):
    """(index, feature, geometry type, place) of each feature, refusing geometries of the wrong kind."""
    for i, feature in enumerate(load_geojson(path)):
        kind, where = feature["geometry"].get("type"), f"feature {i}"
        if kind in other:
            raise BadInput(f"expected {noun}, got a {kind}", path, where)
        if kind not in wanted:
            raise BadInput(f"expected {' or '.join(wanted)}, got {kind}", path, where)
        yield i, feature, kind, where


def read_lines(path: str | Path) -> list[LineFeature]:
    """Read the (Multi)LineString features of a GeoJSON file, one :class:`LineFeature` per part."""
    lines = []
    for i, feature, kind, where in _features(path, LINE_TYPES, POLYGON_TYPES, "lines"):
        parts = feature["geometry"].get("coordinates")
        if not isinstance(parts, list):
            raise BadInput("missing coordinates", path, where)
        for part in ([parts] if kind == "LineString" else parts):
            array = _coordinates(part, path, where)
            if len(array) < 2:
                raise BadInput("a line needs at least two vertices", path, where)
            lines.append(LineFeature(i, array, dict(feature.get("properties") or {})))
    return lines


def read_polygons(path: str | Path):
    """Read the (Multi)Polygon features of a GeoJSON file as one shapely geometry (lon, lat)."""
    from shapely.geometry import shape
    from shapely.ops import unary_union

    polygons = []
    for i, feature, kind, where in _features(path, POLYGON_TYPES, LINE_TYPES, "polygons"):
        try:
            polygon = shape(feature["geometry"])
        except Exception as exc:  # shapely raises several types for malformed rings
            raise BadInput(f"invalid polygon: {exc}", path, where) from None
        if polygon.is_empty:
            raise BadInput("empty polygon", path, where)
        if not polygon.is_valid:
            polygon = polygon.buffer(0)
        polygons.append(polygon)
    return unary_union(polygons)
