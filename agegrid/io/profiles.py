"""Magnetic survey profiles: CSV with ``lon``, ``lat``, ``anomaly_nt``, ``track`` and an optional ``time``."""
from __future__ import annotations

import csv
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from agegrid.errors import BadInput
from agegrid.io.points import _number
from agegrid.io.text import read_text

REQUIRED = ("lon", "lat", "anomaly_nt", "track")


@dataclass
class Profiles:
    """Survey points in file order (or time order where ``time`` is given), with their tracks."""

    path: Path
    lon: np.ndarray
    lat: np.ndarray
    anomaly: np.ndarray
    track: np.ndarray
    order: np.ndarray

    def tracks(self):
        """(track id, index array in along-track order) per track."""
        for name in dict.fromkeys(self.track):
            idx = np.flatnonzero(self.track == name)
            yield name, idx[np.argsort(self.order[idx], kind="stable")]


def read_profiles(path: str | Path) -> Profiles:
    """Read a profile CSV; every value is checked, and errors name the file and line."""
    text = read_text(path)
    rows = [(n, line) for n, line in enumerate(text.splitlines(), 1) if line.strip() and not line.startswith("#")]
    header_line, header = rows[0]
    columns = [c.strip() for c in next(csv.reader([header]))]
    missing = [c for c in REQUIRED if c not in columns]
    if missing:
        raise BadInput(f"missing required column(s): {', '.join(missing)}", path, f"line {header_line}")
    lon, lat, anomaly, track, order = [], [], [], [], []
    for n, line in rows[1:]:
        values = dict(zip(columns, (v.strip() for v in next(csv.reader([line])))))
        where = f"line {n}"
        lo, la = _number(values.get("lon"), path, where, "lon"), _number(values.get("lat"), path, where, "lat")
        if not -90 <= la <= 90:
            raise BadInput(f"latitude {la} outside [-90, 90]", path, where)
        if not -360 <= lo <= 360:
            raise BadInput(f"longitude {lo} outside [-360, 360]", path, where)
        anomaly.append(_number(values.get("anomaly_nt"), path, where, "anomaly_nt"))
        if not values.get("track"):
            raise BadInput("empty track", path, where)
        lon.append(lo)
        lat.append(la)
        track.append(values["track"])
        order.append(_number(values.get("time"), path, where, "time", required=False) if "time" in columns else n)
    if not lon:
        raise BadInput("no profile points", path)
    order = np.array(order, float)
    order = np.where(np.isnan(order), np.arange(len(order)), order)
    return Profiles(Path(path), np.array(lon), np.array(lat), np.array(anomaly), np.array(track, dtype=object), order)
