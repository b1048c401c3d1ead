"""Incremental, scheduled and distributed rebuilds."""
import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import rasterio
import xarray as xr

from agegrid import timescale
from agegrid.cli import main
from agegrid.grid import GridSpec
from agegrid.synthetic import SyntheticBasin
from tests.helpers import basin_build, write_picks


def arrays(path: Path) -> dict:
    with xr.open_dataset(path) as ds:
        return {k: ds[k].values for k in ds.data_vars}


def assert_same(a: dict, b: dict):
    assert set(a) == set(b)
    for k in a:
        assert np.array_equal(a[k], b[k], equal_nan=a[k].dtype.kind == "f"), k


@pytest.fixture(scope="module")
def survey():
    basin = SyntheticBasin()
    return basin, basin.survey(timescale.load("CK95"), 40, noise_km=1.5, seed=11)


def test_noop_rerun_writes_nothing(tmp_path, survey, capsys):
    basin, records = survey
    build = basin_build(tmp_path, basin, records=records, spacing=0.2, chunk=64, formats=("netcdf", "geotiff"))
    assert main(["build", str(build)]) == 0
    capsys.readouterr()
    out = tmp_path / "out"
    before = {p: p.stat().st_mtime_ns for p in out.rglob("*") if p.is_file()}
    assert main(["build", str(build)]) == 0
    assert "nothing changed" in capsys.readouterr().err
    after = {p: p.stat().st_mtime_ns for p in out.rglob("*") if p.is_file()}
    assert before == after
    # --force rebuilds everything from scratch
    assert main(["build", str(build), "--force", "--quiet"]) == 0
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["cache"]["from_cache"] == 0 and manifest["cache"]["recomputed"] == manifest["cache"]["blocks"]


def test_noop_rerun_imports_neither_the_compiler_nor_the_grid_libraries(tmp_path, survey):
    # A scheduled rerun with nothing changed reads the build file (the cooling-model names included) and
    # the inputs' digests only: numba, scipy, dask and xarray, the bulk of a build's start-up, stay
    # unimported (Python's sys.modules, in a fresh process).
    basin, records = survey
    build = basin_build(tmp_path, basin, records=records, spacing=0.2, chunk=64)
    assert main(["build", str(build), "--quiet"]) == 0
    probe = ("import sys; from agegrid.cli import main; rc = main(['build', sys.argv[1], '--quiet']); "
             "print(rc, *(name in sys.modules for name in ('numba', 'scipy', 'dask', 'xarray')))")
    result = subprocess.run([sys.executable, "-c", probe, str(build)], capture_output=True, text=True, timeout=120)
    assert result.returncode == 0, result.stderr
    assert result.stdout.split() == ["0", "False", "False", "False", "False"]


def test_removing_two_tracks_in_a_corner_rebuilds_few_blocks(tmp_path, survey):
    basin, records = survey
    # two short survey tracks in the basin's southern corner, added to the regional survey
    lon, lat = np.asarray(basin.domain_polygon().exterior.coords).T
    corner = (lon[np.argmin(lat)] - 3, lon[np.argmin(lat)] + 3, lat.min(), lat.min() + 4)
    local = basin.survey(timescale.load("CK95"), 2, noise_km=1.5, seed=5, track_km=(250.0, 400.0),
                         start_box=corner, prefix="L")
    assert local
    build = basin_build(tmp_path / "incremental", basin, records=records + local, spacing=0.1, chunk=64)
    assert main(["build", str(build), "--quiet"]) == 0
    write_picks(tmp_path / "incremental" / "picks.csv", records)  # the two corner tracks removed
    assert main(["build", str(build), "--quiet"]) == 0
    cache = json.loads((tmp_path / "incremental" / "out" / "manifest.json").read_text())["cache"]
    assert 0 < cache["recomputed"] < cache["blocks"] / 2, cache
    fresh = basin_build(tmp_path / "fresh", basin, records=records, spacing=0.1, chunk=64)
    assert main(["build", str(fresh), "--quiet", "--force"]) == 0
    assert_same(arrays(tmp_path / "incremental" / "out" / "basin.nc"), arrays(tmp_path / "fresh" / "out" / "basin.nc"))


def test_blocks_come_from_the_last_netcdf_kept_when_not_an_output(tmp_path, survey):
    basin, records = survey
    build = basin_build(tmp_path, basin, records=records, spacing=0.2, chunk=64, formats=("geotiff",))
    assert main(["build", str(build), "--quiet"]) == 0
    out = tmp_path / "out"
    kept = out / ".agegrid-cache" / "blocks.nc"
    assert kept.is_file() and not (out / "basin.nc").exists()
    manifest = json.loads((out / "manifest.json").read_text())
    assert str(kept) not in {entry["path"] for entry in manifest["outputs"]}
    with rasterio.open(out / "basin_age.tif") as src:
        first = src.read(1)
    write_picks(tmp_path / "picks.csv", records[: len(records) - 3])  # a rebuild with three picks fewer
    assert main(["build", str(build), "--quiet"]) == 0
    cache = json.loads((out / "manifest.json").read_text())["cache"]
    assert 0 < cache["from_cache"] < cache["blocks"], cache
    with rasterio.open(out / "basin_age.tif") as src:
        assert np.isfinite(src.read(1)).sum() == np.isfinite(first).sum()
    # a file that is no longer the one the index names is not read: every block is computed
    kept.write_bytes(kept.read_bytes() + b"\0")
    write_picks(tmp_path / "picks.csv", records)
    assert main(["build", str(build), "--quiet"]) == 0
    cache = json.loads((out / "manifest.json").read_text())["cache"]
    assert cache["from_cache"] == 0 and cache["recomputed"] == cache["blocks"], cache
    with rasterio.open(out / "basin_age.tif") as src:
        np.testing.assert_array_equal(src.read(1), first)


def test_local_cluster_equals_local_threads(tmp_path, survey):
    from distributed import LocalCluster

    basin, records = survey
    local = basin_build(tmp_path / "local", basin, records=records, spacing=0.2, chunk=64)
    remote = basin_build(tmp_path / "remote", basin, records=records, spacing=0.2, chunk=64)
    # a bathymetry on the build's lattice, stored south to north: read block by block, in the workers too
    spec = GridSpec(tuple(basin.region(0.5)), 0.2, chunk=64)
    depth = np.linspace(2500, 5500, spec.size, dtype=np.float32).reshape(spec.shape)
    for build in (local, remote):
        xr.Dataset({"depth": (("lat", "lon"), depth[::-1], {"units": "m", "positive": "down"})},
                   coords={"lat": spec.y[::-1], "lon": spec.x}).to_netcdf(build.parent / "bathymetry.nc")
        build.write_text(build.read_text().replace("[grid]", 'bathymetry = "bathymetry.nc"\n[grid]'))
    assert main(["build", str(local), "--quiet"]) == 0
    cluster = LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                           dashboard_address="127.0.0.1:0")
    try:
        assert main(["build", str(remote), "--quiet", "--scheduler", cluster.scheduler_address]) == 0
    finally:
        cluster.close()
    assert_same(arrays(tmp_path / "local" / "out" / "basin.nc"), arrays(tmp_path / "remote" / "out" / "basin.nc"))
    with xr.open_dataset(tmp_path / "remote" / "out" / "basin.nc") as ds:
        np.testing.assert_array_equal(ds["observed_depth"].values, depth)
    manifest = json.loads((tmp_path / "remote" / "out" / "manifest.json").read_text())
    assert manifest["scheduler"]["kind"] == "distributed"


def test_example_pipelines_validate(capsys):
    folder = Path(__file__).parents[1] / "pipelines"
    files = sorted(folder.glob("*.toml"))
    assert len(files) >= 2
    for path in files:
        assert main(["validate", str(path), "--quiet"]) == 0, path
        capsys.readouterr()
