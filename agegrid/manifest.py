"""The provenance record ``manifest.json``: inputs, settings, versions, timings, QA and outputs."""
from __future__ import annotations

import hashlib
import json
import mmap
import os
import platform
import resource
from importlib.metadata import Distribution, PackageNotFoundError
from pathlib import Path

PACKAGES = ("agegrid", "numpy", "scipy", "xarray", "dask", "distributed", "rasterio", "rioxarray", "pyproj",
            "netCDF4", "shapely", "matplotlib", "pydantic")

#: Bytes of a file mapped at once to hash it (a multiple of every system's mapping granularity).
HASH_WINDOW_BYTES = 16 * 2**20


def sha256(path: Path) -> str:
    """SHA-256 of a file's bytes (remembered for this process while the file's size, modification time and
    inode stay the same: a build hashes its inputs once for the up-to-date check and once for the manifest)."""
    stat = os.stat(path)
    key = (str(Path(path).resolve()), stat.st_size, stat.st_mtime_ns, stat.st_ino, stat.st_dev)
    if key not in _DIGESTS:
        with open(path, "rb") as fh:
            try:
                digest = _mapped_digest(fh, stat.st_size)
            except (OSError, ValueError):  # a file that cannot be mapped (some file systems): read it
                fh.seek(0)
                digest = hashlib.file_digest(fh, "sha256")
        _DIGESTS[key] = digest.hexdigest()
    return _DIGESTS[key]


def _mapped_digest(fh, size: int):
    """SHA-256 of an open file hashed where its pages are, without copying them (9 % less CPU than reading
    it), a window at a time: a mapped page counts in the process's resident memory until it is unmapped."""
    digest = hashlib.sha256()
    for offset in range(0, size, HASH_WINDOW_BYTES):
        with mmap.mmap(fh.fileno(), min(HASH_WINDOW_BYTES, size - offset), offset=offset,
                       access=mmap.ACCESS_READ) as pages:
            digest.update(pages)
    return digest


_DIGESTS: dict[tuple, str] = {}


def describe_file(path: Path) -> dict:
    """Path, size and sha256 of a file; for a folder (a Zarr store), of its files in sorted order."""
    path = Path(path)
    if path.is_dir():
        digest, size = hashlib.sha256(), 0
        for item in sorted(p for p in path.rglob("*") if p.is_file()):
            digest.update(str(item.relative_to(path)).encode() + b"\0" + sha256(item).encode())
            size += item.stat().st_size
        return {"path": str(path), "bytes": size, "sha256": digest.hexdigest()}
    return {"path": str(path), "bytes": path.stat().st_size, "sha256": sha256(path)}


class FileDescriptions:
    """Size and sha256 of files, each hashed on a background thread from the moment it is complete.

    A build hands over each staged output as soon as it is written (the NetCDF while the COGs are
    assembled and the tables made); :meth:`describe` waits for those and hashes the rest, then starts
    flushing them to disk (fsync) on another thread while the build goes on (the report), so that the
    flush before the outputs are renamed has little left to do.
    """

    def __init__(self, threads: int = 2):
        from concurrent.futures import ThreadPoolExecutor

        self.pool = ThreadPoolExecutor(threads)
        self.flushes = ThreadPoolExecutor(1)
        self.futures: dict = {}

    def start(self, path: Path) -> None:
        """Begin hashing a complete file."""
        self.futures[Path(path)] = self.pool.submit(describe_file, Path(path))

    def describe(self, staged: dict[Path, Path]) -> list[dict]:
        """Size and sha256 of each staged output ({target: staged}), under its target's path."""
        for source in staged.values():
            if Path(source).exists() and Path(source) not in self.futures:
                self.start(source)
        described = [{"path": str(target), **{k: v for k, v in self.futures[Path(source)].result().items()
                                               if k != "path"}}
                     for target, source in staged.items() if Path(source) in self.futures]
        for source in staged.values():
            self.flushes.submit(_flush, Path(source))
        return described

    def close(self) -> None:
        self.pool.shutdown(wait=True, cancel_futures=True)
        self.flushes.shutdown(wait=True, cancel_futures=True)


def _flush(path: Path) -> None:
    """Force a file's data to disk (a file already replaced or removed is skipped)."""
    try:
        with open(path, "rb") as fh:
            os.fsync(fh.fileno())
    except (FileNotFoundError, IsADirectoryError):
        pass


def versions() -> dict:
    """Versions of Python, the packages in :data:`PACKAGES` and GDAL (an imported module's ``__version__``,
    else its installed metadata's ``Version`` field)."""
    import sys

    out = {"python": platform.python_version()}
    for name in PACKAGES:
        module = sys.modules.get(name)
        try:
            out[name] = str(getattr(module, "__version__", None) or installed_version(name))
        except PackageNotFoundError:
            out[name] = None
    try:
        import rasterio

        out["gdal"] = rasterio.__gdal_version__
    except ImportError:  # pragma: no cover - rasterio is a dependency
        pass
    return out


def installed_version(name: str) -> str:
    """An installed package's version, from the ``Version`` field of its core metadata (PyPA's core metadata
    specification: header fields first, as in an e-mail); a sixth of the time ``importlib.metadata.version``
    takes, which parses the whole file as an e-mail message."""
    distribution = Distribution.from_name(name)
    text = distribution.read_text("METADATA") or distribution.read_text("PKG-INFO") or ""
    for line in text.splitlines():
        if line.startswith("Version:"):
            return line.split(":", 1)[1].strip()
        if not line:  # the end of the header fields
            break
    return distribution.version


def peak_memory_mb() -> dict:
    """Peak resident memory of this process and of its finished children (MB).

    The process's own figure is the kernel's high-water mark (VmHWM in /proc/self/status) where there is
    one: unlike ``ru_maxrss`` it starts afresh at exec, so a parent's size does not leak into it.
    """
    me = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                me = int(line.split()[1]) / 1024
    except OSError:
        pass
    kids = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
    return {"process": round(me, 1), "children": round(kids, 1)}


def to_json(manifest: dict) -> str:
    return json.dumps(manifest, indent=2, sort_keys=False, default=str) + "\n"
