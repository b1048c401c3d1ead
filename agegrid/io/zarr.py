"""Zarr output: the NetCDF's variables, attributes and coordinates, chunked like the computation."""
from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np

from agegrid.io.atomic import staging_path


def write_zarr(ds, target: Path, spec) -> Path:
    """Write a dataset as a Zarr store staged beside ``target``; returns the staged folder.

    Dask chunks are aligned with the store's chunks (the grid's blocks), so blocks are written in
    parallel and no two write to one storage chunk.
    """
    staged = staging_path(target)
    dims = {d: c for d, c in zip(ds["age"].dims, spec.chunks)}
    out = ds.chunk(dims)
    encoding = {}
    for name, var in out.variables.items():
        keep = {k: v for k, v in var.encoding.items() if k in ("dtype", "_FillValue", "scale_factor", "add_offset")}
        var.encoding = {}
        if var.ndim == 2:
            keep["chunks"] = tuple(min(c, s) for c, s in zip(spec.chunks, var.shape))
        if name in out.dims:
            keep["_FillValue"] = None
        encoding[name] = keep
    try:
        out.to_zarr(staged, mode="w", encoding=encoding, consolidated=True, compute=True, zarr_format=2)
    except BaseException:
        shutil.rmtree(staged, ignore_errors=True)
        raise
    return staged


def store_arrays_equal(zarr_path: Path, netcdf_path: Path) -> bool:
    """True when every variable of a Zarr store equals the NetCDF's, NaN for NaN (for tests and checks)."""
    import xarray as xr

    from agegrid.io.netcdf import open_netcdf

    with xr.open_zarr(zarr_path) as z, open_netcdf(netcdf_path) as n:
        if set(z.data_vars) != set(n.data_vars):
            return False
        return all(np.array_equal(z[v].values, n[v].values, equal_nan=z[v].dtype.kind == "f") for v in n.data_vars)
