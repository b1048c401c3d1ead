"""Incremental builds: the age-engine blocks of the last build, found again by content hash.

A block's key is the SHA-256 of everything its result depends on: the agegrid version and engine
settings, the block's position, its compartment labels and domain mask, and, for each compartment in
the block, that compartment's frame and trace ages plus the slice of its trace table the block's cells
fall on (with a margin). A pick moved in one corner changes the traces only near it, so only the
blocks that see those columns get new keys and are recomputed.

Nothing extra is written for this: the last build's NetCDF already holds every block's age-stage layers,
losslessly compressed. ``<output>/.agegrid-cache/blocks.json`` records that file
(its size and modification time) and the key of each block it holds; a block whose key is unchanged is
read back from it, bit for bit. When NetCDF is not among the outputs, the file is kept in that folder.

A whole build has a fingerprint (the build file, every input's sha256, the version); a rerun with the
same fingerprint and its outputs in place does nothing.
"""
from __future__ import annotations

import hashlib
import json
from pathlib import Path

import numpy as np

from agegrid import __version__

CACHE_DIR = ".agegrid-cache"
#: The index of the last build's blocks, in the cache folder.
INDEX = "blocks.json"
#: Where the last build's NetCDF is kept when NetCDF is not among the outputs.
KEPT_NETCDF = "blocks.nc"
MARGIN_COLUMNS = 2


def fingerprint(config, input_hashes: dict[str, str]) -> str:
    """The build's fingerprint: the resolved build file, every input's sha256 and the agegrid version."""
    payload = {"agegrid": __version__, "config": config.model_dump(mode="json"), "inputs": input_hashes,
               "build_file": Path(config.source).read_text(encoding="utf-8") if config.source else ""}
    return hashlib.sha256(json.dumps(payload, sort_keys=True, default=str).encode()).hexdigest()


def input_hashes(config) -> dict[str, str]:
    """sha256 of every input file named in the build file."""
    from agegrid.manifest import sha256

    return {k: sha256(Path(p)) for k, p in config.inputs if p is not None}


def up_to_date(out_dir: Path, build_fingerprint: str) -> dict | None:
    """The previous manifest when it has this fingerprint and all its outputs are in place, else None."""
    try:
        manifest = json.loads((Path(out_dir) / "manifest.json").read_text())
    except (OSError, ValueError):
        return None
    if manifest.get("fingerprint") != build_fingerprint:
        return None
    for entry in manifest.get("outputs", []):
        target = Path(entry["path"])
        if not target.exists() or (target.is_file() and target.stat().st_size != entry["bytes"]):
            return None
    return manifest


class BlockCache:
    """The blocks of the last build, to read back the age-stage layers of those whose key is unchanged.

    When the last build's file can serve blocks, keys are computed in the driver (:meth:`plan`), so the
    workers that read blocks, threads or processes, need only the file's path, and the counts of reused and
    recomputed blocks are known before the computation starts. When it cannot (a forced build, the first
    one, another block size), a block's key is only recorded for the next build, and the tasks that compute
    the blocks in this process may record it themselves (:meth:`record`).
    """

    def __init__(self, out_dir: Path, enabled: bool = True):
        self.root = Path(out_dir) / CACHE_DIR
        self.enabled = enabled
        self.root.mkdir(parents=True, exist_ok=True)
        self.keys: dict[tuple[int, int], str] = {}
        self.blocks = 0  # the grid's block count, set by the age engine (:func:`agegrid.age.age_planes`)
        self.source: Path | None = None
        self.reusable: set[tuple[int, int]] = set()

    @property
    def reused(self) -> int:
        return len(self.reusable)

    def key(self, packed, settings, location, labels: np.ndarray, domain: np.ndarray, span) -> str:
        """The content hash of one block's inputs; ``span`` is the least and greatest trace-table column of
        each compartment's cells in the block (:func:`agegrid.age_kernel.column_span`).

        The labels and the domain are hashed whole; the model enters through the compartments that date cells
        of the block (those with a column span: cells behind a compartment's frame are never dated).
        """
        digest = hashlib.sha256()
        digest.update(f"{__version__}|{location}|{settings}".encode())
        digest.update(np.ascontiguousarray(labels))
        digest.update(np.ascontiguousarray(domain))
        least, greatest = span
        for label in np.flatnonzero(np.isfinite(least)):  # compartments with a trace model and cells here
            frame = packed.frames[label]
            nc, k = int(packed.ncol[label]), int(packed.ntrace[label])
            lo = int(np.clip(np.floor(least[label]) - MARGIN_COLUMNS, 0, nc - 1))
            hi = int(np.clip(np.ceil(greatest[label]) + MARGIN_COLUMNS, 0, nc - 1)) + 1
            v0, t0 = int(packed.voff[label]), int(packed.toff[label])
            table = packed.V[v0:v0 + k * nc].reshape(k, nc)
            dist = packed.D[v0:v0 + k * nc].reshape(k, nc)
            for part in (frame, packed.w0[label:label + 1], packed.dw[label:label + 1], packed.ncol[label:label + 1],
                         packed.ridge[label:label + 1], packed.ages[t0:t0 + k], packed.bounds[t0:t0 + k],
                         packed.sigma[t0:t0 + k], packed.support[t0:t0 + k], np.ascontiguousarray(table[:, lo:hi]),
                         np.ascontiguousarray(dist[:, lo:hi]), np.array([label, lo, hi])):
                digest.update(np.ascontiguousarray(part))
        return digest.hexdigest()

    def _last_build(self, chunks: tuple[int, int]) -> tuple[Path, dict] | None:
        """The last build's file and its blocks' keys, when it can serve blocks of this size (else None)."""
        if not self.enabled:
            return None
        try:
            record = json.loads((self.root / INDEX).read_text())
            source = self.root.parent / record["file"]
            stat = source.stat()
        except (OSError, ValueError, KeyError, TypeError):
            return None
        if [stat.st_size, stat.st_mtime_ns] != record.get("stamp") or tuple(record.get("chunks", ())) != tuple(chunks):
            return None
        return source, record.get("keys", {})

    def can_serve(self, chunks: tuple[int, int]) -> bool:
        """Whether the last build's file may hold blocks to read back (so keys are needed before computing)."""
        return self._last_build(chunks) is not None

    def plan(self, keys: dict[tuple[int, int], str], chunks: tuple[int, int]) -> None:
        """Record the key of every block, and find those the last build's file holds with the same key."""
        self.keys = keys
        last = self._last_build(chunks)
        if last is None:
            return
        self.source, previous = last
        self.reusable = {loc for loc, key in keys.items() if previous.get(f"{loc[0]},{loc[1]}") == key}

    def record(self, location: tuple[int, int], key: str) -> None:
        """Record one block's key, computed with the block (nothing is read back in such a build)."""
        self.keys[location] = key

    def load(self, location: tuple[int, int], window: tuple[slice, slice], names) -> dict | None:
        """Layers ``names`` of the block at ``location`` (cells ``window``) as the last build wrote them, or None.

        Integer layers come back as float32 with NaN where the file holds its fill value, as the age
        engine returns them.
        """
        if location not in self.reusable:
            return None
        import h5py

        layers = {}
        with h5py.File(self.source, "r") as nc:
            for name in names:
                var = nc[name]
                values = var[window]
                if values.dtype.kind in "iu":
                    fill = np.ravel(var.attrs.get("_FillValue", []))
                    values = np.where(np.isin(values, fill), np.float32(np.nan), values.astype(np.float32))
                layers[name] = values
        return layers

    def write_index(self, netcdf: Path, chunks: tuple[int, int]) -> None:
        """Record ``netcdf`` (the output's final path, once it is in place) as holding this build's blocks."""
        from agegrid.io.atomic import atomic_write_text

        stat = Path(netcdf).stat()
        record = {"file": str(Path(netcdf).relative_to(self.root.parent)), "stamp": [stat.st_size, stat.st_mtime_ns],
                  "chunks": list(chunks), "keys": {f"{i},{j}": key for (i, j), key in sorted(self.keys.items())}}
        atomic_write_text(self.root / INDEX, json.dumps(record))

    def prune(self, keep: Path | None = None) -> None:
        """Remove what is not the index or ``keep`` (block files of earlier versions of the cache)."""
        for path in self.root.iterdir():
            if path.name != INDEX and path != keep and path.is_file():
                path.unlink(missing_ok=True)

    def summary(self) -> dict:
        return {"blocks": self.blocks, "recomputed": self.blocks - self.reused, "from_cache": self.reused,
                "directory": str(self.root)}
