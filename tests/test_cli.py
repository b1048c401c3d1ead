"""The command line: date, timescales, models, validate, demo, the build lock."""
import csv
import json
import socket
import subprocess
import sys
from pathlib import Path


from agegrid import timescale
from agegrid.cli import main
from agegrid.lock import LOCK_NAME


def test_date_fills_exact_table_ages(tmp_path, capsys):
    picks = tmp_path / "picks.csv"
    picks.write_text("# chron picks\nid,lon,lat,chron,edge,cruise\na,1,2,C5n.2n,old,X1\nb,1,2.1,c13r,young,X1\n"
                     "c,1,2.2,M0r,,X2\nd,1,2.3,,,X2\n".replace(",,,X2", ",,,X2").replace("d,1,2.3,,,X2\n", ""))
    out = tmp_path / "dated.csv"
    assert main(["date", str(picks), "--timescale", "GTS2012", "--output", str(out)]) == 0
    rows = list(csv.DictReader(out.open()))
    gts = timescale.load("GTS2012")
    assert [float(r["age_ma"]) for r in rows] == [gts.boundary("C5n.2n", "old"), gts.boundary("C13r", "young"),
                                                   gts.boundary("M0r", "young")]
    # published values, Ogg (2012) GTS2012 (see tests/test_timescale.py)
    assert float(rows[0]["age_ma"]) == 11.056
    assert rows[0]["cruise"] == "X1" and rows[2]["id"] == "c"


def test_date_geojson_and_stdout(tmp_path, capsys):
    path = tmp_path / "picks.geojson"
    path.write_text(json.dumps({"type": "FeatureCollection", "features": [
        {"type": "Feature", "properties": {"chron": "C6n", "edge": "young", "id": "p1"},
         "geometry": {"type": "Point", "coordinates": [3, 4]}}]}))
    assert main(["date", str(path), "--timescale", "CK95"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert data["features"][0]["properties"]["age_ma"] == timescale.load("CK95").boundary("C6n", "young")


def test_date_unknown_chron_names_file_line_label(tmp_path, capsys):
    picks = tmp_path / "picks.csv"
    picks.write_text("lon,lat,chron\n1,2,C5n.2n\n1,2,C5n.3n\n")
    assert main(["date", str(picks), "--timescale", "CK95"]) == 2
    err = capsys.readouterr().err
    assert f"{picks}: line 3: chron C5n.3n is not in CK95; close matches:" in err
    picks.write_text("lon,lat,chron\n1,2,M5n\n")
    assert main(["date", str(picks), "--timescale", "GTS2020"]) == 2
    assert "line 2" in capsys.readouterr().err


def test_timescales_and_models_listings(capsys):
    assert main(["timescales"]) == 0
    out = capsys.readouterr().out
    for name in timescale.BUNDLED:
        assert name in out
    assert "Cande" in out and "suspect" in out
    assert main(["models"]) == 0
    out = capsys.readouterr().out
    assert "365.25" in out and "Stein" in out and "plate_thickness_km = 95.0" in out


def test_concurrent_build_exits_3(demo_copy, capsys):
    out = demo_copy.parent / "out"
    out.mkdir()
    holder = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(30)"])
    try:
        (out / LOCK_NAME).write_text(json.dumps({"pid": holder.pid, "host": socket.gethostname(),
                                                 "started": "2026-12-01T00:00:00+00:00"}))
        assert main(["build", str(demo_copy), "--quiet"]) == 3
        err = capsys.readouterr().err
        assert f"pid {holder.pid}" in err and socket.gethostname() in err and "2026-12-01" in err
    finally:
        holder.kill()
        holder.wait()
    # the holder is gone: the stale lock is taken over and the build succeeds
    assert main(["build", str(demo_copy), "--quiet"]) == 0
    assert not (out / LOCK_NAME).exists()


def test_console_script_demo(tmp_path):
    exe = Path(sys.executable).with_name("agegrid")
    result = subprocess.run([str(exe), "demo", "--output", str(tmp_path / "d")], capture_output=True, text=True,
                            timeout=300)
    assert result.returncode == 0, result.stderr
    assert "stage age model done" in result.stderr
    assert (tmp_path / "d" / "veyra-basin.nc").is_file() and (tmp_path / "d" / "manifest.json").is_file()
    assert list((tmp_path / "d").glob("*.tif"))
    quiet = subprocess.run([str(exe), "demo", "--quiet", "--output", str(tmp_path / "q")], capture_output=True,
                           text=True, timeout=300)
    assert quiet.returncode == 0 and quiet.stderr == ""


def test_build_command_readies_the_process_before_the_build_starts(demo_copy):
    # Before the build's clock starts, the command loads numba's registries (numba.np.arraymath among the
    # modules its first compiled call imports) and freezes the objects made so far out of the garbage
    # collector's reach (Python's gc.get_freeze_count), with the collector left on. Checked in a fresh
    # process, with the build replaced by a probe.
    probe = ("import gc, sys; import agegrid.pipeline as p; seen = []; "
             "p.build = lambda *a, **k: seen.extend(['numba.np.arraymath' in sys.modules, "
             "gc.get_freeze_count() > 100_000, gc.isenabled()]); "
             "before = 'numba.np.arraymath' in sys.modules or gc.get_freeze_count() > 0; "
             "from agegrid.cli import main; "
             f"rc = main(['build', {str(demo_copy)!r}, '--force', '--quiet']); print(before, *seen, rc)")
    result = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, timeout=120)
    assert result.returncode == 0, result.stderr
    assert result.stdout.split() == ["False", "True", "True", "True", "0"]


def test_a_build_after_start_up_imports_nothing_outside_the_standard_library(tmp_path):
    # The start-up imports every library a build uses, so that the build's clock, like the bench's griddata's,
    # starts after its imports: a whole build (bathymetry, NetCDF and COGs, no report) in a fresh process then
    # imports nothing outside Python's standard library (sys.stdlib_module_names).
    import numpy as np
    import xarray as xr

    from agegrid.grid import GridSpec
    from agegrid.synthetic import SyntheticBasin
    from tests.helpers import basin_build

    basin = SyntheticBasin()
    build = basin_build(tmp_path, basin, spacing=0.2, chunk=64, formats=("netcdf", "geotiff"), extra="report = false")
    spec = GridSpec(tuple(basin.region(0.5)), 0.2, chunk=64)
    depth = np.linspace(2500, 5500, spec.size, dtype=np.float32).reshape(spec.shape)
    xr.Dataset({"depth": (("lat", "lon"), depth, {"units": "m", "positive": "down"})},
               coords={"lat": spec.y, "lon": spec.x}).to_netcdf(build.parent / "bathymetry.nc")
    build.write_text(build.read_text().replace("[grid]", 'bathymetry = "bathymetry.nc"\n[grid]'))
    probe = ("import sys; from agegrid.startup import ready_to_build; ready_to_build(); "
             "from agegrid.config import load_build_file; from agegrid.pipeline import build; "
             "before = set(sys.modules); "
             f"build(load_build_file({str(build)!r}), force=True, progress=False); "
             "print(sorted({m.split('.')[0] for m in set(sys.modules) - before} - set(sys.stdlib_module_names)))")
    result = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, timeout=300)
    assert result.returncode == 0, result.stderr
    assert result.stdout.strip() == "[]"
