"""One monitor per station database: an exclusive flock on a lock file next to the database.

The lock is advisory and held by an open file description, so the kernel releases it when the
process ends however it ends (SIGKILL, power loss): a stale lock file never blocks a restart.
The file holds the owner's pid, only to name it in the refusal message.
"""

from __future__ import annotations

import fcntl
import os
from pathlib import Path

from meterlink.errors import MeterlinkError


class StationLockedError(MeterlinkError):
    """Another process already monitors this station database (exit 2)."""


def lock_path(database: Path | str) -> Path:
    """The lock file of a station database: ``<database>.lock`` beside it."""
    p = Path(database)
    return p.with_name(p.name + ".lock")


class StationLock:
    """Hold ``<database>.lock`` exclusively until ``release()``; a second holder is refused at once."""

    def __init__(self, database: Path | str, station: str = ""):
        self.path = lock_path(database)
        self.station = station
        self._fd: int | None = None

    def acquire(self) -> "StationLock":
        """Take the lock or raise StationLockedError naming the holder's pid and the lock file."""
        try:
            # O_CLOEXEC: alarm hooks and other children must not inherit (and so keep) the lock
            fd = os.open(self.path, os.O_RDWR | os.O_CREAT | os.O_CLOEXEC, 0o640)
        except OSError as exc:
            if not self.path.parent.is_dir():
                raise MeterlinkError(f"{self.path.parent}: the station database's folder does not exist") from None
            raise MeterlinkError(f"{self.path}: cannot open the station lock file: {exc.strerror}") from None
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            holder = _read_pid(fd)
            os.close(fd)
            who = f"pid {holder}" if holder else "another process"
            name = f"station {self.station!r}" if self.station else "this station"
            raise StationLockedError(f"{self.path}: {name} is already monitored by {who}; "
                                     "stop that monitor first (one monitor per station database)") from None
        os.ftruncate(fd, 0)
        os.pwrite(fd, f"{os.getpid()}\n".encode(), 0)
        self._fd = fd
        return self

    def release(self) -> None:
        """Give the lock up (the file stays: removing it could race with the next holder)."""
        if self._fd is not None:
            fd, self._fd = self._fd, None
            try:
                os.ftruncate(fd, 0)
            except OSError:
                pass
            os.close(fd)               # closing the only descriptor drops the flock

    @property
    def held(self) -> bool:
        return self._fd is not None

    def __enter__(self) -> "StationLock":
        return self.acquire()

    def __exit__(self, *exc) -> None:
        self.release()


def _read_pid(fd: int) -> int | None:
    try:
        text = os.pread(fd, 32, 0).decode("ascii", "replace").strip()
    except OSError:
        return None
    return int(text) if text.isdigit() else None
