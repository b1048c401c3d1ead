"""Input grids (NetCDF or GeoTIFF) read and resampled onto the build's grid.

Block average where the input is finer than the grid, bilinear where it is coarser; another CRS is
reprojected by GDAL (rasterio.warp). A grid on the build grid's own lattice is read as is, and only the
cells the build covers; :func:`grid_blocks` reads a grid in the build's CRS block by block as the streaming
pass asks (each block from the source cells around it), so that no grid-sized copy is held.
"""
from __future__ import annotations

import contextlib
import uuid
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import dask.array as da
import numpy as np
import rasterio
from affine import Affine
from rasterio.warp import Resampling, reproject
from rasterio.windows import Window

from agegrid.errors import BadInput

# GDAL's in-memory copy of an array reprojected on a dask thread is made before its transform is set, and
# rasterio warns that it has none; a GeoTIFF without georeferencing is refused in _open_geotiff instead
warnings.filterwarnings("ignore", "Dataset has no geotransform", rasterio.errors.NotGeoreferencedWarning)

X_NAMES = ("lon", "longitude", "x", "easting")
Y_NAMES = ("lat", "latitude", "y", "northing")


@dataclass
class SourceGrid:
    """A 2-D grid as opened: its shape, transform, CRS and attributes, and ``read``, which returns the cells
    of given rows and columns (slices; north row first, west column first) as float32 with NaN for no data."""

    read: Callable[[slice, slice], np.ndarray]
    shape: tuple[int, int]
    transform: Affine
    crs: rasterio.crs.CRS
    attrs: dict = field(default_factory=dict)
    name: str = ""
    close: Callable[[], None] = lambda: None
    """Releases the file (reading again reopens it)."""

    @property
    def values(self) -> np.ndarray:
        """Every cell."""
        return self.read(slice(None), slice(None))


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
    try:
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
        attrs = dict(var.attrs)
        crs = _netcdf_crs(ds, var, xdim)
        if crs.is_geographic and spec.geographic:
            x = spec.wrap_lon(x)
        order_y, order_x = _ordering(-y), _ordering(x)
        x, y = x[order_x], y[order_y]
        dx, dy = _regular(x, path, xdim), _regular(y, path, ydim)
        close = ds.close
        if isinstance(order_y, slice) and isinstance(order_x, slice):
            read = _VariableWindows(var, path, order_y.step == -1, order_x.step == -1)
        else:  # columns reordered (a 0-360 grid on a -180-180 build): read whole, once
            values = var.values.astype(np.float32, copy=False)[order_y][:, order_x]
            ds.close()

            def read(rows: slice, cols: slice) -> np.ndarray:
                return values[rows, cols]
    except BaseException:
        ds.close()
        raise
    transform = Affine(dx, 0, x[0] - dx / 2, 0, dy, y[0] - dy / 2)
    return SourceGrid(read, (len(y), len(x)), transform, crs, attrs, str(var.name), close)


class _VariableWindows:
    """Cells of a NetCDF variable (opened lazily by xarray, which also decodes them) by rows and columns of
    the grid sorted north to south and west to east, for a variable stored in that order or reversed."""

    def __init__(self, var, path: Path, rows_reversed: bool, cols_reversed: bool):
        self.var, self.path, self.reversed = var, path, (rows_reversed, cols_reversed)

    def __call__(self, rows: slice, cols: slice) -> np.ndarray:
        stored = []
        for index, n, flip in zip((rows, cols), self.var.shape, self.reversed):
            start, stop, _ = index.indices(n)
            stored.append(slice(n - stop, n - start) if flip else slice(start, stop))
        try:
            values = self.var[tuple(stored)].values.astype(np.float32, copy=False)
        except (OSError, RuntimeError, ValueError) as exc:  # a damaged chunk: netCDF4 raises these
            raise BadInput(f"cannot read rows {stored[0].start}-{stored[0].stop - 1} of {self.var.name!r} "
                           f"({type(exc).__name__}: {exc})", self.path) from None
        return values[::-1 if self.reversed[0] else 1, ::-1 if self.reversed[1] else 1]


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
            if src.crs is None:
                raise BadInput("GeoTIFF has no CRS", path)
            if src.transform.is_identity:
                raise BadInput("GeoTIFF has no geotransform (cell size and origin)", path)
            attrs = dict(src.tags(1))
            attrs.update(src.tags())
            if src.units and src.units[0]:
                attrs.setdefault("units", src.units[0])
            shape, transform, crs, name = (src.height, src.width), src.transform, src.crs, src.descriptions[0] or ""
    except rasterio.errors.RasterioIOError as exc:
        raise BadInput(f"not a readable NetCDF or GeoTIFF file ({exc})", path) from None
    return SourceGrid(_BandWindows(path, shape), shape, transform, crs, attrs, name)


class _BandWindows:
    """Cells of a GeoTIFF's first band by rows and columns (the file opened for each read, so that threads
    never share a GDAL dataset)."""

    def __init__(self, path: Path, shape: tuple[int, int]):
        self.path, self.shape = path, shape

    def __call__(self, rows: slice, cols: slice) -> np.ndarray:
        (r0, r1, _), (c0, c1, _) = rows.indices(self.shape[0]), cols.indices(self.shape[1])
        try:
            with rasterio.open(self.path) as src:
                band = src.read(1, window=Window(c0, r0, c1 - c0, r1 - r0), masked=True)
        except rasterio.errors.RasterioIOError as exc:
            raise BadInput(f"cannot read rows {r0}-{r1 - 1} ({exc})", self.path) from None
        return band.astype(np.float32).filled(np.nan)


def open_grid(path: str | Path, spec) -> SourceGrid:
    """Open a NetCDF or GeoTIFF grid (by content, whatever its ending)."""
    path = Path(path)
    try:
        with open(path, "rb") as fh:
            head = fh.read(8)  # the format's signature (not the whole file: inputs may be gigabytes)
    except FileNotFoundError:
        raise BadInput("file not found", path) from None
    if head[:4] in (b"II*\x00", b"MM\x00*", b"II+\x00", b"MM\x00+"):
        return _open_geotiff(path, spec)
    if head[:3] == b"CDF" or head[:8] == b"\x89HDF\r\n\x1a\n":
        return _open_netcdf(path, spec)
    raise BadInput("not a NetCDF or GeoTIFF file", path)


def _build_crs(spec) -> rasterio.crs.CRS:
    """The build grid's CRS as rasterio takes it."""
    return rasterio.crs.CRS.from_wkt(spec.pyproj_crs.to_wkt())


def _aligned_window(source: SourceGrid, spec) -> tuple[slice, slice] | None:
    """The source's rows and columns that are exactly the build grid's cells, if its lattice holds them."""
    src, dst = source.transform, spec.transform
    if src.b or src.d or not np.isclose(src.a, dst.a, rtol=1e-9, atol=0) or not np.isclose(src.e, dst.e, rtol=1e-9, atol=0):
        return None
    if source.crs != _build_crs(spec):
        return None
    col, row = (dst.c - src.c) / src.a, (dst.f - src.f) / src.e
    c0, r0 = int(round(col)), int(round(row))
    if abs(col - c0) > 1e-6 or abs(row - r0) > 1e-6:
        return None
    ny, nx = spec.shape
    if r0 < 0 or c0 < 0 or r0 + ny > source.shape[0] or c0 + nx > source.shape[1]:
        return None
    return slice(r0, r0 + ny), slice(c0, c0 + nx)


def resample(source: SourceGrid, spec, rows: slice = slice(None), cols: slice = slice(None)) -> np.ndarray:
    """The build grid's cells in ``rows`` and ``cols`` (default: all) from a source grid (float32, NaN where
    the source has no data).

    A source on the build grid's own lattice (same CRS and cell size, cell edges aligned) is read as is; in
    the same CRS only the source cells around the asked ones are read (two cells beyond, for the kernels).
    """
    (r0, r1, _), (c0, c1, _) = rows.indices(spec.shape[0]), cols.indices(spec.shape[1])
    window = _aligned_window(source, spec)
    if window is not None:
        return source.read(slice(window[0].start + r0, window[0].start + r1),
                           slice(window[1].start + c0, window[1].start + c1))
    target = np.full((r1 - r0, c1 - c0), np.nan, dtype=np.float32)
    dst_transform = spec.transform @ Affine.translation(c0, r0)
    covering = _covering(source, spec, dst_transform, target.shape)
    scales = {}
    if covering is None:
        covering = slice(0, source.shape[0]), slice(0, source.shape[1])
    else:  # in one CRS the scale is the same everywhere: given, so that GDAL does not work it out per chunk
        scales = {"XSCALE": abs(source.transform.a / dst_transform.a), "YSCALE": abs(source.transform.e / dst_transform.e)}
    if covering[0].start >= covering[0].stop or covering[1].start >= covering[1].stop:
        return target
    source_cell = abs(source.transform.a * source.transform.e) ** 0.5
    same_kind = source.crs.is_geographic == spec.geographic
    finer = same_kind and source_cell < spec.spacing * 0.999
    reproject(
        source=source.read(*covering), destination=target,
        src_transform=source.transform @ Affine.translation(covering[1].start, covering[0].start),
        src_crs=source.crs, src_nodata=np.nan, dst_transform=dst_transform,
        dst_crs=_build_crs(spec), dst_nodata=np.nan,
        resampling=Resampling.average if finer else Resampling.bilinear, **scales)
    return target


def _covering(source: SourceGrid, spec, dst_transform: Affine, shape: tuple[int, int],
              margin: int = 2) -> tuple[slice, slice] | None:
    """The source's rows and columns under a window of the build grid (``dst_transform``, ``shape``), with
    ``margin`` cells around (bilinear reads one neighbour; two is agegrid's margin of safety); None when the
    source is in another CRS or rotated (all of it is then read)."""
    src = source.transform
    if src.b or src.d or source.crs != _build_crs(spec):
        return None
    ny, nx = shape
    cols = sorted((x - src.c) / src.a for x in (dst_transform.c, dst_transform.c + nx * dst_transform.a))
    rows = sorted((y - src.f) / src.e for y in (dst_transform.f, dst_transform.f + ny * dst_transform.e))
    return (slice(max(int(np.floor(rows[0])) - margin, 0), min(int(np.ceil(rows[1])) + margin, source.shape[0])),
            slice(max(int(np.floor(cols[0])) - margin, 0), min(int(np.ceil(cols[1])) + margin, source.shape[1])))


#: The message of an input grid without a finite value where the build grid lies.
EMPTY = "grid holds no finite values over the build grid's region"


def read_grid(path: str | Path, spec) -> tuple[np.ndarray, dict]:
    """Read an input grid resampled onto the build grid, with the source's attributes."""
    source = open_grid(path, spec)
    try:
        return _resampled(source, spec, path), {**source.attrs, "variable": source.name}
    finally:
        source.close()


def _resampled(source: SourceGrid, spec, path) -> np.ndarray:
    values = resample(source, spec)
    if not np.isfinite(values).any():
        raise BadInput(EMPTY, path)
    return values


def grid_blocks(path: str | Path, spec, opened: contextlib.ExitStack) -> tuple[da.Array, dict]:
    """An input grid on the build grid as a dask array chunked like it, with the source's attributes.

    A source in the build's CRS is read and resampled block by block when the blocks are computed (nothing
    grid-sized is held; the cells of a block are those :func:`resample` gives for the whole grid) and its
    file is released when ``opened`` closes; one in another CRS is resampled whole first.
    """
    source = open_grid(path, spec)
    attrs = {**source.attrs, "variable": source.name}
    covering = _aligned_window(source, spec) or _covering(source, spec, spec.transform, spec.shape)
    if covering is None:
        try:
            return da.from_array(_resampled(source, spec, path), chunks=spec.chunks), attrs
        finally:
            source.close()
    opened.callback(source.close)
    if not _any_finite(source, *covering):
        raise BadInput(EMPTY, path)

    def block(block_info=None):
        (r0, r1), (c0, c1) = block_info[None]["array-location"]
        return resample(source, spec, slice(r0, r1), slice(c0, c1))

    # named by a random token: dask would otherwise hash the reader
    return da.map_blocks(block, dtype=np.float32, chunks=spec.block_sizes, meta=np.empty((0, 0), np.float32),
                         name=f"input-grid-{uuid.uuid4().hex}"), attrs


def _any_finite(source: SourceGrid, rows: slice, cols: slice, probes: int = 8, strip: int = 256) -> bool:
    """Whether a source has a finite value in the given rows and columns: a few rows spread over them first
    (their number is agegrid's choice; one finite cell ends the search), then, only if all of those are
    empty, strip by strip, so the answer is exact."""
    if rows.start >= rows.stop or cols.start >= cols.stop:
        return False
    for r in np.linspace(rows.start, rows.stop - 1, min(probes, rows.stop - rows.start)).astype(int):
        if np.isfinite(source.read(slice(r, r + 1), cols)).any():
            return True
    return any(np.isfinite(source.read(slice(r, min(r + strip, rows.stop)), cols)).any()
               for r in range(rows.start, rows.stop, strip))
