"""CF-1.8 NetCDF: coordinates, grid mapping, global attributes, compression, chunked on disk."""
from __future__ import annotations

import contextlib
from pathlib import Path

import numpy as np
import xarray as xr

from agegrid.io.atomic import replace, staging_path

CONVENTIONS = "CF-1.8"
#: Encoding keys carried over from a variable read back from a file (the rest are reader details).
CHUNK_CACHE_BYTES = 4 * 2**20
KEPT_ENCODING = ("dtype", "_FillValue", "scale_factor", "add_offset", "zlib", "complevel", "shuffle", "chunksizes")


def limit_chunk_cache() -> None:
    """Cap HDF5's chunk cache for the files opened from now on.

    HDF5 keeps a cache per variable (64 MB by default): with twenty layers written or read that alone
    passes a gigabyte. Whole chunks are read and written in order here, so a small cache costs nothing.
    """
    import netCDF4

    size, nelems, preemption = netCDF4.get_chunk_cache()
    netCDF4.set_chunk_cache(CHUNK_CACHE_BYTES, nelems, preemption)


def coordinates(spec) -> dict:
    """Coordinate variables of a grid, with CF attributes (no fill value on coordinates)."""
    if spec.geographic:
        return {
            "lat": ("lat", spec.y, {"standard_name": "latitude", "long_name": "latitude", "units": "degrees_north",
                                    "axis": "Y"}),
            "lon": ("lon", spec.x, {"standard_name": "longitude", "long_name": "longitude",
                                    "units": "degrees_east", "axis": "X"}),
        }
    units = spec.pyproj_crs.axis_info[0].unit_name if spec.pyproj_crs.axis_info else "m"
    units = {"metre": "m", "meter": "m"}.get(units, units)
    return {
        "y": ("y", spec.y, {"standard_name": "projection_y_coordinate", "long_name": "y coordinate of projection",
                            "units": units, "axis": "Y"}),
        "x": ("x", spec.x, {"standard_name": "projection_x_coordinate", "long_name": "x coordinate of projection",
                            "units": units, "axis": "X"}),
    }


def grid_mapping(spec) -> xr.DataArray:
    """The scalar int32 grid-mapping variable ``crs`` with the CRS's CF parameters and WKT."""
    attrs = {k: v for k, v in spec.pyproj_crs.to_cf().items() if v is not None}
    if attrs.get("grid_mapping_name") == "polar_stereographic":
        attrs.setdefault("latitude_of_projection_origin",
                         90.0 if attrs.get("standard_parallel", attrs.get("latitude_of_origin", 0)) > 0 else -90.0)
    attrs["spatial_ref"] = attrs.get("crs_wkt", spec.pyproj_crs.to_wkt())
    attrs["GeoTransform"] = " ".join(str(v) for v in spec.transform.to_gdal())
    return xr.DataArray(np.int32(0), attrs=attrs)


def dataset(spec, layers: dict, attrs: dict, global_attrs: dict) -> xr.Dataset:
    """Assemble the output dataset from 2-D (dask or numpy) layers."""
    coords = coordinates(spec)
    dims = tuple(coords)
    data_vars = {}
    for name, values in layers.items():
        var_attrs = dict(attrs[name])
        var_attrs["grid_mapping"] = "crs"
        data_vars[name] = xr.Variable(dims, values, var_attrs)
    ds = xr.Dataset(data_vars, coords={k: xr.Variable(*v) for k, v in coords.items()})
    ds["crs"] = grid_mapping(spec)
    if not spec.geographic:
        lon, lat = _lonlat_layers(spec)
        ds = ds.assign_coords(
            lat=(dims, lat, {"standard_name": "latitude", "long_name": "latitude", "units": "degrees_north"}),
            lon=(dims, lon, {"standard_name": "longitude", "long_name": "longitude", "units": "degrees_east"}))
    ds.attrs.update({"Conventions": CONVENTIONS, **global_attrs})
    return ds


def _lonlat_layers(spec):
    import dask.array as da

    template = da.zeros(spec.shape, chunks=spec.chunks, dtype=np.float64)

    def part(block, index, block_info=None):
        (r0, r1), (c0, c1) = block_info[0]["array-location"]
        return spec.lonlat(slice(r0, r1), slice(c0, c1))[index]

    return (da.map_blocks(part, template, 0, dtype=np.float64), da.map_blocks(part, template, 1, dtype=np.float64))


def encoding(ds: xr.Dataset, spec) -> dict:
    """Compression, on-disk chunks and fill values, merged with each variable's own encoding."""
    enc = {}
    for name, var in ds.variables.items():
        own = {k: v for k, v in var.encoding.items() if k in KEPT_ENCODING}
        if name in ds.dims or name == "crs":
            own.update({"_FillValue": None})
        elif var.ndim == 2:
            chunks = tuple(min(c, s) for c, s in zip(spec.chunks, var.shape))
            dtype = np.dtype(own.get("dtype", var.dtype))
            fill = np.nan if dtype.kind == "f" else np.iinfo(dtype).min if dtype.kind == "i" else np.iinfo(dtype).max
            own.update({"zlib": True, "complevel": 4, "shuffle": True, "chunksizes": chunks, "_FillValue": fill})
            if name in ("lat", "lon"):
                own["_FillValue"] = None
        enc[name] = own
    return enc


def write_netcdf(ds: xr.Dataset, target: Path, spec, window_mb: float = 256.0) -> Path:
    """Write a dataset to a staged file beside ``target``; returns the staged path (not yet renamed).

    xarray writes the file's structure, attributes and coordinates with the lazy layers replaced by
    their fill value (constant blocks compress to almost nothing); the layers are then computed
    window by window, a band of blocks at a time, and written with netCDF4. Layers that share a
    computation (the age engine's blocks) are computed together, so memory stays bounded by the window.
    """
    import dask
    import dask.array as da
    import netCDF4

    staged = staging_path(target)
    enc = encoding(ds, spec)
    lazy = [n for n, v in ds.variables.items() if isinstance(v.data, da.Array) and v.ndim == 2]
    template = ds.copy()
    for name in lazy:
        var = ds.variables[name]
        fill = enc[name].get("_FillValue")
        if fill is None:
            fill = np.nan if var.dtype.kind == "f" else 0
        data = da.full(var.shape, fill, dtype=var.dtype, chunks=var.data.chunks)
        if name in template.coords:
            template = template.assign_coords({name: (var.dims, data, var.attrs)})
        else:
            template[name] = xr.Variable(var.dims, data, var.attrs)
        template.variables[name].encoding = var.encoding
    limit_chunk_cache()
    try:
        template.to_netcdf(staged, engine="netcdf4", format="NETCDF4", encoding=enc)
        if lazy:
            ny, nx = spec.shape
            rows, cols = spec.chunks
            per_cell = sum(ds.variables[n].dtype.itemsize for n in lazy) + 8 * 12
            width = int(max(cols, min(nx, window_mb * 2**20 / (rows * per_cell) // cols * cols)))
            with netCDF4.Dataset(staged, "a") as nc:
                for name in lazy:
                    nc[name].set_auto_maskandscale(False)
                for r0 in range(0, ny, rows):
                    for c0 in range(0, nx, width):
                        window = (slice(r0, min(r0 + rows, ny)), slice(c0, min(c0 + width, nx)))
                        values = dask.compute(*[ds.variables[n].data[window] for n in lazy])
                        for name, block in zip(lazy, values):
                            nc[name][window] = _encoded(block, enc[name])
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            staged.unlink()
        raise
    return staged


def _encoded(block: np.ndarray, enc: dict) -> np.ndarray:
    """Values as stored: cast to the on-disk type, with NaN in integer layers written as the fill value."""
    dtype = np.dtype(enc.get("dtype", block.dtype))
    if dtype.kind in "iu" and block.dtype.kind == "f":
        block = np.where(np.isnan(block), enc.get("_FillValue", 0), block)
    return block.astype(dtype, copy=False)


__all__ = ["dataset", "encoding", "write_netcdf", "replace"]
