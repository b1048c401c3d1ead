"""Cloud-Optimized GeoTIFFs, one per output layer, streamed block by block.

The layer is streamed into a tiled GTiff (bounded memory), band metadata set there, then copied to a
COG (overviews, deflate) by GDAL with its cache capped.
"""
from __future__ import annotations

import contextlib
from pathlib import Path

import numpy as np
import rasterio
import rasterio.shutil
from rasterio.windows import Window

from agegrid.io.atomic import staging_path

BLOCK = 256


def write_cog(values, target: Path, spec, attrs: dict) -> Path:
    """Write one 2-D layer (numpy or lazy array) as a COG staged beside ``target``; returns the staged path."""
    dtype = np.dtype(values.dtype)
    if dtype == np.int8:  # GDAL's GTiff has no signed byte type before 3.7
        dtype = np.dtype(np.int16)
    nodata = np.nan if dtype.kind == "f" else np.iinfo(dtype).min if dtype.kind == "i" else np.iinfo(dtype).max
    ny, nx = values.shape
    crs = rasterio.crs.CRS.from_wkt(spec.pyproj_crs.to_wkt())
    tiled = staging_path(target.with_suffix(".tiled.tif"))
    staged = staging_path(target)
    try:
        profile = {"driver": "GTiff", "width": nx, "height": ny, "count": 1, "dtype": dtype.name, "crs": crs,
                   "transform": spec.transform, "nodata": nodata, "tiled": True, "blockxsize": BLOCK,
                   "blockysize": BLOCK, "compress": "deflate", "BIGTIFF": "IF_SAFER"}
        with rasterio.open(tiled, "w", **profile) as dst:
            rows = spec.chunks[0]
            for r0 in range(0, ny, rows):
                block = np.asarray(values[r0:r0 + rows, :])
                if dtype.kind != "f":  # masked cells of an integer layer read back as NaN
                    block = np.where(np.isnan(block), nodata, block) if block.dtype.kind == "f" else block
                block = block.astype(dtype)
                dst.write(block, 1, window=Window(0, r0, nx, block.shape[0]))
            dst.set_band_description(1, attrs.get("long_name", ""))
            dst.update_tags(1, **{k: str(v) for k, v in attrs.items()})
            if attrs.get("units"):
                dst.set_band_unit(1, str(attrs["units"]))
        with rasterio.Env(GDAL_CACHEMAX=256):
            rasterio.shutil.copy(tiled, staged, driver="COG", COMPRESS="DEFLATE", BLOCKSIZE=BLOCK,
                                 OVERVIEWS="AUTO", RESAMPLING="NEAREST" if dtype.kind in "iu" else "AVERAGE",
                                 BIGTIFF="IF_SAFER", NUM_THREADS="ALL_CPUS")
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            staged.unlink()
        raise
    finally:
        with contextlib.suppress(FileNotFoundError):
            tiled.unlink()
    return staged
