"""Cloud-Optimized GeoTIFFs, one per output layer, copied by GDAL straight from the written NetCDF.

GDAL reads the NetCDF layer block by block (its CF grid mapping gives the CRS, its fill value the
nodata); an in-memory VRT carries the band description and attributes, which must be set before the
COG is made (GDAL refuses to edit a finished COG); the COG driver then writes tiles, overviews and
deflate compression with its cache capped, so memory stays bounded whatever the grid size.
"""
from __future__ import annotations

import contextlib
import uuid
from pathlib import Path

import rasterio
import rasterio.shutil

from agegrid.io.atomic import staging_path

BLOCK = 256
CACHE_MB = 256


def write_cog(netcdf: Path, name: str, target: Path, attrs: dict) -> Path:
    """Write the NetCDF variable ``name`` as a COG staged beside ``target``; returns the staged path."""
    staged = staging_path(target)
    vrt = f"/vsimem/agegrid-{uuid.uuid4().hex}.vrt"
    integer = str(attrs.get("units", "")) == "1" or "flag_values" in attrs
    try:
        with rasterio.Env(GDAL_CACHEMAX=CACHE_MB):
            rasterio.shutil.copy(f'NETCDF:"{netcdf}":{name}', vrt, driver="VRT")
            with rasterio.open(vrt, "r+") as band:
                band.set_band_description(1, str(attrs.get("long_name", name)))
                band.update_tags(1, **{k: str(v) for k, v in attrs.items()})
                if attrs.get("units"):
                    band.set_band_unit(1, str(attrs["units"]))
            rasterio.shutil.copy(vrt, staged, driver="COG", COMPRESS="DEFLATE", BLOCKSIZE=BLOCK, OVERVIEWS="AUTO",
                                 RESAMPLING="NEAREST" if integer else "AVERAGE", BIGTIFF="IF_SAFER",
                                 NUM_THREADS="ALL_CPUS")
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            staged.unlink()
        raise
    finally:
        with contextlib.suppress(Exception):
            rasterio.shutil.delete(vrt, driver="VRT")
    return staged
