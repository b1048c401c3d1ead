"""Projected and polar grids (EPSG:3031), Zarr output and the provenance manifest."""
import json
from pathlib import Path

import numpy as np
import pyproj
import pytest
import rasterio
import xarray as xr
from scipy.interpolate import RegularGridInterpolator

from agegrid import timescale
from agegrid.cli import main
from agegrid.io.zarr import store_arrays_equal
from agegrid.manifest import describe_file
from agegrid.synthetic import Stage, SyntheticBasin
from tests.helpers import basin_build
from tests.test_outputs import cf_report, failures

BASIN = SyntheticBasin(pole=(0.0, 25.0), spin_deg=-90.0, bands=[-5.0, 0.0, 5.0], ridge_lon=[0.0, 1.2],
                       stages=[Stage(8.0, 70.0, 55.0), Stage(16.0, 50.0, 45.0)])


@pytest.fixture(scope="module")
def builds(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("polar")
    records = BASIN.survey(timescale.load("CK95"), 50, noise_km=1.0, seed=4)
    geo = basin_build(tmp / "geo", BASIN, records=records, spacing=0.025, formats=("netcdf",))
    to_polar = pyproj.Transformer.from_crs("EPSG:4326", "EPSG:3031", always_xy=True)
    ring = np.asarray(BASIN.domain_polygon().exterior.coords)
    x, y = to_polar.transform(ring[:, 0], ring[:, 1])
    step = 5000.0
    region = [np.floor(min(x) / step - 4) * step, np.ceil(max(x) / step + 4) * step,
              np.floor(min(y) / step - 4) * step, np.ceil(max(y) / step + 4) * step]
    polar = basin_build(tmp / "polar", BASIN, records=records, spacing=step, region=region,
                        formats=("netcdf", "geotiff", "zarr"))
    polar.write_text(polar.read_text().replace("chunk = 256", 'chunk = 128\ncrs = "EPSG:3031"'))
    assert main(["build", str(geo), "--quiet"]) == 0
    assert main(["build", str(polar), "--quiet"]) == 0
    return tmp / "geo" / "out", tmp / "polar" / "out"


def test_polar_ages_match_geographic_build(builds):
    from scipy import ndimage

    geo_dir, polar_dir = builds
    with xr.open_dataset(geo_dir / "basin.nc") as g, xr.open_dataset(polar_dir / "basin.nc") as p:
        lon, lat = p["lon"].values, p["lat"].values
        axes = (g["lat"].values[::-1], g["lon"].values)
        geo_age = g["age"].values[::-1]
        interp = RegularGridInterpolator(axes, geo_age, bounds_error=False, fill_value=np.nan)
        # bilinear resampling, except next to the age steps at barriers and the domain edge, which it smears
        comp = g["compartment"].values[::-1]
        step = (ndimage.maximum_filter(comp, 3) != ndimage.minimum_filter(comp, 3)) | \
            ndimage.binary_dilation(~np.isfinite(geo_age), iterations=1)
        smeared = RegularGridInterpolator(axes, ndimage.binary_dilation(step, iterations=1).astype(float),
                                          method="nearest", bounds_error=False, fill_value=1.0)
        points = np.stack([lat, lon], -1)
        resampled = np.where(smeared(points) > 0, np.nan, interp(points))
        age = p["age"].values
        both = np.isfinite(resampled) & np.isfinite(age)
        assert both.sum() > 10_000
        assert np.sqrt(np.mean((age[both] - resampled[both]) ** 2)) <= 0.05
        truth = BASIN.age(lon, lat)
        ok = np.isfinite(truth) & np.isfinite(age)
        assert np.sqrt(np.mean((age[ok] - truth[ok]) ** 2)) <= 0.15
        # half-rates are great-circle rates, not map-plane ones (stereographic scale is ~1.03 here)
        rel = np.abs(p["half_rate"].values[ok] / BASIN.half_rate(lon, lat)[ok] - 1)
        assert np.nanmedian(rel) <= 0.05


def test_polar_netcdf_is_cf_and_georeferenced(builds, tmp_path):
    _, polar_dir = builds
    report = cf_report(polar_dir / "basin.nc", tmp_path)
    assert report["high_count"] == 0, failures(report, "high")
    assert report["medium_count"] == 0, failures(report, "medium")
    with xr.open_dataset(polar_dir / "basin.nc") as ds:
        assert ds["x"].attrs["standard_name"] == "projection_x_coordinate"
        assert ds["crs"].attrs["grid_mapping_name"] == "polar_stereographic"
        assert ds["crs"].attrs["latitude_of_projection_origin"] == -90.0
        assert ds["lat"].dims == ("y", "x")
    with rasterio.open(polar_dir / "basin_age.tif") as src:
        assert src.crs.to_epsg() == 3031
    with rasterio.open(f"netcdf:{polar_dir / 'basin.nc'}:age") as src:  # GDAL finds the CRS in the NetCDF
        assert src.crs is not None and pyproj.CRS(src.crs.to_wkt()).equals(pyproj.CRS("EPSG:3031"))


def test_retimed_polar_grid_keeps_cf_and_its_coordinates(builds, tmp_path):
    _, polar_dir = builds
    retimed = tmp_path / "retimed.nc"
    assert main(["retime", str(polar_dir / "basin.nc"), "--timescale", "GTS2012", "--output", str(retimed),
                 "--quiet"]) == 0
    report = cf_report(retimed, tmp_path)  # IOOS compliance-checker, CF 1.8
    assert report["high_count"] == 0, failures(report, "high")
    with xr.open_dataset(retimed) as r, xr.open_dataset(polar_dir / "basin.nc") as b:
        assert r["age"].encoding["chunksizes"] == (128, 128)
        assert set(r["age"].coords) == {"x", "y", "lat", "lon"} and r["lat"].dims == ("y", "x")
        np.testing.assert_array_equal(r["lat"].values, b["lat"].values)
        np.testing.assert_array_equal(r["age_flag"].values, b["age_flag"].values)
        dated = np.isfinite(b["age"].values)
        assert np.isfinite(r["age"].values[dated]).all() and not np.isfinite(r["age"].values[~dated]).any()
        assert np.nanmax(np.abs(r["age"].values - b["age"].values)) > 0.1  # GTS2012 differs from CK95


def test_zarr_equals_netcdf_and_manifest_hashes(builds):
    _, polar_dir = builds
    assert store_arrays_equal(polar_dir / "basin.zarr", polar_dir / "basin.nc")
    with xr.open_zarr(polar_dir / "basin.zarr") as z, xr.open_dataset(polar_dir / "basin.nc") as n:
        assert z.attrs["Conventions"] == n.attrs["Conventions"] and z["age"].attrs["units"] == "Myr"
        assert z["age"].encoding["chunks"] == (128, 128)
    manifest = json.loads((polar_dir / "manifest.json").read_text())
    for entry in manifest["outputs"]:
        assert describe_file(Path(entry["path"]))["sha256"] == entry["sha256"], entry["path"]
    assert manifest["scheduler"]["kind"] == "threads"
    assert manifest["peak_memory_mb"]["process"] > 0
    assert manifest["build_file"]["sha256"]


def test_validate_prints_reads_and_writes(builds, capsys):
    _, polar_dir = builds
    build = polar_dir.parent / "build.toml"
    assert main(["validate", str(build), "--quiet"]) == 0
    plan = json.loads(capsys.readouterr().out)["plan"]
    assert any(p.endswith("picks.csv") for p in plan["reads"])
    assert any(p.endswith("basin.zarr") for p in plan["writes"]) and plan["grid"]["crs"] == "EPSG:3031"


def test_bathymetry_in_another_crs_is_reprojected(tmp_path):
    from agegrid.grid import GridSpec
    from agegrid.io.rasters import read_grid

    # a polar-stereographic grid of z = latitude, read onto a geographic grid
    to_geo = pyproj.Transformer.from_crs("EPSG:3031", "EPSG:4326", always_xy=True)
    x = np.arange(-1.0e6, 1.0e6, 10e3) + 5e3
    y = np.arange(3.8e6, 1.8e6, -10e3) - 5e3  # lon 0 lies toward +y in EPSG:3031
    xx, yy = np.meshgrid(x, y)
    lat = to_geo.transform(xx, yy)[1]
    path = tmp_path / "polar.tif"
    from affine import Affine

    with rasterio.open(path, "w", driver="GTiff", width=len(x), height=len(y), count=1, dtype="float32",
                       crs="EPSG:3031", transform=Affine(10e3, 0, -1.0e6, 0, -10e3, 3.8e6)) as dst:
        dst.write(lat.astype(np.float32), 1)
    spec = GridSpec((-10.0, 10.0, -70.0, -62.0), 0.25)
    values, _ = read_grid(path, spec)
    expect = np.broadcast_to(spec.y[:, None], spec.shape)
    ok = np.isfinite(values)
    assert ok.mean() > 0.9 and np.max(np.abs(values[ok] - expect[ok])) < 0.05
