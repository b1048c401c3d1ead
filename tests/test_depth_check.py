"""Depth-check: observed depth, sign detection, resampling, residuals against a known swell, statistics."""
import contextlib
import csv

import numpy as np
import pytest
import rasterio
import xarray as xr
from affine import Affine
from rasterio.warp import Resampling, reproject

from agegrid.bathymetry import depth_sign
from agegrid.demo_picks.make_demo import BASIN, SWELL
from agegrid.grid import GridSpec
from agegrid.errors import BadInput
from agegrid.io.rasters import grid_blocks, read_grid
from agegrid.residual import binned_statistics, fit_sqrt_age
from agegrid.sphere import distance_km


def test_residual_recovers_the_swell(demo_build):
    # the demo's observed depth is GDH1 of the true age minus a 700 m swell, with sediment and 25 m noise
    with xr.open_dataset(demo_build / "veyra-basin.nc") as ds:
        residual = ds["residual_gdh1"].values
        lon, lat = np.meshgrid(ds["lon"].values, ds["lat"].values)
    centre = BASIN.from_pole_frame(np.array(BASIN.ridge_lon[1] + SWELL["lon_offset"]), np.array(SWELL["lat_offset"]))
    r = distance_km(lon, lat, centre[0], centre[1])
    at_centre = np.nanmedian(residual[r < 15])
    assert abs(at_centre - SWELL["height_m"]) <= 100, at_centre
    far = np.nanmedian(residual[r > 4 * SWELL["radius_km"]])
    assert abs(far) <= 60, far


def test_residual_is_each_model_minus_the_sediment_corrected_depth(demo_build):
    # the definition (design notes: predicted minus observed depth corrected for sediment, positive where the
    # sea floor is shallower), recomputed with numpy from the written layers for every model, where sediment
    # is missing the observed depth alone
    with xr.open_dataset(demo_build / "veyra-basin.nc") as ds:
        correction = ds["sediment_correction"].values
        assert np.nanmax(np.abs(correction)) > 100  # the correction matters here
        corrected = ds["observed_depth"].values + np.where(np.isfinite(correction), correction, 0)
        models = [name[len("residual_"):] for name in ds.data_vars if name.startswith("residual_")]
        assert len(models) >= 3
        for model in models:
            expected = (ds[f"depth_{model}"].values - corrected).astype(np.float32)
            np.testing.assert_allclose(ds[f"residual_{model}"].values, expected, atol=1e-3, equal_nan=True)
            assert np.isfinite(ds[f"residual_{model}"].values).sum() > 1000


def test_depth_stats_and_fit(demo_build):
    rows = list(csv.DictReader(open(demo_build / "veyra-basin_depth_stats.csv")))
    assert {r["model"] for r in rows} == {"gdh1", "ps77", "hsc", "plate"}
    assert all(int(r["cells"]) > 0 and float(r["iqr_m"]) >= 0 for r in rows)
    import json

    fit = json.loads((demo_build / "manifest.json").read_text())["depth_fit"]
    assert fit["ridge_depth_sigma_m"] > 0 and fit["models"]["gdh1"]["sqrt_coefficient_m"] == pytest.approx(365, abs=1)


def test_fit_recovers_known_law():
    rng = np.random.default_rng(0)
    age = rng.uniform(0, 60, 5000)
    depth = 2500 + 350 * np.sqrt(age) + rng.normal(0, 30, age.size)
    fit = fit_sqrt_age(age, depth, (0, 70))
    assert fit["ridge_depth_m"] == pytest.approx(2500, abs=4 * fit["ridge_depth_sigma_m"] + 1)
    assert fit["sqrt_coefficient_m"] == pytest.approx(350, abs=4 * fit["sqrt_coefficient_sigma_m"] + 0.5)
    # the same line and 1-sigma errors from numpy's polynomial fit, its covariance scaled by chi2 / (n - 2)
    (slope, intercept), cov = np.polyfit(np.sqrt(age), depth, 1, cov=True)
    assert fit["sqrt_coefficient_m"] == pytest.approx(slope, rel=1e-9)
    assert fit["ridge_depth_m"] == pytest.approx(intercept, rel=1e-9)
    assert fit["sqrt_coefficient_sigma_m"] == pytest.approx(np.sqrt(cov[0, 0]), rel=1e-6)
    assert fit["ridge_depth_sigma_m"] == pytest.approx(np.sqrt(cov[1, 1]), rel=1e-6)
    assert fit["rms_m"] == pytest.approx(30, rel=0.05)
    rows = binned_statistics(age, depth - (2500 + 350 * np.sqrt(age)), 10.0)
    assert len(rows) == 6 and all(abs(r["median_m"]) < 5 for r in rows)
    # the IQR of Gaussian noise is 1.349 sigma (a property of the normal distribution)
    assert all(r["iqr_m"] == pytest.approx(1.349 * 30, rel=0.15) for r in rows)


@pytest.mark.parametrize("attrs,values,expect_depth", [
    ({"positive": "down"}, np.array([3000.0]), True),
    ({"positive": "up"}, np.array([-3000.0]), False),
    ({"standard_name": "height_above_mean_sea_level"}, np.array([-3000.0]), False),
    ({"long_name": "water depth"}, np.array([3000.0]), True),
    ({}, np.array([-4000.0, -3000.0]), False),
    ({}, np.array([4000.0, 3000.0]), True),
])
def test_sign_detection(attrs, values, expect_depth):
    read = []
    is_depth, statement = depth_sign(attrs, values=lambda: read.append(1) or values)
    assert np.all((values if is_depth else -values) > 0)
    assert is_depth == expect_depth and ("as depth" in statement) == expect_depth
    assert bool(read) == (not attrs)  # the values are read only when no attribute says


def test_sign_override():
    is_depth, statement = depth_sign({"positive": "down"}, "elevation")
    assert not is_depth and "depth.bathymetry_sign" in statement


def test_geotiff_input_block_average_and_bilinear(tmp_path):
    # a plane z = 10 x + 3 y: block averages and bilinear interpolation of a plane are exact
    fine = 0.01
    x = np.arange(0, 2, fine) + fine / 2
    y = np.arange(2, 0, -fine) - fine / 2
    plane = (10 * x[None, :] + 3 * y[:, None]).astype(np.float32)
    path = tmp_path / "bathy.tif"
    with rasterio.open(path, "w", driver="GTiff", width=len(x), height=len(y), count=1, dtype="float32",
                       crs="EPSG:4326", transform=Affine(fine, 0, 0, 0, -fine, 2)) as dst:
        dst.write(plane, 1)
    coarse = GridSpec((0.5, 1.5, 0.5, 1.5), 0.1)
    values, _ = read_grid(path, coarse)
    cx, cy = np.meshgrid(coarse.x, coarse.y)
    assert np.allclose(values, 10 * cx + 3 * cy, atol=1e-3)
    finer = GridSpec((0.5, 1.5, 0.5, 1.5), 0.005)
    values, _ = read_grid(path, finer)
    fx, fy = np.meshgrid(finer.x, finer.y)
    assert np.allclose(values, 10 * fx + 3 * fy, atol=1e-3)


def test_geotiff_on_the_build_lattice_is_read_as_is(tmp_path):
    # a random field on the build grid's own lattice, larger than the grid: the cells come back unchanged;
    # shifted by half a cell, a plane is interpolated (bilinear is exact on a plane)
    rng = np.random.default_rng(5)
    field = rng.normal(size=(40, 60)).astype(np.float32)
    plane = (10 * np.arange(60)[None, :] + 3 * np.arange(40)[:, None]).astype(np.float32)
    for name, values, west in (("aligned.tif", field, 0.0), ("shifted.tif", plane, 0.05)):
        with rasterio.open(tmp_path / name, "w", driver="GTiff", width=60, height=40, count=1, dtype="float32",
                           crs="EPSG:4326", transform=Affine(0.1, 0, west, 0, -0.1, 4.0)) as dst:
            dst.write(values, 1)
    spec = GridSpec((1.0, 3.0, 1.0, 3.0), 0.1)  # rows 10..29, columns 10..29 of the aligned source
    values, _ = read_grid(tmp_path / "aligned.tif", spec)
    assert np.array_equal(values, field[10:30, 10:30])
    values, _ = read_grid(tmp_path / "shifted.tif", spec)
    assert np.allclose(values, plane[10:30, 9:29] + 5.0, atol=1e-3)  # half a cell east of column k - 1


def _lattice_sources(tmp_path, field):
    """The same field (rows north to south, 0.1-degree cells from 0 E, 4 N) as a GeoTIFF, a NetCDF stored north
    to south and a NetCDF stored south to north."""
    ny, nx = field.shape
    with rasterio.open(tmp_path / "f.tif", "w", driver="GTiff", width=nx, height=ny, count=1, dtype="float32",
                       crs="EPSG:4326", transform=Affine(0.1, 0, 0.0, 0, -0.1, 4.0)) as dst:
        dst.write(field, 1)
    lat, lon = 4.0 - 0.05 - 0.1 * np.arange(ny), 0.05 + 0.1 * np.arange(nx)
    attrs = {"units": "m", "positive": "down"}
    xr.Dataset({"z": (("lat", "lon"), field, attrs)}, coords={"lat": lat, "lon": lon}).to_netcdf(tmp_path / "n.nc")
    xr.Dataset({"z": (("lat", "lon"), field[::-1], attrs)}, coords={"lat": lat[::-1], "lon": lon}).to_netcdf(
        tmp_path / "s.nc")
    return [tmp_path / "f.tif", tmp_path / "n.nc", tmp_path / "s.nc"]


@pytest.mark.filterwarnings("ignore::rasterio.errors.NotGeoreferencedWarning")  # GDAL's in-memory copies
def test_grid_on_the_lattice_is_read_block_by_block(tmp_path):
    # blocks of 7 cells (ragged at the edges) read as the pass asks give the cells read whole, exactly; the
    # task graph holds no array of the grid's size
    field = np.random.default_rng(2).normal(size=(40, 60)).astype(np.float32)
    field[12:15, :] = np.nan
    spec = GridSpec((1.0, 3.0, 1.0, 3.0), 0.1, chunk=7)  # rows 10..29, columns 10..29
    for path in _lattice_sources(tmp_path, field):
        with contextlib.ExitStack() as opened:
            lazy, attrs = grid_blocks(path, spec, opened)
            values = lazy.compute()
        assert lazy.chunksize == spec.chunks
        assert all(not isinstance(v, np.ndarray) or v.size < 49 for v in dict(lazy.__dask_graph__()).values())
        np.testing.assert_array_equal(values, field[10:30, 10:30], err_msg=str(path))
        np.testing.assert_array_equal(read_grid(path, spec)[0], field[10:30, 10:30], err_msg=str(path))
    shifted = GridSpec((1.05, 2.95, 1.05, 2.95), 0.1, chunk=7)  # off the lattice: resampled whole, as read_grid
    with contextlib.ExitStack() as opened:
        lazy, _ = grid_blocks(tmp_path / "n.nc", shifted, opened)
        np.testing.assert_array_equal(lazy.compute(), read_grid(tmp_path / "n.nc", shifted)[0])


@pytest.mark.filterwarnings("ignore::rasterio.errors.NotGeoreferencedWarning")  # GDAL's in-memory copies
@pytest.mark.parametrize("cell", [0.03, 0.25])  # finer (block average) and coarser (bilinear) than the grid
def test_grid_off_the_lattice_is_resampled_block_by_block(tmp_path, cell):
    # each block resampled from the source cells around it gives the cells of the whole grid resampled at
    # once: GDAL's warp of the whole is the reference, given the scale, which one CRS keeps constant (GDAL
    # otherwise estimates it per chunk, from the chunk's extent); the source reaches past the grid on two sides
    rng = np.random.default_rng(7)
    ny, nx = int(3.0 / cell), int(4.0 / cell)
    field = rng.normal(size=(ny, nx)).astype(np.float32)
    field[rng.random(field.shape) < 0.05] = np.nan
    path = tmp_path / "src.tif"
    with rasterio.open(path, "w", driver="GTiff", width=nx, height=ny, count=1, dtype="float32", nodata=np.nan,
                       crs="EPSG:4326", transform=Affine(cell, 0, 0.013, 0, -cell, 3.007)) as dst:
        dst.write(field, 1)
    spec = GridSpec((1.0, 4.5, 0.5, 3.5), 0.1, chunk=6)
    whole = np.full(spec.shape, np.nan, np.float32)
    reproject(field, whole, src_transform=Affine(cell, 0, 0.013, 0, -cell, 3.007), src_crs="EPSG:4326",
              src_nodata=np.nan, dst_transform=spec.transform, dst_crs="EPSG:4326", dst_nodata=np.nan,
              resampling=Resampling.average if cell < 0.1 else Resampling.bilinear, XSCALE=cell / 0.1,
              YSCALE=cell / 0.1)
    with contextlib.ExitStack() as opened:
        lazy, _ = grid_blocks(path, spec, opened)
        blocks = lazy.compute()
    assert np.isfinite(whole).mean() > 0.5
    np.testing.assert_array_equal(blocks, whole)
    np.testing.assert_array_equal(read_grid(path, spec)[0], whole)


@pytest.mark.filterwarnings("ignore::rasterio.errors.NotGeoreferencedWarning")  # the file is made without one
def test_geotiff_without_georeferencing_is_refused(tmp_path):
    path = tmp_path / "bare.tif"
    with rasterio.open(path, "w", driver="GTiff", width=4, height=3, count=1, dtype="float32", crs="EPSG:4326") as dst:
        dst.write(np.ones((3, 4), np.float32), 1)
    with pytest.raises(BadInput, match="no geotransform"):
        read_grid(path, GridSpec((0.0, 2.0, 0.0, 2.0), 0.5))


def test_grid_without_values_over_the_build_is_refused(tmp_path):
    field = np.full((40, 60), np.nan, np.float32)
    field[0, 0] = 5.0  # outside the build grid
    spec = GridSpec((1.0, 3.0, 1.0, 3.0), 0.1, chunk=7)
    for path in _lattice_sources(tmp_path, field):
        with pytest.raises(BadInput, match="no finite values") as caught, contextlib.ExitStack() as opened:
            grid_blocks(path, spec, opened)
        assert str(path) in str(caught.value)
        with pytest.raises(BadInput, match="no finite values"):
            read_grid(path, spec)
    field[27, 13] = 1.0  # one value, in a row the first probes pass over: found strip by strip
    for path in _lattice_sources(tmp_path, field):  # the files are rewritten: the readers released them
        with contextlib.ExitStack() as opened:
            lazy, _ = grid_blocks(path, spec, opened)
            assert np.nansum(lazy.compute()) == 1.0


def test_netcdf_input_other_longitude_convention(tmp_path):
    lon = np.arange(0.25, 360, 0.5)
    lat = np.arange(-89.75, 90, 0.5)
    # rows south to north and columns 0-360: both reordered on reading (rows reversed, columns sorted)
    values = (np.where(lon > 180, lon - 360, lon)[None, :] + 1000 * lat[:, None]).astype(np.float32)
    xr.Dataset({"z": (("lat", "lon"), values)}, coords={"lat": lat, "lon": lon}).to_netcdf(tmp_path / "g.nc")
    spec = GridSpec((-20.0, 20.0, -10.0, 10.0), 1.0)
    out, _ = read_grid(tmp_path / "g.nc", spec)
    assert np.allclose(out, spec.x[None, :] + 1000 * spec.y[:, None], atol=1e-2)
    aligned = GridSpec((-20.0, 20.0, -10.0, 10.0), 0.5)  # the source's own lattice: its cells as they are
    out, _ = read_grid(tmp_path / "g.nc", aligned)
    assert np.array_equal(out, (aligned.x[None, :] + 1000 * aligned.y[:, None]).astype(np.float32))


def test_isotherm_layer(tmp_path):
    from agegrid.cli import main
    from tests.helpers import basin_build

    build = basin_build(tmp_path, tracks=20, spacing=0.25, extra='[depth]\nmodels = ["hsc"]\nisotherm_c = 1000.0\n')
    assert main(["build", str(build), "--quiet"]) == 0
    with xr.open_dataset(tmp_path / "out" / "basin.nc") as ds:
        age = ds["age"].values
        z = ds["isotherm_depth_hsc"].values
        ok = np.isfinite(age) & (age > 1)
        # half-space isotherm grows as sqrt(age) (Turcotte & Schubert eq. 4.113)
        ratio = z[ok] / np.sqrt(age[ok])
        assert np.allclose(ratio, ratio[0], rtol=1e-4)
