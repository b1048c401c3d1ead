"""CF-1.8 NetCDF: coordinates, grid mapping, global attributes, compression, chunked on disk."""
from __future__ import annotations

import contextlib
import os
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
import xarray as xr

from agegrid.io.atomic import replace, staging_path

CONVENTIONS = "CF-1.8"
#: Deflate level of the layers (ISA-L level 2: within ~5 % of zlib level 4's size, ~20x faster).
COMPRESSION_LEVEL = 2
#: Deflate level of layers stored as their COG's tiles (the COG writer's ISA-L level).
TILE_LEVEL = 1
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

    def part(index, block_info=None):
        (r0, r1), (c0, c1) = block_info[None]["array-location"]
        return spec.lonlat(slice(r0, r1), slice(c0, c1))[index]

    return tuple(da.map_blocks(part, index, dtype=np.float64, chunks=spec.block_sizes) for index in (0, 1))


def encoding(ds: xr.Dataset, spec, tiled: dict[str, tuple[int, int]] | None = None) -> dict:
    """Compression, on-disk chunks and fill values, merged with each variable's own encoding.

    Layers in ``tiled`` take chunks of the given shape, deflated at ISA-L level 1 without shuffle: the
    tiles of their COG (see :func:`write_netcdf`).
    """
    tiled = tiled or {}
    enc = {}
    for name, var in ds.variables.items():
        own = {k: v for k, v in var.encoding.items() if k in KEPT_ENCODING}
        if name in ds.dims or name == "crs":
            own.update({"_FillValue": None})
        elif var.ndim == 2:
            chunks = tuple(min(c, s) for c, s in zip(spec.chunks, var.shape))
            dtype = np.dtype(own.get("dtype", var.dtype))
            fill = np.nan if dtype.kind == "f" else np.iinfo(dtype).min if dtype.kind == "i" else np.iinfo(dtype).max
            own.update({"zlib": True, "complevel": COMPRESSION_LEVEL, "shuffle": True, "chunksizes": chunks, "_FillValue": fill})
            if name in tiled:
                own.update({"complevel": TILE_LEVEL, "shuffle": False, "chunksizes": tiled[name]})
            if name in ("lat", "lon"):
                own["_FillValue"] = None
        enc[name] = own
    return enc


def open_netcdf(path, **kwargs) -> xr.Dataset:
    """``xarray.open_dataset`` with the netCDF4 backend named, so xarray does not load every installed
    backend's plugin to guess one (some take a second to import)."""
    from xarray.backends import NetCDF4BackendEntrypoint

    return xr.open_dataset(path, engine=NetCDF4BackendEntrypoint, **kwargs)


def create_netcdf(ds: xr.Dataset, staged: Path, spec, tiled: dict[str, tuple[int, int]] | None = None
                  ) -> tuple[dict, list[str]]:
    """Write a dataset's structure to ``staged``: dimensions, attributes, coordinates and scalars.

    The 2-D layers (lazy or not) are created empty, with their compression, chunking and fill value,
    for :class:`ChunkWriter` to fill. Returns the encodings and the names of the layers left to write.
    (netCDF4 directly rather than ``Dataset.to_netcdf``, which imports dask's distributed scheduler, a
    second's work, to choose a lock.)
    """
    import netCDF4

    enc = encoding(ds, spec, tiled)
    layers = [n for n, v in ds.variables.items() if v.ndim == 2]
    coordinates = " ".join(n for n in layers if n in ds.coords)
    limit_chunk_cache()
    with netCDF4.Dataset(staged, "w", format="NETCDF4") as nc:
        nc.setncatts(ds.attrs)
        for dim, size in ds.sizes.items():
            nc.createDimension(dim, size)
        for name, var in ds.variables.items():
            own = enc[name]
            fill = own.get("_FillValue")
            dtype = np.dtype(own.get("dtype", var.dtype))
            if name in layers:
                created = nc.createVariable(name, dtype, var.dims, zlib=True, complevel=own["complevel"],
                                            shuffle=own["shuffle"], chunksizes=own["chunksizes"],
                                            fill_value=False if fill is None else fill)
            else:
                created = nc.createVariable(name, dtype, var.dims, fill_value=False if fill is None else fill)
                created[...] = np.asarray(var.values, dtype=dtype)
            attrs = dict(var.attrs)
            if coordinates and name in ds.data_vars and name in layers:
                attrs["coordinates"] = coordinates
            created.setncatts(attrs)
    return enc, layers


class ChunkWriter:
    """Fills a NetCDF-4 file's empty chunked layers, compressing chunks on all cores.

    Each chunk is byte-shuffled and deflated in parallel threads (ISA-L's deflate, which releases the
    GIL) while the caller goes on, and written in order with HDF5's direct chunk write: the file's own
    shuffle + deflate filters read it back like any other NetCDF-4 file. At most a few chunks per
    thread wait to be written. The ``tiled`` layers' chunks arrive already encoded, through
    :meth:`write_encoded`; their blocks are ignored.
    """

    def __init__(self, staged: Path, spec, enc: dict, names: list[str], threads: int | None = None, tiled=()):
        import h5py

        self.enc = enc
        self.chunks = spec.chunks
        self.tiled = set(tiled)  # layers whose chunks arrive encoded (:meth:`write_encoded`)
        self.file = h5py.File(staged, "r+")
        self.datasets = {n: self.file[n] for n in names}
        self.threads = threads or os.cpu_count() or 1
        self.pool = ThreadPoolExecutor(self.threads)
        self.pending: list = []

    def write(self, name: str, r0: int, c0: int, block: np.ndarray) -> None:
        """Queue a block of layer ``name`` whose top-left cell is (r0, c0), aligned on chunk edges."""
        if name in self.tiled:
            return
        block = _encoded(block, self.enc[name])
        rows, cols = self.chunks
        fill = self.enc[name].get("_FillValue")
        for r in range(0, block.shape[0], rows):
            for c in range(0, block.shape[1], cols):
                part = block[r:r + rows, c:c + cols]
                self.pending.append((name, (r0 + r, c0 + c), self.pool.submit(_deflated, part, self.chunks, fill)))
        while len(self.pending) > 2 * self.threads:
            self._write_first()

    def write_encoded(self, name: str, ti: int, tj: int, data: bytes) -> None:
        """Store chunk (ti, tj) of layer ``name`` as given, already in the variable's filter encoding."""
        rows, cols = self.enc[name]["chunksizes"]
        self.datasets[name].id.write_direct_chunk((ti * rows, tj * cols), data)

    def _write_first(self) -> None:
        name, offset, packed = self.pending.pop(0)
        self.datasets[name].id.write_direct_chunk(offset, packed.result())

    def close(self) -> None:
        """Write what is queued and close the file."""
        try:
            while self.pending:
                self._write_first()
        finally:
            self.pool.shutdown()
            self.file.close()


def _deflated(part: np.ndarray, chunks: tuple[int, int], fill) -> bytes:
    """One chunk as HDF5 stores it with shuffle + deflate: padded to the full chunk shape, shuffled, deflated."""
    from isal import isal_zlib

    if part.shape != chunks:
        full = np.full(chunks, 0 if fill is None else fill, dtype=part.dtype)
        full[:part.shape[0], :part.shape[1]] = part
        part = full
    # HDF5's shuffle filter: byte k of every value together, for k = 0 .. itemsize - 1
    shuffled = np.ascontiguousarray(np.ascontiguousarray(part).view(np.uint8).reshape(-1, part.dtype.itemsize).T)
    return isal_zlib.compress(shuffled, COMPRESSION_LEVEL)


def write_netcdf(ds: xr.Dataset, target: Path, spec, extra_sinks=(), tiles=None, planes=None) -> Path:
    """Write a dataset to a staged file beside ``target``; returns the staged path (not yet renamed).

    The structure is written first (:func:`create_netcdf`); the 2-D layers are then computed window by
    window (:func:`agegrid.streaming.stream`; layers held in memory are cut in the grid's chunks) and
    their chunks written by :class:`ChunkWriter`. ``extra_sinks`` receive the same blocks (COG tiles,
    table samples).

    ``tiles``, a :class:`~agegrid.io.geotiff.CogWriter` among the sinks whose tiles are plain zlib
    streams, lends its full-resolution tiles to the layers it writes: they are stored as the NetCDF's
    chunks (the tiles' shape, deflate without shuffle), so each is compressed once for both files.
    ``planes``: layers the pass takes from stacked blocks (see :class:`~agegrid.streaming.Plane`).
    """
    import dask.array as da

    from agegrid.streaming import stream

    staged = staging_path(target)
    in_memory = [n for n, v in ds.variables.items() if v.ndim == 2 and not isinstance(v.data, da.Array)]
    if in_memory:
        ds = ds.copy()  # new variables around the same values
        for name in in_memory:
            ds.variables[name].data = da.from_array(ds.variables[name].data, chunks=spec.chunks)
    tiled = {}
    if tiles is not None and tiles.zlib_tiles:
        tiled = {name: (tiles.tile, tiles.tile) for name in tiles.layers if name in ds.variables}
    try:
        enc, layers = create_netcdf(ds, staged, spec, tiled)
        writer = ChunkWriter(staged, spec, enc, layers, tiled=tiled)
        if tiled:
            tiles.on_tile = writer.write_encoded
        try:
            stream(ds, layers, [writer.write, *extra_sinks], planes=planes)
            if tiled:
                tiles.drain()
        finally:
            if tiled:
                tiles.on_tile = None
            writer.close()
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


__all__ = ["dataset", "encoding", "open_netcdf", "create_netcdf", "ChunkWriter", "write_netcdf", "replace"]
