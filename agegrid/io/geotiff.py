"""Cloud-Optimized GeoTIFFs, one per output layer, written tile by tile as the layers stream past.

Every block a layer hands over is cut into square tiles (512 or 256 cells a side, see :func:`tile_side`). A
finished tile is encoded on a worker thread (the TIFF predictor if asked, then the codec, both releasing the
GIL) and appended to a spill file beside the target (the layer's own for the full resolution, one for every
layer's overviews), and its 2 x 2 reduction fills a quarter of a tile of the next overview level: the mean of
the valid cells for real values, the top-left cell for codes and counts. So the overviews are made in the same
pass, and memory holds only unfinished tiles. When the grid is done, each COG is assembled from its spill
files (:func:`agegrid.io.tiff.write_pyramid`) with the CRS, transform, nodata and band metadata tags GDAL
writes for such a layer.
"""
from __future__ import annotations

import contextlib
import os
import re
from collections import deque
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Callable, NamedTuple

import numba
import numpy as np
import rasterio
from rasterio.io import MemoryFile

from agegrid.io import tiff
from agegrid.io.atomic import staging_file, staging_path

#: COG tile sides, largest first: the largest that divides the grid's block side is used (GDAL's COG driver
#: writes 512 by default, from memory), so every block is cut into whole tiles; 256 when neither divides it.
TILE_SIDES = (512, 256)
#: Memory a float32 layer's unfinished overview tiles may hold: each overview level keeps a row of tiles open
#: across the grid until the blocks below them have passed, about width x side x 4 bytes over all levels
#: (the budget is agegrid's choice: 512-cell tiles up to 16,384 cells of width).
OVERVIEW_ROW_BYTES = 32 * 2**20


def tile_side(spec) -> int:
    """The COG tile side for a grid: the largest of :data:`TILE_SIDES` that divides its block side and keeps
    a layer's unfinished overview tiles within :data:`OVERVIEW_ROW_BYTES` (grids over 16,384 cells wide get
    256-cell tiles: half the memory)."""
    dividing = [side for side in TILE_SIDES if spec.chunk % side == 0] or [TILE_SIDES[-1]]
    return next((side for side in dividing if spec.shape[1] * side * 4 <= OVERVIEW_ROW_BYTES), dividing[-1])


class Codec(NamedTuple):
    """A TIFF compression: its Compression tag value and the function encoding one tile (a C-contiguous array)."""

    code: int
    encode: Callable[[np.ndarray], bytes]


#: The tiles' DEFLATE window, as zlib's window bits: 1 KiB. On the build's float tiles ISA-L's level 1 is about 19 %
#: faster with it than with the full 32 KiB window for 2 % more bytes (45 tiles of ten layers, medians of
#: seven runs); float values rarely repeat from afar. A zlib stream may declare any window up to 32 KiB
#: (RFC 1950), and inflaters (zlib, libdeflate) read every one.
DEFLATE_WINDOW_BITS = 10


def _deflate(tile: np.ndarray) -> bytes:
    from isal import isal_zlib

    return isal_zlib.compress(memoryview(tile).cast("B"), 1, DEFLATE_WINDOW_BITS)


def _zstd(tile: np.ndarray) -> bytes:
    from numcodecs import Zstd

    return Zstd(level=1).encode(tile)


#: Each ``[output] cog_compression``: the Compression tag value (from memory: 1 none and 8 Deflate from
#: TIFF 6.0 and its Deflate supplement, 50000 zstd as libtiff registers it) and the encoder. Deflate is
#: ISA-L's zlib stream at level 1 with a 1 KiB window, zstd at level 1 (sizes and times measured in the README).
CODECS = {"deflate": Codec(8, _deflate), "zstd": Codec(50000, _zstd), "none": Codec(1, np.ndarray.tobytes)}


class CogWriter:
    """Streams layers into tiled, compressed pyramids and assembles each into a COG staged beside its target.

    ``on_tile``, when set, receives every full-resolution tile as encoded: (layer, tile row, tile column,
    bytes), for a file that stores the same tiles (see :attr:`zlib_tiles`).
    """

    def __init__(self, spec, targets: dict[str, Path], attrs: dict, dtypes: dict, fills: dict,
                 compression: str = "deflate", predictor: bool = False, threads: int | None = None):
        self.codec, self.predictor = CODECS[compression], predictor
        self.threads = threads or os.cpu_count() or 1
        self.pool = ThreadPoolExecutor(self.threads)
        self.pending: deque = deque()
        self.on_tile: Callable[[str, int, int, bytes], None] | None = None
        self.tile = tile_side(spec)
        self.zlib_tiles = compression == "deflate" and not predictor and min(spec.shape) >= self.tile
        """Whether the full-resolution tiles are plain zlib streams of the values, padded with the fill to
        ``tile`` x ``tile``: byte for byte what HDF5's deflate filter stores for a chunk of that shape."""
        self.layers: dict[str, _Pyramid] = {}
        self.overviews: _Spill | None = None
        try:
            tags = georeferencing_tags(spec, {name: (np.dtype(dtypes[name]), fills[name], attrs[name])
                                              for name in targets})
            if targets:  # every layer's overview tiles in one file: a few tiles a layer
                self.overviews = _Spill(next(iter(targets.values())), ".overviews.tiles")
            for name, target in targets.items():
                self.layers[name] = _Pyramid(spec, name, target, np.dtype(dtypes[name]), fills[name], tags[name],
                                             averaged=not _is_code(attrs[name]), codec=self.codec,
                                             predictor=predictor, tile=self.tile, overviews=self.overviews)
        except BaseException:
            self.close()
            raise

    def write(self, name: str, r0: int, c0: int, block: np.ndarray) -> None:
        """Take a block of layer ``name`` whose top-left cell is (r0, c0)."""
        layer = self.layers.get(name)
        if layer is None:
            return
        if block.dtype.kind == "f" and layer.dtype.kind in "iu":
            block = np.where(np.isnan(block), layer.fill, block)
        for job in layer.place(0, r0, c0, block.astype(layer.dtype, copy=False)):
            self._submit(layer, *job)
        while len(self.pending) > 4 * self.threads:
            self._collect_first()

    def _submit(self, layer: "_Pyramid", level: int, ti: int, tj: int, tile: np.ndarray) -> None:
        reduce = level + 1 < len(layer.shapes)
        self.pending.append((layer, level, ti, tj, self.pool.submit(layer.encode, tile, reduce)))

    def _collect_first(self) -> None:
        layer, level, ti, tj, future = self.pending.popleft()
        data, reduced = future.result()
        layer.store(level, ti, tj, data)
        if level == 0 and self.on_tile is not None:
            self.on_tile(layer.name, ti, tj, data)
        if reduced is not None:
            h, w = layer.tile_extent(level, ti, tj)
            part = reduced[:-(-h // 2), :-(-w // 2)]
            for job in layer.place(level + 1, ti * self.tile // 2, tj * self.tile // 2, part):
                self._submit(layer, *job)

    def drain(self) -> None:
        """Wait for every tile handed over so far to be encoded and stored."""
        while self.pending:
            self._collect_first()

    def finish(self, on_staged: Callable[[Path], None] | None = None) -> dict[Path, Path]:
        """Encode what is left and assemble the COGs; returns {target: staged COG}.

        ``on_staged``, when given, receives each staged COG as soon as it is complete (to hash it while the
        others are assembled).
        """
        self.drain()
        if self.overviews is not None:
            self.overviews.file.flush()
        staged = {layer.target: staging_path(layer.target) for layer in self.layers.values()}

        def assemble(layer: _Pyramid) -> None:
            layer.assemble(staged[layer.target])
            if on_staged is not None:
                on_staged(staged[layer.target])

        try:
            with ThreadPoolExecutor(self.threads) as pool:  # the copies run in the kernel, without the GIL
                list(pool.map(assemble, self.layers.values()))
        except BaseException:
            for path in staged.values():
                path.unlink(missing_ok=True)
            raise
        finally:
            self.close()
        return staged

    def close(self) -> None:
        """Stop the encoders and remove the spill files (also after a failure)."""
        for *_, future in self.pending:
            future.cancel()
        self.pending.clear()
        self.pool.shutdown(wait=True)
        for layer in self.layers.values():
            layer.discard()
        if self.overviews is not None:
            self.overviews.discard()


def _is_code(attrs: dict) -> bool:
    """Whether a layer holds codes or counts, whose overviews take a cell's value, not a mean."""
    return str(attrs.get("units", "")) == "1" or "flag_values" in attrs


class _Spill:
    """An append-only file of encoded tiles beside the targets, its length kept as it grows (not a tell(), a
    system call, per tile)."""

    def __init__(self, target: Path, suffix: str):
        self.path, self.file = staging_file(target, suffix)
        self.end = 0

    def append(self, data: bytes) -> int:
        """Write ``data`` at the end; returns where it starts."""
        start = self.end
        self.file.write(data)
        self.end += len(data)
        return start

    def discard(self) -> None:
        """Close and remove the file."""
        self.file.close()
        self.path.unlink(missing_ok=True)


class _Pyramid:
    """One layer's levels: unfinished tiles, where its encoded tiles are, and the TIFF tags.

    The full resolution's tiles have a spill file of their own, which becomes the COG (see
    :func:`agegrid.io.tiff.write_pyramid`); the overviews' go to ``overviews``, shared by the layers.
    """

    def __init__(self, spec, name: str, target: Path, dtype: np.dtype, fill, georeferencing: dict[int, tiff.Tag],
                 averaged: bool, codec: Codec, predictor: bool, tile: int, overviews: _Spill):
        self.name, self.target, self.dtype, self.fill = name, target, dtype.newbyteorder("<"), fill
        self.tile = tile
        self.averaged, self.codec, self.predictor = averaged, codec, predictor
        self.georeferencing = georeferencing
        self.shapes = [tuple(spec.shape)]
        while max(self.shapes[-1]) > self.tile:  # halve until the overview fits one tile
            self.shapes.append(tuple(-(-n // 2) for n in self.shapes[-1]))
        self.open: list[dict] = [{} for _ in self.shapes]
        self.offsets, self.counts = [], []
        for shape in self.shapes:
            tiles = -(-shape[0] // self.tile) * -(-shape[1] // self.tile)
            self.offsets.append(np.full(tiles, -1, dtype=np.int64))
            self.counts.append(np.zeros(tiles, dtype=np.int64))
        self.spills = [_Spill(target, ".level0.tiles")] + [overviews] * (len(self.shapes) - 1)

    def tile_extent(self, level: int, ti: int, tj: int) -> tuple[int, int]:
        """Rows and columns of tile (ti, tj) of ``level`` inside the image."""
        ny, nx = self.shapes[level]
        return min(self.tile, ny - ti * self.tile), min(self.tile, nx - tj * self.tile)

    def place(self, level: int, r0: int, c0: int, values: np.ndarray):
        """Copy ``values`` (top-left cell at (r0, c0) of ``level``) into its tiles; yields the finished ones
        as (level, ti, tj, tile)."""
        h, w = values.shape
        for ti in range(r0 // self.tile, (r0 + h - 1) // self.tile + 1):
            for tj in range(c0 // self.tile, (c0 + w - 1) // self.tile + 1):
                top, left = ti * self.tile, tj * self.tile
                rs = slice(max(r0, top), min(r0 + h, top + self.tile))
                cs = slice(max(c0, left), min(c0 + w, left + self.tile))
                if rs.stop - rs.start == cs.stop - cs.start == self.tile:  # a whole tile: no copy here
                    yield level, ti, tj, values[rs.start - r0:rs.stop - r0, cs.start - c0:cs.stop - c0]
                    continue
                th, tw = self.tile_extent(level, ti, tj)
                entry = self.open[level].get((ti, tj))
                if entry is None:  # the image's part of a tile is written whole before it is finished
                    blank = np.empty((self.tile, self.tile), dtype=self.dtype)
                    blank[th:] = self.fill  # the part past the image's edge: the fill
                    blank[:th, tw:] = self.fill
                    entry = self.open[level][(ti, tj)] = [blank, 0]
                entry[0][rs.start - top:rs.stop - top, cs.start - left:cs.stop - left] = \
                    values[rs.start - r0:rs.stop - r0, cs.start - c0:cs.stop - c0]
                entry[1] += (rs.stop - rs.start) * (cs.stop - cs.start)
                if entry[1] >= th * tw:
                    del self.open[level][(ti, tj)]
                    yield level, ti, tj, entry[0]

    def encode(self, tile: np.ndarray, reduce: bool) -> tuple[bytes, np.ndarray | None]:
        """A tile's encoded bytes and, if asked, its 2 x 2 reduction for the next level."""
        tile = np.ascontiguousarray(tile)
        data = _predicted(tile) if self.predictor else tile
        return self.codec.encode(data), (self._reduced(tile) if reduce else None)

    def _reduced(self, tile: np.ndarray) -> np.ndarray:
        if not self.averaged:
            return tile[::2, ::2].copy()
        fill = np.nan if self.fill is None else float(self.fill)
        return _mean_of_valid_2x2(tile, fill)

    def store(self, level: int, ti: int, tj: int, data: bytes) -> None:
        """Append an encoded tile to its level's spill file."""
        k = ti * -(-self.shapes[level][1] // self.tile) + tj
        self.offsets[level][k], self.counts[level][k] = self.spills[level].append(data), len(data)

    def assemble(self, staged: Path) -> None:
        """Write the COG to ``staged`` from the spill files."""
        for level, offsets in enumerate(self.offsets):
            if (offsets < 0).any():
                raise RuntimeError(f"{self.target.name}: level {level} has tiles never written")
        self.spills[0].file.flush()  # the overviews' file is flushed once, by the writer
        tiff.write_pyramid(staged, [tiff.Level(self._tags(level), self.spills[level].path, self.offsets[level],
                                               self.counts[level]) for level in range(len(self.shapes))])

    def _tags(self, level: int) -> dict[int, tiff.Tag]:
        ny, nx = self.shapes[level]
        S, L = tiff.SHORT, tiff.LONG
        tags = {tiff.IMAGE_WIDTH: tiff.Tag.of(L, nx), tiff.IMAGE_LENGTH: tiff.Tag.of(L, ny),
                tiff.BITS_PER_SAMPLE: tiff.Tag.of(S, 8 * self.dtype.itemsize),
                tiff.COMPRESSION: tiff.Tag.of(S, self.codec.code), tiff.PHOTOMETRIC: tiff.Tag.of(S, 1),
                tiff.SAMPLES_PER_PIXEL: tiff.Tag.of(S, 1), tiff.PLANAR_CONFIGURATION: tiff.Tag.of(S, 1),
                tiff.TILE_WIDTH: tiff.Tag.of(S, self.tile), tiff.TILE_LENGTH: tiff.Tag.of(S, self.tile),
                tiff.SAMPLE_FORMAT: tiff.Tag.of(S, tiff.SAMPLE_FORMATS[self.dtype.kind])}
        if self.predictor:  # TIFF's floating-point predictor (3) for reals, horizontal differencing (2) for integers
            tags[tiff.PREDICTOR] = tiff.Tag.of(S, 3 if self.dtype.kind == "f" else 2)
        if level:
            tags[tiff.NEW_SUBFILE_TYPE] = tiff.Tag.of(L, 1)  # a reduced-resolution version of the image
            tags.update({code: self.georeferencing[code] for code in (GDAL_NODATA,) if code in self.georeferencing})
        else:
            tags.update(self.georeferencing)
        return tags

    def discard(self) -> None:
        """Close and remove the full resolution's spill file (the writer removes the overviews')."""
        self.spills[0].discard()


@numba.njit(cache=True, nogil=True, error_model="numpy")
def _mean_of_valid_2x2(tile, fill):
    """Each 2 x 2 cell group's mean over its valid cells (neither NaN nor ``fill``); ``fill`` where none is.
    Written without branches so that the compiler vectorises it (15 % faster than the same sum with branches,
    bit for bit the same values)."""
    rows, cols = tile.shape[0] // 2, tile.shape[1] // 2
    out = np.empty((rows, cols), dtype=tile.dtype)
    for i in range(rows):
        top, bottom, reduced = tile[2 * i], tile[2 * i + 1], out[i]
        for j in range(cols):
            a, b = np.float64(top[2 * j]), np.float64(top[2 * j + 1])
            c, d = np.float64(bottom[2 * j]), np.float64(bottom[2 * j + 1])
            va, vb = (a == a) & (a != fill), (b == b) & (b != fill)
            vc, vd = (c == c) & (c != fill), (d == d) & (d != fill)
            total = (((0.0 + (a if va else 0.0)) + (b if vb else 0.0)) + (c if vc else 0.0)) + (d if vd else 0.0)
            count = np.float64(va) + np.float64(vb) + np.float64(vc) + np.float64(vd)
            mean = total / count
            reduced[j] = mean if count > 0 else fill
    return out


def _predicted(tile: np.ndarray) -> np.ndarray:
    """A tile through the TIFF predictor: horizontal differencing of integers (TIFF 6.0 section 14), or of
    the bytes of reals rearranged most significant byte first (Adobe's TIFF Technical Note 3); both from
    memory, checked by GDAL decoding the tiles bit for bit in the tests."""
    if tile.dtype.kind == "f":
        rows = tile.shape[0]
        tile = tile.view(np.uint8).reshape(rows, -1, tile.itemsize)[:, :, ::-1].transpose(0, 2, 1).reshape(rows, -1)
    out = np.empty_like(tile)
    out[:, 0] = tile[:, 0]
    np.subtract(tile[:, 1:], tile[:, :-1], out=out[:, 1:])
    return out


#: GDAL's private TIFF tags: band metadata as XML, and the nodata value as text.
GDAL_METADATA, GDAL_NODATA = 42112, 42113
#: The tags copied from GDAL's own GeoTIFF of the layer: GeoTIFF 1.1's ModelPixelScale, ModelTiepoint,
#: ModelTransformation and GeoKey directory with its double and ASCII parameters, and GDAL's two tags.
COPIED_TAGS = (33550, 33922, 34264, 34735, 34736, 34737, GDAL_METADATA, GDAL_NODATA)


def georeferencing_tags(spec, layers: dict[str, tuple[np.dtype, object, dict]]) -> dict[str, dict[int, tiff.Tag]]:
    """The CRS, transform, nodata and band-metadata tags of each layer (name: (type, fill, attributes)), as GDAL
    writes them in a GeoTIFF of that layer alone.

    GDAL writes one one-cell GeoTIFF per type and fill, with a band per layer of that kind: its georeferencing
    and nodata tags hold for any grid size (the transform's origin is the top-left corner), and each layer
    takes its band's items of the metadata, numbered as the first band (one file per kind rather than per
    layer: 1 ms instead of 20 for a build's layers; tested byte for byte against a file per layer).
    """
    crs = rasterio.crs.CRS.from_wkt(spec.pyproj_crs.to_wkt())
    kinds: dict[tuple, list[str]] = {}
    for name, (dtype, fill, _) in layers.items():
        kinds.setdefault((np.dtype(dtype).newbyteorder("<").str, repr(fill)), []).append(name)
    out = {}
    with rasterio.Env():
        for names in kinds.values():
            dtype, fill, _ = layers[names[0]]
            with MemoryFile() as memory:
                with memory.open(driver="GTiff", width=1, height=1, count=len(names), dtype=np.dtype(dtype).name,
                                 crs=crs, transform=spec.transform, nodata=fill) as bands:
                    for band, name in enumerate(names, 1):
                        attrs = layers[name][2]
                        bands.set_band_description(band, str(attrs.get("long_name", name)))
                        bands.update_tags(band, **{k: str(v) for k, v in attrs.items()})
                        if attrs.get("units"):
                            bands.set_band_unit(band, str(attrs["units"]))
                tags = tiff.read_tags(memory.read())
            shared = {code: tags[code] for code in COPIED_TAGS if code in tags and code != GDAL_METADATA}
            items = _metadata_items(tags[GDAL_METADATA].raw) if GDAL_METADATA in tags else {}
            for band, name in enumerate(names):
                out[name] = dict(shared)
                if items.get(band):
                    text = b"<GDALMetadata>\n%s</GDALMetadata>\n\0" % b"".join(b"  %s\n" % item for item in items[band])
                    out[name][GDAL_METADATA] = tiff.Tag(tiff.ASCII, len(text), text)
    return out


def _metadata_items(raw: bytes) -> dict[int, list[bytes]]:
    """The items of GDAL's metadata XML by band (0 first), each renumbered as band 0, as GDAL wrote them."""
    items: dict[int, list[bytes]] = {}
    for match in re.finditer(rb'<Item name="[^"]*" sample="(\d+)"[^>]*>.*?</Item>', raw, re.S):
        band = int(match.group(1))
        item = match.group(0)
        items.setdefault(band, []).append(item.replace(b' sample="%d"' % band, b' sample="0"', 1))
    return items
