"""Grid specification: region, spacing, CRS and block size, and the cell-centre coordinates."""
from __future__ import annotations

import math
from dataclasses import dataclass
from functools import cached_property

import numpy as np
import pyproj
from affine import Affine

from agegrid.errors import BadInput

#: Budget used to refuse grids that cannot be built on this kind of machine (bytes of one float32 layer
#: times the number of layers held at once, see :meth:`GridSpec.check_size`).
MEMORY_BUDGET_BYTES = 16 * 2**30


@dataclass(frozen=True)
class GridSpec:
    """A regular grid of cell centres, north row first.

    Parameters
    ----------
    region : tuple of float
        West, east, south, north edges in CRS units; a geographic region across the antimeridian is
        written with east past 180.
    spacing : float
        Cell size in CRS units.
    crs : str
        Anything :class:`pyproj.CRS` accepts.
    chunk : int
        Cells per block side for chunked computation.
    """

    region: tuple[float, float, float, float]
    spacing: float
    crs: str = "EPSG:4326"
    chunk: int = 512

    @cached_property
    def pyproj_crs(self) -> pyproj.CRS:
        return pyproj.CRS.from_user_input(self.crs)

    @property
    def geographic(self) -> bool:
        return self.pyproj_crs.is_geographic

    @property
    def shape(self) -> tuple[int, int]:
        west, east, south, north = self.region
        ny = max(1, math.ceil((north - south) / self.spacing - 1e-9))
        nx = max(1, math.ceil((east - west) / self.spacing - 1e-9))
        return ny, nx

    @property
    def size(self) -> int:
        ny, nx = self.shape
        return ny * nx

    @property
    def x(self) -> np.ndarray:
        """Cell-centre x (longitude for a geographic CRS), west to east."""
        return self.region[0] + self.spacing * (np.arange(self.shape[1]) + 0.5)

    @property
    def y(self) -> np.ndarray:
        """Cell-centre y (latitude for a geographic CRS), north to south."""
        return self.region[3] - self.spacing * (np.arange(self.shape[0]) + 0.5)

    @property
    def transform(self) -> Affine:
        """The affine transform of the cell edges, north-up."""
        return Affine(self.spacing, 0.0, self.region[0], 0.0, -self.spacing, self.region[3])

    @property
    def chunks(self) -> tuple[int, int]:
        ny, nx = self.shape
        return min(self.chunk, ny), min(self.chunk, nx)

    @property
    def block_sizes(self) -> tuple[tuple[int, ...], tuple[int, ...]]:
        """Rows of every block row and columns of every block column (dask's ``chunks`` of the grid)."""
        return tuple(tuple(min(side, n - start) for start in range(0, n, side))
                     for n, side in zip(self.shape, self.chunks))

    @property
    def is_global(self) -> bool:
        """True for a geographic grid that wraps all the way round in longitude."""
        return self.geographic and abs(self.shape[1] * self.spacing - 360.0) < 1e-6 * self.spacing

    def lonlat(self, rows: slice = slice(None), cols: slice = slice(None)) -> tuple[np.ndarray, np.ndarray]:
        """Longitude and latitude (degrees) of the cell centres of a window, as 2-D arrays."""
        x, y = self.x[cols], self.y[rows]
        xx, yy = np.meshgrid(x, y)
        if self.geographic:
            return xx, yy
        lon, lat = self.to_lonlat.transform(xx, yy)
        return np.asarray(lon), np.asarray(lat)

    @cached_property
    def to_lonlat(self) -> pyproj.Transformer:
        return pyproj.Transformer.from_crs(self.pyproj_crs, "EPSG:4326", always_xy=True)

    @cached_property
    def from_lonlat(self) -> pyproj.Transformer:
        return pyproj.Transformer.from_crs("EPSG:4326", self.pyproj_crs, always_xy=True)

    def wrap_lon(self, lon: np.ndarray) -> np.ndarray:
        """Longitudes wrapped into ``[west - 180 + width/2, ...)``, matching the region's convention."""
        if not self.geographic:
            return np.asarray(lon, dtype=float)
        centre = 0.5 * (self.region[0] + self.region[1])
        return (np.asarray(lon, dtype=float) - centre + 180.0) % 360.0 + centre - 180.0

    def project(self, lon: np.ndarray, lat: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Geographic points to grid CRS coordinates (longitudes wrapped on a geographic grid)."""
        if self.geographic:
            return self.wrap_lon(lon), np.asarray(lat, dtype=float)
        x, y = self.from_lonlat.transform(np.asarray(lon, float), np.asarray(lat, float))
        return np.asarray(x), np.asarray(y)

    def index(self, lon: np.ndarray, lat: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Row and column of the cells holding geographic points, and whether each is on the grid."""
        x, y = self.project(lon, lat)
        col = np.floor((x - self.region[0]) / self.spacing).astype(np.int64)
        row = np.floor((self.region[3] - y) / self.spacing).astype(np.int64)
        ny, nx = self.shape
        inside = (row >= 0) & (row < ny) & (col >= 0) & (col < nx) & np.isfinite(x) & np.isfinite(y)
        return np.clip(row, 0, ny - 1), np.clip(col, 0, nx - 1), inside

    def check_size(self, layers: int, source=None, key: str = "grid.spacing") -> None:
        """Refuse a grid whose in-memory layers would not fit the machine, before allocating anything."""
        need = self.size * 4 * layers
        if need > MEMORY_BUDGET_BYTES:
            ny, nx = self.shape
            raise BadInput(
                f"grid of {ny} x {nx} = {self.size:,} cells needs about {need / 2**30:.1f} GiB for "
                f"{layers} layers, more than the {MEMORY_BUDGET_BYTES / 2**30:.0f} GiB budget; use a "
                f"coarser spacing (e.g. {self.spacing * math.ceil(math.sqrt(need / MEMORY_BUDGET_BYTES)):g}) "
                "or split the region", source, key)

    @classmethod
    def from_dataset(cls, ds) -> "GridSpec":
        """The grid of a dataset written by agegrid (regular ``lon``/``lat`` or ``x``/``y``, a ``crs`` variable),
        with the block side of its ``age`` chunks on disk when it has them."""
        geographic = "lon" in ds.dims
        x, y = (ds["lon"].values, ds["lat"].values) if geographic else (ds["x"].values, ds["y"].values)
        step = float(abs(x[1] - x[0]))
        crs = "EPSG:4326" if geographic else ds["crs"].attrs.get("crs_wkt")
        stored = ds["age"].encoding.get("chunksizes") if "age" in ds else None
        return cls((float(x[0] - step / 2), float(x[-1] + step / 2), float(y[-1] - step / 2), float(y[0] + step / 2)),
                   step, crs, *([int(max(stored))] if stored else []))

    @classmethod
    def from_config(cls, grid) -> "GridSpec":
        """Build from a ``[grid]`` section validated by :mod:`agegrid.config` (CRS and limits checked there)."""
        return cls(tuple(grid.region), float(grid.spacing), grid.crs, int(grid.chunk))
