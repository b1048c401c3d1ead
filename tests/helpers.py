"""Test-data factories: synthetic basins written as real input files, and small assertions."""
from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np

from agegrid import timescale
from agegrid.synthetic import SyntheticBasin


def write_lines(path: Path, lines: list[np.ndarray], props: list[dict] | None = None) -> Path:
    props = props or [{} for _ in lines]
    path.write_text(json.dumps({"type": "FeatureCollection", "features": [
        {"type": "Feature", "properties": p, "geometry": {"type": "LineString", "coordinates": np.asarray(l).tolist()}}
        for l, p in zip(lines, props)]}))
    return path


def write_polygon(path: Path, polygon) -> Path:
    ring = np.asarray(polygon.exterior.coords)
    path.write_text(json.dumps({"type": "FeatureCollection", "features": [
        {"type": "Feature", "properties": {}, "geometry": {"type": "Polygon", "coordinates": [ring.tolist()]}}]}))
    return path


def write_picks(path: Path, records: list[dict], columns=("id", "track", "lon", "lat", "chron", "edge")) -> Path:
    with open(path, "w", newline="") as fh:
        writer = csv.DictWriter(fh, list(columns), extrasaction="ignore", lineterminator="\n")
        writer.writeheader()
        writer.writerows(records)
    return path


def basin_build(folder: Path, basin: SyntheticBasin | None = None, tracks: int = 40, seed: int = 1,
                spacing: float = 0.1, chunk: int = 256, noise_km: float = 1.5, extra: str = "",
                timescale_name: str = "CK95", formats=("netcdf",), region=None, name="basin",
                with_domain: bool = True, records: list[dict] | None = None) -> Path:
    """Write a synthetic basin's picks, ridges, fracture zones, domain and build file into ``folder``."""
    basin = basin or SyntheticBasin()
    folder.mkdir(parents=True, exist_ok=True)
    if records is None:
        records = basin.survey(timescale.load(timescale_name), tracks, noise_km=noise_km, seed=seed)
    write_picks(folder / "picks.csv", records)
    write_lines(folder / "ridges.geojson", basin.ridges())
    write_lines(folder / "fz.geojson", basin.fracture_zones())
    domain_line = ""
    if with_domain:
        write_polygon(folder / "ocean.geojson", basin.domain_polygon())
        domain_line = 'domain = "ocean.geojson"'
    region = [float(v) for v in (region or basin.region(0.5))]
    (folder / "build.toml").write_text(f'''name = "{name}"
[inputs]
picks = "picks.csv"
ridges = "ridges.geojson"
barriers = "fz.geojson"
{domain_line}
[grid]
region = {region}
spacing = {spacing}
chunk = {chunk}
[age]
timescale = "{timescale_name}"
[output]
directory = "out"
formats = {json.dumps(list(formats))}
{extra}
''')
    return folder / "build.toml"


def scores(error: np.ndarray) -> dict:
    """RMS, 95th percentile and maximum of absolute errors (finite cells)."""
    e = np.abs(error[np.isfinite(error)])
    return {"rms": float(np.sqrt(np.mean(e**2))), "p95": float(np.percentile(e, 95)), "max": float(e.max()),
            "n": int(e.size)}
