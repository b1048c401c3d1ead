"""Outputs: CF-1.8 NetCDF (IOOS compliance-checker), COG read back by GDAL (rasterio), manifest."""
import hashlib
import json
import os
import stat
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import rasterio
import xarray as xr

from agegrid.manifest import sha256

CHECKER = Path(sys.executable).with_name("compliance-checker")


def cf_report(path: Path, tmp_path: Path) -> dict:
    """Run the IOOS compliance-checker's cf:1.8 suite and return its JSON report."""
    out = tmp_path / "cf.json"
    result = subprocess.run([str(CHECKER), "-t", "cf:1.8", "-f", "json", "-o", str(out), str(path)],
                            capture_output=True, text=True, timeout=300)
    assert result.returncode in (0, 1), result.stderr
    return json.loads(out.read_text())["cf:1.8"]


def failures(report: dict, priority: str) -> list:
    return [(i["name"], i["msgs"]) for i in report[f"{priority}_priorities"] if i["value"][0] < i["value"][1]]


def test_netcdf_passes_cf_checker(demo_build, tmp_path):
    report = cf_report(demo_build / "veyra-basin.nc", tmp_path)
    assert report["high_count"] == 0, failures(report, "high")
    assert report["medium_count"] == 0, failures(report, "medium")


def test_netcdf_content(demo_build):
    with xr.open_dataset(demo_build / "veyra-basin.nc") as ds:
        assert ds.attrs["Conventions"] == "CF-1.8"
        for key in ("title", "history", "source", "comment"):
            assert ds.attrs[key]
        assert "manifest.json" in ds.attrs["source"] and "safety" in ds.attrs["comment"]
        assert ds["age"].attrs["units"] == "Myr"
        assert ds["heat_flow_gdh1"].attrs["standard_name"] == "upward_geothermal_heat_flux_at_sea_floor"
        assert ds["lat"].attrs["standard_name"] == "latitude" and "_FillValue" not in ds["lat"].encoding
        assert ds["crs"].dtype == np.int32
        for name in ("age", "age_uncertainty", "half_rate", "spreading_azimuth", "depth_gdh1", "depth_ps77",
                     "depth_hsc", "depth_plate", "heat_flow_gdh1", "observed_depth", "sediment_correction",
                     "residual_gdh1"):
            assert name in ds, name
        enc = ds["age"].encoding
        assert enc["zlib"] and enc["chunksizes"] == (256, 256)
        # GDH1 depth is the Stein & Stein (1992) formula of the age grid
        age = ds["age"].values
        ok = np.isfinite(age)
        expect = np.where(age < 20, 2600 + 365 * np.sqrt(age), 5651 - 2473 * np.exp(-0.0278 * age))
        assert np.allclose(ds["depth_gdh1"].values[ok], expect[ok], atol=0.01)


def test_geotiff_is_cog_with_crs_transform_and_values(demo_build):
    from rio_cogeo.cogeo import cog_validate

    with xr.open_dataset(demo_build / "veyra-basin.nc") as ds:
        for name in ("age", "half_rate", "depth_gdh1", "age_flag"):
            path = demo_build / f"veyra-basin_{name}.tif"
            valid, errors, _ = cog_validate(str(path), quiet=True)
            assert valid, errors
            with rasterio.open(path) as src:
                assert src.crs.to_epsg() == 4326
                lon, lat = ds["lon"].values, ds["lat"].values
                step = lon[1] - lon[0]
                assert src.transform.a == pytest.approx(step) and src.transform.e == pytest.approx(-step)
                assert src.transform.c == pytest.approx(lon[0] - step / 2)
                assert src.transform.f == pytest.approx(lat[0] + step / 2)
                assert src.overviews(1) or max(src.shape) <= 256, "COG without overviews"
                band = src.read(1, masked=True)
                values = ds[name].values
                finite = np.isfinite(values) if values.dtype.kind == "f" else np.ones(values.shape, bool)
                assert np.array_equal(band.mask, ~finite) or values.dtype.kind != "f"
                assert np.allclose(band.astype(float).filled(np.nan)[finite], values[finite])
                assert src.tags(1).get("units") == ds[name].attrs.get("units")
                assert src.descriptions[0] == ds[name].attrs["long_name"]


def test_manifest(demo_build):
    manifest = json.loads((demo_build / "manifest.json").read_text())
    for key in ("inputs", "config", "versions", "timings_s", "timescale", "models", "qa", "outputs", "caution"):
        assert key in manifest
    for entry in manifest["inputs"].values():  # hashlib over the whole file: the reference
        assert entry["sha256"] == hashlib.sha256(Path(entry["path"]).read_bytes()).hexdigest()
    for entry in manifest["outputs"]:
        assert entry["sha256"] == hashlib.sha256(Path(entry["path"]).read_bytes()).hexdigest(), entry["path"]
    assert manifest["timescale"]["name"] == "CK95"
    assert manifest["models"]["gdh1"]["parameters"]["decay_per_myr"] == 0.0278
    assert manifest["timings_s"]["total"] > 0
    assert {"netcdf", "geotiff"} == set(manifest["config"]["output"]["formats"])


def test_outputs_have_the_permissions_of_any_file_the_user_writes(demo_build, tmp_path):
    plain = tmp_path / "plain"
    plain.write_text("")  # what open() gives under this process's umask: the reference
    expected = stat.S_IMODE(plain.stat().st_mode)
    manifest = json.loads((demo_build / "manifest.json").read_text())
    paths = [Path(e["path"]) for e in manifest["outputs"]] + [demo_build / "manifest.json"]
    assert any(p.suffix == ".tif" for p in paths)
    for path in paths:
        assert stat.S_IMODE(path.stat().st_mode) == expected, path.name


def test_file_hash_follows_the_file(tmp_path):
    # remembered while the file is unchanged, computed again when it changes (same size, new content)
    path = tmp_path / "f.bin"
    path.write_bytes(b"a" * 1000)
    assert sha256(path) == hashlib.sha256(b"a" * 1000).hexdigest()
    stat = path.stat()
    path.write_bytes(b"b" * 1000)
    os.utime(path, ns=(stat.st_atime_ns, stat.st_mtime_ns + 10**6))  # a write at least a millisecond later
    assert sha256(path) == hashlib.sha256(b"b" * 1000).hexdigest()


def test_failed_build_leaves_outputs_alone(demo_copy):
    from agegrid.cli import main

    folder = demo_copy.parent
    assert main(["build", str(demo_copy), "--quiet"]) == 0
    out = folder / "out"
    before = {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in out.iterdir() if p.is_file()}
    (folder / "picks.csv").write_text("lon,lat,age_ma\n1,2,3\nx,2,3\n")
    assert main(["build", str(demo_copy), "--quiet"]) == 2
    after = {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in out.iterdir() if p.is_file()}
    assert before == after
    assert not list(out.glob(".agegrid-tmp-*"))


@pytest.mark.parametrize("compression, predictor", [("deflate", False), ("zstd", True), ("none", False)])
def test_cog_compression_choices_read_back_by_gdal(tmp_path, compression, predictor):
    """Each ``[output] cog_compression`` (with and without TIFF predictors) gives a valid COG that GDAL
    (rasterio) reads back bit for bit, and says in its IMAGE_STRUCTURE which codec and predictor it used."""
    from rio_cogeo.cogeo import cog_validate

    from agegrid.grid import GridSpec
    from agegrid.io.geotiff import CogWriter

    spec = GridSpec((10.0, 30.0, -5.0, 12.0), 0.05, chunk=128)
    ny, nx = spec.shape
    rng = np.random.default_rng(3)
    age = np.cumsum(rng.uniform(0, 0.1, (ny, nx)), axis=1).astype(np.float32)
    age[:20, :30] = np.nan
    flag = rng.integers(1, 6, (ny, nx)).astype(np.int8)
    targets = {"age": tmp_path / "age.tif", "age_flag": tmp_path / "age_flag.tif"}
    attrs = {"age": {"long_name": "crustal age", "units": "Myr"}, "age_flag": {"long_name": "flag", "units": "1"}}
    writer = CogWriter(spec, targets, attrs, {"age": np.float32, "age_flag": np.int8},
                       {"age": np.float32(np.nan), "age_flag": np.int8(-1)}, compression, predictor)
    for r0 in range(0, ny, 128):
        for c0 in range(0, nx, 128):
            writer.write("age", r0, c0, age[r0:r0 + 128, c0:c0 + 128])
            writer.write("age_flag", r0, c0, flag[r0:r0 + 128, c0:c0 + 128])
    staged = writer.finish()
    # Predictor codes (from memory): 2 horizontal differencing (TIFF 6.0, tag 317), 3 floating point (Adobe
    # Photoshop TIFF Technical Note 3); GDAL reports them in the IMAGE_STRUCTURE metadata domain
    for name, expect, predictor_code in (("age", age, "3"), ("age_flag", flag, "2")):
        path = staged[targets[name]]
        valid, errors, _ = cog_validate(str(path), quiet=True)
        assert valid, errors
        with rasterio.open(path) as src:
            structure = src.tags(ns="IMAGE_STRUCTURE")
            assert structure.get("COMPRESSION", "NONE") == {"deflate": "DEFLATE", "zstd": "ZSTD", "none": "NONE"}[
                compression]
            assert structure.get("PREDICTOR", "1") == (predictor_code if predictor else "1")
            assert np.array_equal(src.read(1), expect, equal_nan=True)
            assert src.overviews(1)


def test_build_writes_cogs_with_the_chosen_codec(tmp_path):
    from agegrid.cli import main
    from tests.helpers import basin_build

    config = basin_build(tmp_path / "zstd", spacing=0.2, formats=("netcdf", "geotiff"),
                         extra='cog_compression = "zstd"\ncog_predictor = true')
    assert main(["build", str(config), "--quiet"]) == 0
    out = config.parent / "out"
    with xr.open_dataset(out / "basin.nc") as ds, rasterio.open(out / "basin_half_rate.tif") as src:
        assert src.tags(ns="IMAGE_STRUCTURE")["COMPRESSION"] == "ZSTD"
        assert src.tags(ns="IMAGE_STRUCTURE")["PREDICTOR"] == "3"
        assert np.array_equal(src.read(1), ds["half_rate"].values, equal_nan=True)
    text = config.read_text()
    config.write_text(text.replace('"zstd"', '"deflate"').replace("cog_predictor = true", "cog_predictor = false"))
    assert main(["build", str(config), "--quiet"]) == 0  # no --force: a changed codec alone rewrites the COGs
    with rasterio.open(out / "basin_half_rate.tif") as src:
        assert src.tags(ns="IMAGE_STRUCTURE")["COMPRESSION"] == "DEFLATE"
        assert "PREDICTOR" not in src.tags(ns="IMAGE_STRUCTURE")
    config.write_text(text.replace('"zstd"', '"lz4"'))
    assert main(["build", str(config), "--quiet"]) == 2
    config.write_text(text.replace('"zstd"', '"none"'))
    assert main(["validate", str(config)]) == 2


def test_build_file_offers_every_cog_codec():
    from typing import get_args

    from agegrid.config import Output
    from agegrid.io.geotiff import CODECS

    assert set(get_args(Output.model_fields["cog_compression"].annotation)) == set(CODECS)


@pytest.mark.parametrize("spacing, chunk", [(0.1, 256), (0.05, 512)])  # 256 and 512 tiles, ragged edges
def test_netcdf_stores_the_cog_tiles_compressed_once(tmp_path, spacing, chunk):
    import h5py

    from agegrid.cli import main
    from agegrid.io import tiff
    from tests.helpers import basin_build

    shared = basin_build(tmp_path / "shared", spacing=spacing, chunk=chunk, formats=("netcdf", "geotiff"))
    alone = basin_build(tmp_path / "alone", spacing=spacing, chunk=chunk, formats=("netcdf", "geotiff"),
                        extra="netcdf_shares_cog_tiles = false")
    assert main(["build", str(shared), "--quiet"]) == 0 and main(["build", str(alone), "--quiet"]) == 0
    a, b = tmp_path / "shared" / "out", tmp_path / "alone" / "out"
    # HDF5 (through netCDF4) decodes the shared chunks to the same values as the file compressed on its own
    with xr.open_dataset(a / "basin.nc") as s, xr.open_dataset(b / "basin.nc") as o:
        assert min(s.sizes.values()) >= chunk and any(n % chunk for n in s.sizes.values())
        for name in o.data_vars:
            assert np.array_equal(s[name].values, o[name].values, equal_nan=True), name
        assert s["age"].encoding["chunksizes"] == (chunk, chunk) and not s["age"].encoding["shuffle"]
        assert o["age"].encoding["shuffle"] and s["age_fraction"].encoding["shuffle"]  # no COG: compressed alone
    # the chunk is the COG's tile, byte for byte
    data = (a / "basin_age.tif").read_bytes()
    tags = tiff.read_tags(data)
    offset, count = (int(np.frombuffer(tags[code].raw, "<u4")[0])
                     for code in (tiff.TILE_OFFSETS, tiff.TILE_BYTE_COUNTS))
    with h5py.File(a / "basin.nc", "r") as nc:
        filter_mask, chunk = nc["age"].id.read_direct_chunk((0, 0))
    assert chunk == data[offset:offset + count]
    # and GDAL reads the NetCDF layer as it reads the COG
    with rasterio.open(f"netcdf:{a / 'basin.nc'}:half_rate") as n, rasterio.open(a / "basin_half_rate.tif") as g:
        assert np.array_equal(n.read(1), g.read(1), equal_nan=True)
