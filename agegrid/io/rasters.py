"""Input grids (NetCDF or GeoTIFF) read and resampled onto the build's grid.

Block average where the input is finer than the grid, bilinear where it is coarser; another CRS is
reprojected by GDAL (rasterio.warp).
"""
from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import rasterio
from affine import Affine
from rasterio.warp import Resampling, reproject

from agegrid.errors import BadInput

X_NAMES = ("lon", "longitude", "x", "easting")
Y_NAMES = ("lat", "latitude", "y", "northing")


@dataclass
class SourceGrid:
    """A 2-D grid as read: values north row first, its transform and CRS, and its attributes."""

    values: np.ndarray
    transform: Affine
    crs: rasterio.crs.CRS
    attrs: dict = field(default_factory=dict)
    name: str = ""


def _regular(coord: np.ndarray, path, name) -> float:
    steps = np.diff(coord)
    if len(coord) < 2 or not np.allclose(steps, steps[0], rtol=1e-4, atol=0):
        raise BadInput(f"coordinate {name!r} is not regularly spaced", path)
    return float(steps[0])


def _open_netcdf(path: Path, spec) -> SourceGrid:
    from agegrid.io.netcdf import open_netcdf

    try:
        ds = open_netcdf(path, decode_times=False, mask_and_scale=True)
    except Exception as exc:  # netCDF4/h5py raise many kinds for a damaged or foreign file
        raise BadInput(f"not a readable NetCDF or GeoTIFF file ({type(exc).__name__}: {exc})", path) from None
    with ds:
        candidates = [v for v in ds.data_vars.values() if v.ndim == 2 and v.dtype.kind in "fiu"]
        for var in candidates:
            dims = [d.lower() for d in var.dims]
            if dims[0] in Y_NAMES and dims[1] in X_NAMES:
                break
        else:
            raise BadInput("no 2-D variable on (lat, lon) or (y, x) coordinates", path)
        ydim, xdim = var.dims
        if xdim not in ds.coords or ydim not in ds.coords:
            raise BadInput(f"variable {var.name!r} has no coordinate values for {ydim}/{xdim}", path)
        x = ds[xdim].values.astype(float)
        y = ds[ydim].values.astype(float)
        values = var.values.astype(np.float32, copy=False)
        attrs = dict(var.attrs)
        crs = _netcdf_crs(ds, var, xdim)
    if crs.is_geographic and spec.geographic:
        x = spec.wrap_lon(x)
    order_y, order_x = _ordering(-y), _ordering(x)
    x, y = x[order_x], y[order_y]
    values = values[order_y][:, order_x]  # views when the rows and columns are in order or reversed
    dx, dy = _regular(x, path, xdim), _regular(y, path, ydim)
    transform = Affine(dx, 0, x[0] - dx / 2, 0, dy, y[0] - dy / 2)
    return SourceGrid(values, transform, crs, attrs, str(var.name))


def _ordering(coord: np.ndarray) -> slice | np.ndarray:
    """What sorts a coordinate ascending: a slice when it is already sorted or reversed, else the indices."""
    steps = np.diff(coord)
    if (steps >= 0).all():
        return slice(None)
    if (steps <= 0).all():
        return slice(None, None, -1)
    return np.argsort(coord, kind="stable")


def _netcdf_crs(ds, var, xdim) -> rasterio.crs.CRS:
    mapping = var.attrs.get("grid_mapping")
    if mapping and mapping in ds.variables:
        wkt = ds[mapping].attrs.get("crs_wkt") or ds[mapping].attrs.get("spatial_ref")
        if wkt:
            return rasterio.crs.CRS.from_wkt(wkt)
    if xdim.lower() in ("lon", "longitude"):
        return rasterio.crs.CRS.from_epsg(4326)
    raise BadInput("projected grid without a grid_mapping CRS: cannot place it", var.encoding.get("source"))


def _open_geotiff(path: Path, spec) -> SourceGrid:
    try:
        with rasterio.open(path) as src:
            values = src.read(1, masked=True).astype(np.float32).filled(np.nan)
            if src.crs is None:
                raise BadInput("GeoTIFF has no CRS", path)
            attrs = dict(src.tags(1))
            attrs.update(src.tags())
            if src.units and src.units[0]:
                attrs.setdefault("units", src.units[0])
            return SourceGrid(values, src.transform, src.crs, attrs, src.descriptions[0] or "")
    except rasterio.errors.RasterioIOError as exc:
        raise BadInput(f"not a readable NetCDF or GeoTIFF file ({exc})", path) from None


def open_grid(path: str | Path, spec) -> SourceGrid:
    """Open a NetCDF or GeoTIFF grid (by content, whatever its ending)."""
    path = Path(path)
    try:
        head = path.read_bytes()[:8]
    except FileNotFoundError:
        raise BadInput("file not found", path) from None
    if head[:4] in (b"II*\x00", b"MM\x00*", b"II+\x00", b"MM\x00+"):
        return _open_geotiff(path, spec)
    if head[:3] == b"CDF" or head[:8] == b"\x89HDF\r\n\x1a\n":
        return _open_netcdf(path, spec)
    raise BadInput("not a NetCDF or GeoTIFF file", path)


def _aligned_window(source: SourceGrid, spec) -> tuple[slice, slice] | None:
    """The source's rows and columns that are exactly the build grid's cells, if its lattice holds them."""
    src, dst = source.transform, spec.transform
    if src.b or src.d or not np.isclose(src.a, dst.a, rtol=1e-9, atol=0) or not np.isclose(src.e, dst.e, rtol=1e-9, atol=0):
        return None
    if source.crs != rasterio.crs.CRS.from_wkt(spec.pyproj_crs.to_wkt()):
        return None
    col, row = (dst.c - src.c) / src.a, (dst.f - src.f) / src.e
    c0, r0 = int(round(col)), int(round(row))
    if abs(col - c0) > 1e-6 or abs(row - r0) > 1e-6:
        return None
    ny, nx = spec.shape
    if r0 < 0 or c0 < 0 or r0 + ny > source.values.shape[0] or c0 + nx > source.values.shape[1]:
        return None
    return slice(r0, r0 + ny), slice(c0, c0 + nx)


def resample(source: SourceGrid, spec, name: str = "") -> np.ndarray:
    """Resample a source grid onto the build grid (float32, NaN where the source has no data).

    A source on the build grid's own lattice (same CRS and cell size, cell edges aligned) is read as is.
    """
    window = _aligned_window(source, spec)
    if window is not None:
        return source.values[window].astype(np.float32, copy=False)
    target = np.full(spec.shape, np.nan, dtype=np.float32)
    source_cell = abs(source.transform.a * source.transform.e) ** 0.5
    same_kind = source.crs.is_geographic == spec.geographic
    finer = same_kind and source_cell < spec.spacing * 0.999
    reproject(
        source=source.values, destination=target, src_transform=source.transform, src_crs=source.crs,
        src_nodata=np.nan, dst_transform=spec.transform, dst_crs=rasterio.crs.CRS.from_wkt(spec.pyproj_crs.to_wkt()),
        dst_nodata=np.nan, resampling=Resampling.average if finer else Resampling.bilinear)
    return target


def read_grid(path: str | Path, spec) -> tuple[np.ndarray, dict]:
    """Read an input grid resampled onto the build grid, with the source's attributes."""
    source = open_grid(path, spec)
    if not np.isfinite(source.values).any():
        raise BadInput("grid holds no finite values", path)
    return resample(source, spec), {**source.attrs, "variable": source.name}
