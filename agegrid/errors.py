"""Exception types shared by every stage: bad input (exit 2) and a held build lock (exit 3)."""
from __future__ import annotations

from pathlib import Path


class AgegridError(Exception):
    """Root of the exceptions that the command line turns into an exit code."""

    exit_code = 1


class BadInput(AgegridError):
    """An input file or the build file is wrong in a way a person must fix.

    Parameters
    ----------
    what : str
        What is wrong, in words a user can act on.
    path : str or Path, optional
        The file the problem is in.
    where : str, optional
        The place in that file: ``"line 12"``, ``"feature 3"`` or a key such as ``"grid.spacing"``.
    """

    exit_code = 2

    def __init__(self, what: str, path: str | Path | None = None, where: str | None = None):
        self.what = what
        self.path = None if path is None else str(path)
        self.where = where
        super().__init__(self.message)

    @property
    def message(self) -> str:
        parts = [p for p in (self.path, self.where) if p]
        return ": ".join(parts + [self.what])


class LockHeld(AgegridError):
    """Another build holds the lock of this output directory."""

    exit_code = 3
