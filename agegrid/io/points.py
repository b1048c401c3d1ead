"""Pick tables: CSV (header row, ``#`` comments) or GeoJSON points, with precise errors.

The reader checks form only (numbers, ranges, required columns); dating chron labels is the job of
:mod:`agegrid.control`.
"""
from __future__ import annotations

import csv
import io
import json
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from agegrid.errors import BadInput
from agegrid.io.text import read_text

#: Oldest age accepted in a pick table (Ma): older than any oceanic crust (about 200 Ma, common
#: practice) with a margin.
MAX_AGE_MA = 250.0


@dataclass
class PickTable:
    """Picks as read: positions, ages or chron labels, and every other column carried along.

    ``where`` holds, per pick, the place to name in a message (``"line 7"`` or ``"feature 3"``).
    """

    path: Path
    columns: list[str]
    records: list[dict]
    where: list[str]
    lon: np.ndarray
    lat: np.ndarray
    age: np.ndarray
    chron: list[str | None]
    edge: list[str]
    ids: list[str]
    track: list[str]
    sigma_km: np.ndarray
    flank: list[str]
    geojson: bool = False

    def __len__(self) -> int:
        return len(self.lon)


def _number(text, path, where, column, required=True):
    text = "" if text is None else str(text).strip()
    if not text:
        if required:
            raise BadInput(f"empty {column}", path, where)
        return math.nan
    try:
        value = float(text)
    except ValueError:
        raise BadInput(f"{column} must be a number, got {text!r}", path, where) from None
    if not math.isfinite(value):
        raise BadInput(f"{column} must be finite, got {text!r}", path, where)
    return value


def _parse_record(record: dict, path: Path, where: str) -> tuple:
    lon = _number(record.get("lon"), path, where, "lon")
    lat = _number(record.get("lat"), path, where, "lat")
    if not -90 <= lat <= 90:
        raise BadInput(f"latitude {lat} outside [-90, 90]", path, where)
    if not -360 <= lon <= 360:
        raise BadInput(f"longitude {lon} outside [-360, 360]", path, where)
    chron = (record.get("chron") or "").strip() or None
    age = _number(record.get("age_ma"), path, where, "age_ma", required=chron is None)
    if not math.isnan(age) and not 0 <= age <= MAX_AGE_MA:
        raise BadInput(f"age_ma {age} is impossible (must lie in 0..{MAX_AGE_MA:g} Ma)", path, where)
    edge = (record.get("edge") or "young").strip().lower()
    if edge not in ("young", "old"):
        raise BadInput(f"edge must be 'young' or 'old', got {record.get('edge')!r}", path, where)
    sigma = _number(record.get("sigma_km"), path, where, "sigma_km", required=False)
    if not math.isnan(sigma) and sigma <= 0:
        raise BadInput(f"sigma_km must be positive, got {sigma}", path, where)
    return lon, lat, age, chron, edge, sigma


def _table(path, columns, records, where, geojson) -> PickTable:
    if not records:
        raise BadInput("no picks in the file", path)
    parsed = [_parse_record(r, path, w) for r, w in zip(records, where)]
    lon, lat, age, chron, edge, sigma = zip(*parsed)
    ids = [str(r.get("id") or "").strip() or f"{Path(path).stem}:{w.split()[-1]}"
           for r, w in zip(records, where)]
    return PickTable(
        path=Path(path), columns=columns, records=records, where=list(where), lon=np.array(lon),
        lat=np.array(lat), age=np.array(age), chron=list(chron), edge=list(edge), ids=ids,
        track=[str(r.get("track") or "").strip() for r in records], sigma_km=np.array(sigma),
        flank=[str(r.get("flank") or "").strip() for r in records], geojson=geojson)


def read_picks_csv(path: str | Path) -> PickTable:
    """Read a pick CSV: a header row, ``lon``, ``lat`` and ``age_ma`` or ``chron`` per row."""
    text = read_text(path)
    lines = text.splitlines()
    body = [(n, line) for n, line in enumerate(lines, 1) if line.strip() and not line.lstrip().startswith("#")]
    if not body:
        raise BadInput("no header row (the file holds only comments)", path)
    header_line, header = body[0]
    columns = [c.strip() for c in next(csv.reader([header]))]
    missing = [c for c in ("lon", "lat") if c not in columns]
    if missing or not ({"age_ma", "chron"} & set(columns)):
        need = missing + ([] if {"age_ma", "chron"} & set(columns) else ["age_ma or chron"])
        raise BadInput(f"missing required column(s): {', '.join(need)} (header has: {', '.join(columns)})",
                       path, f"line {header_line}")
    if len(set(columns)) != len(columns):
        raise BadInput("repeated column names in the header", path, f"line {header_line}")
    records, where = [], []
    rows = csv.reader(line for _, line in body[1:])  # one line a row, as the numbering assumes
    for k, (n, _) in enumerate(body[1:], 1):
        try:
            values = next(rows)
        except csv.Error as exc:
            raise BadInput(f"unreadable CSV row: {exc}", path, f"line {n}") from None
        if rows.line_num != k:
            raise BadInput("unreadable CSV row: a quoted field runs past the end of the line", path, f"line {n}")
        if len(values) != len(columns):
            raise BadInput(f"{len(values)} fields where the header has {len(columns)}", path, f"line {n}")
        records.append(dict(zip(columns, [v.strip() for v in values])))
        where.append(f"line {n}")
    return _table(path, columns, records, where, geojson=False)


def load_geojson(path: str | Path) -> list[dict]:
    """The features of a GeoJSON FeatureCollection (or a single Feature / bare geometry)."""
    text = read_text(path)
    try:
        data = json.loads(text)
    except json.JSONDecodeError as exc:
        raise BadInput(f"invalid GeoJSON: {exc.msg}", path, f"line {exc.lineno}") from None
    if not isinstance(data, dict):
        raise BadInput("invalid GeoJSON: the top level must be an object", path)
    kind = data.get("type")
    if kind == "FeatureCollection":
        features = data.get("features")
        if not isinstance(features, list):
            raise BadInput("invalid GeoJSON: 'features' must be a list", path)
    elif kind == "Feature":
        features = [data]
    elif kind in ("Point", "MultiPoint", "LineString", "MultiLineString", "Polygon", "MultiPolygon"):
        features = [{"type": "Feature", "geometry": data, "properties": {}}]
    else:
        raise BadInput(f"invalid GeoJSON: unknown type {kind!r}", path)
    if not features:
        raise BadInput("no features in the file", path)
    for i, feature in enumerate(features):
        if not isinstance(feature, dict) or not isinstance(feature.get("geometry"), dict):
            raise BadInput("invalid GeoJSON: feature without a geometry", path, f"feature {i}")
        if not isinstance(feature.get("properties") or {}, dict):
            raise BadInput("invalid GeoJSON: properties must be an object", path, f"feature {i}")
    return features


def read_picks_geojson(path: str | Path) -> PickTable:
    """Read picks from GeoJSON Point features whose properties are the CSV columns."""
    features = load_geojson(path)
    records, where, columns = [], [], []
    for i, feature in enumerate(features):
        geometry = feature["geometry"]
        if geometry.get("type") != "Point":
            raise BadInput(f"picks must be Point features, got {geometry.get('type')}", path, f"feature {i}")
        coords = geometry.get("coordinates")
        if not isinstance(coords, list) or len(coords) < 2:
            raise BadInput("a Point needs [lon, lat] coordinates", path, f"feature {i}")
        props = dict(feature.get("properties") or {})
        for key in props:
            if key not in columns:
                columns.append(key)
        props = {k: ("" if v is None else str(v)) for k, v in props.items()}
        props["lon"], props["lat"] = str(coords[0]), str(coords[1])
        records.append(props)
        where.append(f"feature {i}")
    if "age_ma" not in columns and "chron" not in columns:
        raise BadInput("picks need an 'age_ma' or 'chron' property", path, "feature 0")
    return _table(path, ["lon", "lat"] + columns, records, where, geojson=True)


def read_picks(path: str | Path) -> PickTable:
    """Read a pick table, CSV or GeoJSON by the file's ending."""
    suffix = Path(path).suffix.lower()
    if suffix in (".geojson", ".json"):
        return read_picks_geojson(path)
    return read_picks_csv(path)


def write_picks(table: PickTable, ages: np.ndarray, target: Path) -> None:
    """Write the picks with ``age_ma`` filled in, keeping every other column (CSV or GeoJSON)."""
    from agegrid.io.atomic import atomic_write_text

    if table.geojson or target.suffix.lower() in (".geojson", ".json"):
        features = []
        for record, lon, lat, age in zip(table.records, table.lon, table.lat, ages):
            props = {k: v for k, v in record.items() if k not in ("lon", "lat")}
            props["age_ma"] = round(float(age), 6)
            features.append({"type": "Feature", "properties": props,
                             "geometry": {"type": "Point", "coordinates": [float(lon), float(lat)]}})
        atomic_write_text(target, json.dumps({"type": "FeatureCollection", "features": features}, indent=1))
        return
    columns = list(table.columns) + ([] if "age_ma" in table.columns else ["age_ma"])
    buffer = io.StringIO()
    writer = csv.DictWriter(buffer, columns, lineterminator="\n")
    writer.writeheader()
    for record, age in zip(table.records, ages):
        writer.writerow({**record, "age_ma": f"{age:.6g}"})
    atomic_write_text(target, buffer.getvalue())
