"""TIFF file structure: the tags of a small TIFF, and a tiled image pyramid written with its IFDs first.

The writer lays a file out the cloud-optimized way: header, the IFD of the full resolution and of
each overview in that order (each followed by its tag values), then the tiles, those of the smallest
overview first and the full resolution's last, each level's row by row; the full resolution's tiles start
at a multiple of :data:`ALIGNMENT` bytes (zeros in between). Tiles come already encoded, from a file per
level holding them in any order; the file is classic TIFF when it fits in 4 GiB, BigTIFF when not.

When the full resolution's file holds its tiles in row order, everything before them is inserted in
front of them in place (Linux's ``fallocate`` with ``FALLOC_FL_INSERT_RANGE``, on file systems that have
it: ext4, XFS) and that file becomes the TIFF, so the bulk of the image is never copied; elsewhere the
tiles are copied. Both ways give the same bytes.
Byte order is little-endian throughout. Layout from the TIFF 6.0 specification and the BigTIFF
proposal (both from memory: header, IFD entry and type sizes).
"""
from __future__ import annotations

import ctypes
import os
import struct
from dataclasses import dataclass, field
from pathlib import Path
from typing import NamedTuple

import numpy as np

#: The full resolution's tiles start at a multiple of this many bytes, a file-system block, so that the
#: header, the IFDs and the overviews can be inserted in front of them in place.
ALIGNMENT = 4096
#: ``fallocate`` mode inserting a range of zeros into a file (linux/falloc.h; value from memory, checked by
#: the test that compares the file written in place with the one copied).
FALLOC_FL_INSERT_RANGE = 0x20

#: TIFF field types used here and their sizes in bytes (TIFF 6.0 section 2; LONG8 from BigTIFF).
BYTE, ASCII, SHORT, LONG, RATIONAL, SBYTE, UNDEFINED, SSHORT, SLONG, SRATIONAL, FLOAT, DOUBLE = range(1, 13)
LONG8 = 16
TYPE_SIZES = {BYTE: 1, ASCII: 1, SHORT: 2, LONG: 4, RATIONAL: 8, SBYTE: 1, UNDEFINED: 1, SSHORT: 2, SLONG: 4,
              SRATIONAL: 8, FLOAT: 4, DOUBLE: 8, LONG8: 8, 17: 8, 18: 8}
#: Tags (TIFF 6.0): the structure of a tiled, single-band image.
NEW_SUBFILE_TYPE, IMAGE_WIDTH, IMAGE_LENGTH, BITS_PER_SAMPLE, COMPRESSION, PHOTOMETRIC = 254, 256, 257, 258, 259, 262
SAMPLES_PER_PIXEL, PLANAR_CONFIGURATION, PREDICTOR = 277, 284, 317
TILE_WIDTH, TILE_LENGTH, TILE_OFFSETS, TILE_BYTE_COUNTS, SAMPLE_FORMAT = 322, 323, 324, 325, 339
#: SampleFormat values: unsigned integer, signed integer, IEEE floating point.
SAMPLE_FORMATS = {"u": 1, "i": 2, "f": 3}


class Tag(NamedTuple):
    """One IFD entry: field type, value count and the value's little-endian bytes."""

    type: int
    count: int
    raw: bytes

    @classmethod
    def of(cls, type_: int, values) -> "Tag":
        """A numeric tag from a value or sequence of values."""
        values = np.atleast_1d(np.asarray(values))
        code = {SHORT: "<u2", LONG: "<u4", LONG8: "<u8", DOUBLE: "<f8"}[type_]
        return cls(type_, values.size, values.astype(code).tobytes())


def read_tags(data: bytes) -> dict[int, Tag]:
    """The tags of the first IFD of a classic little-endian TIFF held in memory."""
    if data[:4] != b"II*\x00":
        raise ValueError("not a classic little-endian TIFF")
    (offset,) = struct.unpack_from("<I", data, 4)
    (count,) = struct.unpack_from("<H", data, offset)
    tags = {}
    for k in range(count):
        entry = offset + 2 + 12 * k
        code, type_, n, pointer = struct.unpack_from("<HHII", data, entry)
        size = TYPE_SIZES[type_] * n
        start = entry + 8 if size <= 4 else pointer
        tags[code] = Tag(type_, n, bytes(data[start:start + size]))
    return tags


@dataclass
class Level:
    """One resolution of the pyramid: its tags (without tile offsets and byte counts), and where its
    encoded tiles are: in ``spill``, tile k at ``offsets[k]`` with ``counts[k]`` bytes, tiles numbered row by
    row as TIFF numbers them."""

    tags: dict[int, Tag]
    spill: Path
    offsets: np.ndarray = field(repr=False)
    counts: np.ndarray = field(repr=False)


def write_pyramid(target: Path, levels: list[Level], bigtiff: bool | None = None) -> None:
    """Write ``levels`` (full resolution first) to ``target``: header, all IFDs, then the tiles, smallest level's
    first; the full resolution's file is renamed to ``target`` when its tiles could stay where they are.

    ``bigtiff`` None chooses classic TIFF when the file fits in 4 GiB and BigTIFF when not.
    """
    full = levels[0]
    full_bytes = int(full.counts.sum())
    for big in ((False, True) if bigtiff is None else (bigtiff,)):
        ifds, full_start = _layout(levels, big)
        if big or full_start + full_bytes < 2**32:
            break
    else:
        raise ValueError(f"{target.name}: {full_start + full_bytes} bytes do not fit in a classic TIFF")
    header = b"II" + (struct.pack("<HHHQ", 43, 8, 0, 16) if big else struct.pack("<HI", 42, 8))
    in_row_order = np.array_equal(full.offsets, np.cumsum(full.counts) - full.counts)
    if in_row_order and _insert_front(full.spill, full_start):
        with open(full.spill, "r+b", buffering=0) as out:
            _write_front(out, header, ifds, levels)
        os.replace(full.spill, target)
        return
    with open(target, "wb", buffering=0) as out:
        _write_front(out, header, ifds, levels)
        out.write(b"\0" * (full_start - out.tell()))
        with open(full.spill, "rb") as spill:
            _copy(spill, out, full.offsets, full.counts)


def _write_front(out, header: bytes, ifds: list[bytes], levels: list[Level]) -> None:
    """Header, IFDs and the overviews' tiles, from the start of ``out`` (unbuffered)."""
    out.seek(0)
    out.write(header + b"".join(ifds))
    for level in reversed(levels[1:]):
        with open(level.spill, "rb") as spill:
            _copy(spill, out, level.offsets, level.counts)


def _insert_front(path: Path, length: int) -> bool:
    """Insert ``length`` zero bytes at the start of a file in place; False where the system or the file system
    cannot (``length`` a multiple of :data:`ALIGNMENT`, which must also be a multiple of its block size)."""
    try:
        fallocate = ctypes.CDLL(None, use_errno=True).fallocate
    except (OSError, AttributeError):
        return False
    fallocate.argtypes = [ctypes.c_int, ctypes.c_int, ctypes.c_int64, ctypes.c_int64]
    fd = os.open(path, os.O_RDWR)
    try:
        return fallocate(fd, FALLOC_FL_INSERT_RANGE, 0, length) == 0
    finally:
        os.close(fd)


def _layout(levels: list[Level], big: bool) -> tuple[list[bytes], int]:
    """The encoded IFDs (offsets resolved) and where the full resolution's tiles start."""
    header = 16 if big else 8
    sizes = [_ifd_size(level, big) for level in levels]
    ifd_offsets = list(np.cumsum([header] + sizes[:-1]))
    data_offsets, position = {}, header + sum(sizes)
    for index in reversed(range(1, len(levels))):
        data_offsets[index] = position
        position += int(levels[index].counts.sum())
    data_offsets[0] = -(-position // ALIGNMENT) * ALIGNMENT
    ifds = []
    for index, level in enumerate(levels):
        tags = dict(level.tags)
        placed = data_offsets[index] + np.cumsum(level.counts) - level.counts
        tags[TILE_OFFSETS] = Tag.of(LONG8 if big else LONG, placed)
        tags[TILE_BYTE_COUNTS] = Tag.of(LONG, level.counts)
        following = ifd_offsets[index + 1] if index + 1 < len(levels) else 0
        ifds.append(_encode_ifd(tags, int(ifd_offsets[index]), int(following), big))
    return ifds, data_offsets[0]


def _ifd_size(level: Level, big: bool) -> int:
    tiles = level.offsets.size
    tags = dict(level.tags)
    tags[TILE_OFFSETS] = Tag(LONG8 if big else LONG, tiles, b"\0" * (8 if big else 4) * tiles)
    tags[TILE_BYTE_COUNTS] = Tag(LONG, tiles, b"\0" * 4 * tiles)
    return len(_encode_ifd(tags, 0, 0, big))


def _encode_ifd(tags: dict[int, Tag], offset: int, following: int, big: bool) -> bytes:
    """An IFD at ``offset`` followed by its values too long to sit in their entries (word-aligned)."""
    entry_size, inline = (20, 8) if big else (12, 4)
    head = 8 if big else 2
    values_start = offset + head + entry_size * len(tags) + inline
    entries, values = [], bytearray()
    for code in sorted(tags):
        tag = tags[code]
        if len(tag.raw) <= inline:
            field_ = tag.raw.ljust(inline, b"\0")
        else:
            if len(values) % 2:
                values += b"\0"
            pointer = values_start + len(values)
            field_ = struct.pack("<Q" if big else "<I", pointer)
            values += tag.raw
        entries.append(struct.pack("<HHQ" if big else "<HHI", code, tag.type, tag.count) + field_)
    count = struct.pack("<Q" if big else "<H", len(tags))
    block = count + b"".join(entries) + struct.pack("<Q" if big else "<I", following) + bytes(values)
    return block + b"\0" * (len(block) % 2)


def _copy(source, out, offsets: np.ndarray, counts: np.ndarray) -> None:
    """Append the byte ranges (``offsets``, ``counts``) of ``source`` to ``out``, in the kernel where it can."""
    for offset, count in zip(offsets.tolist(), counts.tolist()):
        while count:
            try:
                done = os.copy_file_range(source.fileno(), out.fileno(), count, offset)
            except (AttributeError, OSError):  # a system or file system without it
                source.seek(offset)
                done = os.write(out.fileno(), source.read(count))
            if not done:
                raise OSError(f"{source.name}: {count} bytes short at {offset}")
            offset, count = offset + done, count - done
