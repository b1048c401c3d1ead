"""One build per output directory: a lock file naming its holder, taken over when stale."""
from __future__ import annotations

import json
import os
import socket
import time
from datetime import datetime, timezone
from pathlib import Path

from agegrid.errors import LockHeld

LOCK_NAME = ".agegrid.lock"


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


class BuildLock:
    """Exclusive lock of an output directory, held for the ``with`` block.

    A lock whose holder ran on this host and no longer exists is stale and taken over; a live holder
    raises :class:`~agegrid.errors.LockHeld` naming its pid, host and start time.
    """

    def __init__(self, directory: Path):
        self.path = Path(directory) / LOCK_NAME
        self.holder = {"pid": os.getpid(), "host": socket.gethostname(),
                       "started": datetime.now(timezone.utc).isoformat(timespec="seconds")}

    def _try_create(self) -> bool:
        try:
            fd = os.open(self.path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
        except FileExistsError:
            return False
        with os.fdopen(fd, "w") as fh:
            json.dump(self.holder, fh)
        return True

    def acquire(self) -> "BuildLock":
        self.path.parent.mkdir(parents=True, exist_ok=True)
        for _ in range(3):
            if self._try_create():
                return self
            try:
                other = json.loads(self.path.read_text() or "{}")
            except (OSError, json.JSONDecodeError):
                other = {}
            if not other:  # being written by its holder right now, or empty: look again shortly
                time.sleep(0.2)
                if self.path.exists() and not self.path.read_text().strip():
                    self.path.unlink(missing_ok=True)
                continue
            if other.get("host") == self.holder["host"] and not _alive(int(other.get("pid", -1))):
                stale = self.path.with_name(f"{LOCK_NAME}.stale-{os.getpid()}")
                try:
                    os.replace(self.path, stale)  # only one contender wins this rename
                    stale.unlink(missing_ok=True)
                except FileNotFoundError:
                    pass
                continue
            raise LockHeld(f"{self.path.parent}: another build holds the lock (pid {other.get('pid')} on "
                           f"{other.get('host')}, started {other.get('started')})")
        raise LockHeld(f"{self.path.parent}: could not take the lock {self.path}")

    def release(self) -> None:
        try:
            if json.loads(self.path.read_text()).get("pid") == self.holder["pid"]:
                self.path.unlink()
        except (OSError, json.JSONDecodeError):
            pass

    def __enter__(self):
        return self.acquire()

    def __exit__(self, *exc):
        self.release()
