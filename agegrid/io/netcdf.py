"""CF-1.8 NetCDF: coordinates, grid mapping, global attributes, compression, chunked on disk."""
from __future__ import annotations

import contextlib
from pathlib import Path

import numpy as np
import xarray as xr

from agegrid.io.atomic import replace, staging_path

CONVENTIONS = "CF-1.8"
#: Encoding keys carried over from a variable read back from a file (the rest are reader details).
KEPT_ENCODING = ("dtype", "_FillValue", "scale_factor", "add_offset", "zlib", "complevel", "shuffle", "chunksizes")


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


def write_netcdf(ds: xr.Dataset, target: Path, spec) -> Path:
    """Write a dataset to a staged file beside ``target``; returns the staged path (not yet renamed)."""
    staged = staging_path(target)
    try:
        ds.to_netcdf(staged, engine="netcdf4", format="NETCDF4", encoding=encoding(ds, spec))
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            staged.unlink()
        raise
    return staged


__all__ = ["dataset", "encoding", "write_netcdf", "replace"]
