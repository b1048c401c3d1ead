"""Atomic replacement of outputs: write beside the target, then rename, only on success."""
from __future__ import annotations

import contextlib
import os
import shutil
import tempfile
from pathlib import Path

#: Prefix of the temporary files and folders a build stages its outputs in.
STAGING_PREFIX = ".agegrid-tmp-"


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


#: Permissions of a new output, as ``open`` would give it (mkstemp's own are owner-only).
OUTPUT_MODE = 0o666 & ~_umask()


def staging_file(target: Path, suffix: str | None = None):
    """A fresh temporary file in the target's folder (same file system, so rename is atomic), open for reading
    and writing: (path, binary file)."""
    target.parent.mkdir(parents=True, exist_ok=True)
    fd, name = tempfile.mkstemp(prefix=STAGING_PREFIX, suffix=target.suffix if suffix is None else suffix,
                                dir=target.parent)
    os.fchmod(fd, OUTPUT_MODE)  # staged files may be renamed to an output: readable as any file the user writes
    return Path(name), os.fdopen(fd, "w+b")


def staging_path(target: Path) -> Path:
    """A fresh temporary name in the target's folder, for a writer that creates the file (or folder) itself."""
    path, file = staging_file(target)
    file.close()
    path.unlink()
    return path


def replace(staged: Path, target: Path) -> None:
    """Move a staged file or folder over the target in one rename (folders: swap, then remove old)."""
    if staged.is_dir():
        old = None
        if target.exists():
            old = staging_path(target)
            os.replace(target, old)
        os.replace(staged, target)
        if old is not None:
            shutil.rmtree(old, ignore_errors=True)
    else:
        with open(staged, "rb") as fh:
            os.fsync(fh.fileno())
        os.replace(staged, target)


def replace_all(staged: dict[Path, Path], threads: int = 4) -> None:
    """Move staged outputs ({target: staged}) over their targets: all files flushed to disk first, on
    several threads (the file system overlaps the flushes), then renamed one by one."""
    from concurrent.futures import ThreadPoolExecutor

    def flush(path: Path) -> None:
        with open(path, "rb") as fh:
            os.fsync(fh.fileno())

    with ThreadPoolExecutor(threads) as pool:
        list(pool.map(flush, [s for s in staged.values() if not s.is_dir()]))
    for target, source in staged.items():
        if source.is_dir():
            replace(source, target)
        else:
            os.replace(source, target)


def atomic_write_text(target: Path, text: str) -> None:
    """Write a text file atomically."""
    staged = staging_path(Path(target))
    try:
        staged.write_text(text, encoding="utf-8")
        replace(staged, Path(target))
    finally:
        with contextlib.suppress(FileNotFoundError):
            staged.unlink()


def clean_stale(directory: Path) -> list[Path]:
    """Remove temporary files a killed build left behind; returns what was removed."""
    removed = []
    if directory.is_dir():
        for path in directory.glob(STAGING_PREFIX + "*"):
            shutil.rmtree(path, ignore_errors=True) if path.is_dir() else path.unlink(missing_ok=True)
            removed.append(path)
    return removed
