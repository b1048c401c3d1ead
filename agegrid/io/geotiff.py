"""Cloud-Optimized GeoTIFFs, one per output layer, made by GDAL from sources streamed during the build.

While the layers are computed window by window, each layer's blocks go into an uncompressed tiled
GeoTIFF beside the target (:class:`CogWriter`), with its band description, units and attributes set
(GDAL refuses to edit a finished COG). When the sources are complete their overviews are built in place
(uncompressed, so cheaply) and GDAL's COG driver copies every source to a COG (tiles, those overviews,
the chosen compression), several layers at a time, with its cache capped, so memory stays
bounded whatever the grid size; the sources are removed.
"""
from __future__ import annotations

import contextlib
import os
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
import rasterio
import rasterio.shutil
from rasterio.enums import Resampling
from rasterio.windows import Window

from agegrid.io.atomic import staging_path

BLOCK = 256
CACHE_MB = 256
#: GDAL's codec and level for each ``[output] cog_compression``: DEFLATE at level 1 makes files within 1 % of
#: the default level 6's size, 1.6x faster; ZSTD at level 1 makes files within 1 % of
#: DEFLATE's, 2.5x faster (measured on a build's 19 layers, see the README).
CODECS = {"deflate": {"COMPRESS": "DEFLATE", "LEVEL": 1}, "zstd": {"COMPRESS": "ZSTD", "LEVEL": 1},
          "none": {"COMPRESS": "NONE"}}


class CogWriter:
    """Streams layers into GeoTIFF sources, then turns each into a COG staged beside its target."""

    def __init__(self, spec, targets: dict[str, Path], attrs: dict, dtypes: dict, fills: dict,
                 compression: str = "deflate", predictor: bool = False):
        self.targets, self.attrs, self.fills, self.dtypes = targets, attrs, fills, dtypes
        self.codec, self.predictor = CODECS[compression], predictor
        self.sources: dict[str, Path] = {}
        self.open: dict = {}
        crs = rasterio.crs.CRS.from_wkt(spec.pyproj_crs.to_wkt())
        ny, nx = spec.shape
        for name, target in targets.items():
            source = staging_path(target.with_suffix(".source.tif"))
            self.sources[name] = source
            with rasterio.Env(GDAL_CACHEMAX=CACHE_MB):
                band = rasterio.open(source, "w", driver="GTiff", width=nx, height=ny, count=1,
                                     dtype=np.dtype(dtypes[name]).name, crs=crs, transform=spec.transform,
                                     nodata=fills[name], tiled=True, blockxsize=BLOCK, blockysize=BLOCK,
                                     BIGTIFF="IF_SAFER")
            layer_attrs = attrs[name]
            band.set_band_description(1, str(layer_attrs.get("long_name", name)))
            band.update_tags(1, **{k: str(v) for k, v in layer_attrs.items()})
            if layer_attrs.get("units"):
                band.set_band_unit(1, str(layer_attrs["units"]))
            self.open[name] = band

    def write(self, name: str, r0: int, c0: int, block: np.ndarray) -> None:
        """Write a block of layer ``name`` whose top-left cell is (r0, c0)."""
        band = self.open.get(name)
        if band is None:
            return
        fill = self.fills[name]
        if block.dtype.kind == "f" and np.dtype(band.dtypes[0]).kind in "iu":
            block = np.where(np.isnan(block), fill, block)
        with rasterio.Env(GDAL_CACHEMAX=CACHE_MB):
            band.write(block.astype(band.dtypes[0], copy=False), 1,
                       window=Window(c0, r0, block.shape[1], block.shape[0]))

    def finish(self, threads: int | None = None) -> dict[Path, Path]:
        """Close the sources and make the COGs; returns {target: staged COG}."""
        def finish_one(name: str) -> Path:
            self._close_with_overviews(name)
            return self._cog(name)

        # widest types first, so the threads end together
        names = sorted(self.targets, key=lambda n: -np.dtype(self.open[n].dtypes[0]).itemsize)
        with ThreadPoolExecutor(threads or os.cpu_count() or 1) as pool:
            staged = dict(zip([self.targets[n] for n in names], pool.map(finish_one, names)))
        self.open.clear()
        self.close()
        return {target: staged[target] for target in self.targets.values()}

    def _close_with_overviews(self, name: str) -> None:
        """Add the overviews to a source (the COG driver copies them) and close it.

        GDAL building them in the uncompressed source is about four times cheaper than the COG
        driver building them from it; the levels are those of the driver's own choice (halving until
        the overview fits one block).
        """
        band = self.open[name]
        factors, factor = [], 2
        while max(band.shape) / (factor // 2) > BLOCK:
            factors.append(factor)
            factor *= 2
        with rasterio.Env(GDAL_CACHEMAX=CACHE_MB):
            if factors:
                band.build_overviews(factors, Resampling.nearest if self._integer(name) else Resampling.average)
            band.close()

    def _integer(self, name: str) -> bool:
        """Whether a layer holds codes or counts, whose overviews take the nearest value, not the average."""
        return str(self.attrs[name].get("units", "")) == "1" or "flag_values" in self.attrs[name]

    def _cog(self, name: str) -> Path:
        target, source = self.targets[name], self.sources[name]
        staged = staging_path(target)
        options = dict(self.codec)
        if self.predictor:  # TIFF's floating-point predictor (3) for reals, horizontal differencing (2) for integers
            options["PREDICTOR"] = 3 if np.dtype(self.dtypes[name]).kind == "f" else 2
        try:
            with rasterio.Env(GDAL_CACHEMAX=CACHE_MB):
                rasterio.shutil.copy(source, staged, driver="COG", BLOCKSIZE=BLOCK, OVERVIEWS="FORCE_USE_EXISTING",
                                     BIGTIFF="IF_SAFER", NUM_THREADS=1, **options)
        except BaseException:
            with contextlib.suppress(FileNotFoundError):
                staged.unlink()
            raise
        finally:
            source.unlink(missing_ok=True)
        return staged

    def close(self) -> None:
        """Close and remove whatever sources are left (also after a failure)."""
        for band in self.open.values():
            with contextlib.suppress(Exception):
                band.close()
        self.open.clear()
        for source in self.sources.values():
            source.unlink(missing_ok=True)
