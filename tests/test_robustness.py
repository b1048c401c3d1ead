"""Every bad input gets exit 2 with the file and the line, feature or key named, no traceback, and the
previous outputs untouched; a build killed while writing loses nothing."""
import hashlib
import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import xarray as xr

from agegrid.cli import DEMO, main


@pytest.fixture(scope="module")
def built_demo(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("robust") / "demo"
    shutil.copytree(DEMO.parent, folder, ignore=shutil.ignore_patterns("*.py", "__pycache__", "out"))
    assert main(["build", str(folder / "build.toml"), "--quiet"]) == 0
    return folder


def _digest(path: Path) -> str:
    """sha256 of a file read whole by hashlib (independent of agegrid's own hashing)."""
    return hashlib.sha256(path.read_bytes()).hexdigest()


def snapshot(folder: Path) -> dict:
    return {p.name: _digest(p) for p in (folder / "out").iterdir() if p.is_file() and not p.name.startswith(".")}


def set_key(text: str, key: str, value: str) -> str:
    lines = text.splitlines()
    for i, line in enumerate(lines):
        if line.split("=")[0].strip() == key:
            lines[i] = f"{key} = {value}"
            return "\n".join(lines) + "\n"
    raise AssertionError(key)


PICKS_HEADER = "id,track,lon,lat,chron,edge,sigma_km\n"


def picks(body: str):
    return lambda f: (f / "picks.csv").write_text(PICKS_HEADER + body)


def raw(name: str, data: bytes):
    return lambda f: (f / name).write_bytes(data)


def config(key: str, value: str):
    return lambda f: (f / "build.toml").write_text(set_key((f / "build.toml").read_text(), key, value))


def append_config(text: str):
    return lambda f: (f / "build.toml").write_text((f / "build.toml").read_text() + text)


def grid_without_coordinates(f):
    xr.Dataset({"z": (("a", "b"), np.zeros((3, 4)))}).to_netcdf(f / "bathymetry.nc")


POLYGON = '{"type":"Polygon","coordinates":[[[0,0],[1,0],[1,1],[0,0]]]}'
LINE = '{"type":"LineString","coordinates":[[0,0],[1,1]]}'

CASES = {
    "text in a number column": (picks("a,T1,-125.0,abc,C5n.2n,old,1.5\n"), "picks.csv", "line 2", "number"),
    "latitude out of range": (picks("a,T1,-125.0,95,C5n.2n,old,1.5\n"), "picks.csv", "line 2", "latitude"),
    "longitude out of range": (picks("a,T1,-400,1,C5n.2n,old,1.5\n"), "picks.csv", "line 2", "longitude"),
    "empty age": (lambda f: (f / "picks.csv").write_text("lon,lat,age_ma\n-125,1,\n"), "picks.csv", "line 2", "empty"),
    "negative age": (lambda f: (f / "picks.csv").write_text("lon,lat,age_ma\n-125,1,-3\n"), "picks.csv", "line 2",
                     "impossible"),
    "absurd age": (lambda f: (f / "picks.csv").write_text("lon,lat,age_ma\n-125,1,900\n"), "picks.csv", "line 2",
                   "impossible"),
    "unknown chron": (picks("a,T1,-125.0,1,C5n.7n,old,1.5\n"), "picks.csv", "line 2", "not in CK95"),
    "quote left open": (picks('a,T1,-125.0,1,"C5n.2n,old,1.5\nb,T1,-125.0,1,C5n.2n,old,1.5\n'), "picks.csv", "line 2",
                        "quoted field"),
    "missing column": (lambda f: (f / "picks.csv").write_text("lon,age_ma\n1,2\n"), "picks.csv", "line 1", "lat"),
    "empty file": (raw("picks.csv", b""), "picks.csv", "", "empty"),
    "binary file": (raw("picks.csv", b"\x00\x01\x02lon,lat\n"), "picks.csv", "", "binary"),
    "not UTF-8": (raw("picks.csv", "lon,lat,age_ma\n1,2,3 \xe9\n".encode("latin-1")), "picks.csv", "line 2", "UTF-8"),
    "truncated GeoJSON": (raw("ridges.geojson", b'{"type": "FeatureCollection", "features": [{"type": "Fe'),
                          "ridges.geojson", "line 1", "invalid GeoJSON"),
    "invalid GeoJSON": (raw("ridges.geojson", b'{"type": "Circle"}'), "ridges.geojson", "", "invalid GeoJSON"),
    "lines where polygons are expected": (raw("ocean.geojson", LINE.encode()), "ocean.geojson", "feature 0",
                                          "expected polygons"),
    "polygons where lines are expected": (raw("fracture_zones.geojson", POLYGON.encode()), "fracture_zones.geojson",
                                          "feature 0", "expected lines"),
    "grid file not NetCDF or GeoTIFF": (raw("bathymetry.nc", b"just some text\n"), "bathymetry.nc", "",
                                        "not a NetCDF or GeoTIFF"),
    "grid without coordinates": (grid_without_coordinates, "bathymetry.nc", "", "no 2-D variable"),
    "missing input file": (config("sediment", '"gone.nc"'), "build.toml", "inputs.sediment", "not found"),
    "west >= east": (config("region", "[3.0, -13.0, -8.0, 9.0]"), "build.toml", "grid.region", "west"),
    "south >= north": (config("region", "[-133.0, -117.0, 9.0, -8.0]"), "build.toml", "grid.region", "south"),
    "zero spacing": (config("spacing", "0"), "build.toml", "grid.spacing", "positive"),
    "negative spacing": (config("spacing", "-0.1"), "build.toml", "grid.spacing", "positive"),
    "grid too large": (config("spacing", "0.00005"), "build.toml", "grid.spacing", "GiB"),
    "unknown key": (append_config("colour = 3\n"), "build.toml", "output.colour", "unknown key"),
    "unknown model": (config("models", '["gdh1", "parsons"]'), "build.toml", "depth.models", "unknown model"),
    "broken TOML": (append_config("[grid\n"), "build.toml", "", "broken TOML"),
}


@pytest.mark.parametrize("case", sorted(CASES))
def test_bad_input(case, built_demo, tmp_path, capsys):
    damage, file_name, where, words = CASES[case]
    folder = tmp_path / "demo"
    shutil.copytree(built_demo, folder)
    before = snapshot(folder)
    damage(folder)
    assert main(["build", str(folder / "build.toml"), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1, err  # one message
    assert "Traceback" not in err
    assert str(folder / file_name) in err, err
    assert where in err and words in err, err
    assert snapshot(folder) == before
    assert not list((folder / "out").glob(".agegrid-tmp-*"))


def test_debug_shows_the_traceback(built_demo, tmp_path, capsys):
    folder = tmp_path / "demo"
    shutil.copytree(built_demo, folder)
    (folder / "picks.csv").write_text("lon,lat,age_ma\n1,x,2\n")
    assert main(["--debug", "build", str(folder / "build.toml"), "--quiet"]) == 2
    assert "Traceback" in capsys.readouterr().err


def test_sigkill_during_write_loses_nothing(built_demo, tmp_path):
    folder = tmp_path / "demo"
    shutil.copytree(built_demo, folder)
    before = snapshot(folder)
    out = folder / "out"
    proc = subprocess.Popen([sys.executable, "-m", "agegrid", "build", str(folder / "build.toml"), "--quiet"],
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    deadline = time.monotonic() + 120
    killed = False
    while time.monotonic() < deadline and proc.poll() is None:
        if list(out.glob(".agegrid-tmp-*")):  # the write phase has begun
            os.kill(proc.pid, signal.SIGKILL)
            killed = True
            break
        time.sleep(0.002)
    proc.wait()
    assert killed, "the build finished before its write phase could be interrupted"
    assert snapshot(folder) == before  # every output byte-identical to the previous build
    assert main(["build", str(folder / "build.toml"), "--quiet"]) == 0  # stale lock and temp files handled
    assert not list(out.glob(".agegrid-tmp-*"))
    manifest = json.loads((out / "manifest.json").read_text())
    for entry in manifest["outputs"]:
        assert _digest(Path(entry["path"])) == entry["sha256"]
