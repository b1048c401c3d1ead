"""Incremental builds: a content-addressed cache of age-engine blocks in the output directory.

A block's key is the SHA-256 of everything its result depends on: the agegrid version and engine
settings, the block's position, its compartment labels and domain mask, and, for each compartment in
the block, that compartment's frame and trace ages plus the slice of its trace table the block's cells
fall on (with a margin). A pick moved in one corner changes the traces only near it, so only the
blocks that see those columns get new keys and are recomputed; every other block is read back, bit
for bit, from ``<output>/.agegrid-cache/``.

A whole build has a fingerprint (the build file, every input's sha256, the version); a rerun with the
same fingerprint and its outputs in place does nothing.
"""
from __future__ import annotations

import hashlib
import json
import os
import threading
from pathlib import Path

import numpy as np

from agegrid import __version__

CACHE_DIR = ".agegrid-cache"
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
    """Block results keyed by content hash, stored as ``.npy`` files under the output directory.

    Keys are computed in the driver (:meth:`plan`), so the workers that load or store blocks, threads or
    processes, need only the folder; the counts of reused and recomputed blocks are known before the
    computation starts.
    """

    def __init__(self, out_dir: Path, enabled: bool = True):
        self.root = Path(out_dir) / CACHE_DIR
        self.enabled = enabled
        self.root.mkdir(parents=True, exist_ok=True)
        self.keys: dict[tuple[int, int], str] = {}
        self.reused = 0

    def key(self, packed, settings, location, labels: np.ndarray, domain: np.ndarray, xyz) -> str:
        """The content hash of one block's inputs."""
        digest = hashlib.sha256()
        digest.update(f"{__version__}|{location}|{settings}".encode())
        digest.update(np.ascontiguousarray(labels).tobytes())
        digest.update(np.ascontiguousarray(domain).tobytes())
        x, y, z = xyz
        present = np.flatnonzero(np.bincount(np.maximum(labels, 0).ravel()))  # the labels in the block, sorted
        for label in present:
            if label <= 0 or label >= len(packed.has) or not packed.has[label]:
                continue
            sel = labels == label
            frame = packed.frames[label]
            xc = x[sel] * frame[0, 0] + y[sel] * frame[0, 1] + z[sel] * frame[0, 2]
            xe = x[sel] * frame[1, 0] + y[sel] * frame[1, 1] + z[sel] * frame[1, 2]
            with np.errstate(invalid="ignore", divide="ignore"):
                col = (np.where(xc > 0.17, xe / xc, np.nan) - packed.w0[label]) / packed.dw[label]
            nc, k = int(packed.ncol[label]), int(packed.ntrace[label])
            lo = int(np.clip(np.floor(np.nanmin(col, initial=0.0)) - MARGIN_COLUMNS, 0, nc - 1))
            hi = int(np.clip(np.ceil(np.nanmax(col, initial=0.0)) + MARGIN_COLUMNS, 0, nc - 1)) + 1
            v0, t0 = int(packed.voff[label]), int(packed.toff[label])
            table = packed.V[v0:v0 + k * nc].reshape(k, nc)
            dist = packed.D[v0:v0 + k * nc].reshape(k, nc)
            for part in (frame, packed.w0[label:label + 1], packed.dw[label:label + 1], packed.ncol[label:label + 1],
                         packed.ridge[label:label + 1], packed.ages[t0:t0 + k], packed.bounds[t0:t0 + k],
                         packed.sigma[t0:t0 + k], packed.support[t0:t0 + k], np.ascontiguousarray(table[:, lo:hi]),
                         np.ascontiguousarray(dist[:, lo:hi]), np.array([label, lo, hi])):
                digest.update(np.ascontiguousarray(part).tobytes())
        return digest.hexdigest()

    def plan(self, keys: dict[tuple[int, int], str]) -> None:
        """Record the key of every block and count those whose age (the dating part) is already stored."""
        self.keys = keys
        self.reused = sum(1 for k in keys.values() if self.enabled and self.path(k, "dating").is_file())

    def path(self, key: str, part: str) -> Path:
        """The file of one part (see :data:`agegrid.age_kernel.PARTS`) of the block with this key."""
        return self.root / f"{key}-{part}.npy"

    def load(self, key: str, part: str) -> np.ndarray | None:
        """A stored part of a block, or None (also when the cache is disabled by ``--force``)."""
        if not self.enabled:
            return None
        try:
            return np.load(self.path(key, part), allow_pickle=False)
        except (OSError, ValueError):
            return None

    def store(self, key: str, result: np.ndarray, part: str) -> None:
        """Store a part of a block atomically (temporary file, then rename)."""
        path = self.path(key, part)
        tmp = path.with_name(f".{path.stem}.{os.getpid()}.{threading.get_ident()}.tmp")
        with open(tmp, "wb") as fh:
            np.save(fh, result, allow_pickle=False)
        os.replace(tmp, path)

    def prune(self) -> int:
        """Remove entries the last build did not use; returns how many."""
        used = set(self.keys.values())
        removed = 0
        for path in self.root.glob("*.npy"):
            if path.stem.rsplit("-", 1)[0] not in used:
                path.unlink(missing_ok=True)
                removed += 1
        for path in self.root.glob(".*.tmp"):
            path.unlink(missing_ok=True)
        return removed

    def summary(self) -> dict:
        return {"blocks": len(self.keys), "recomputed": len(self.keys) - self.reused, "from_cache": self.reused,
                "directory": str(self.root)}
