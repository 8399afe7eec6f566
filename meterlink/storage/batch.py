"""BatchWriter: rows of one session buffered and committed by size or age, never lost silently."""

from __future__ import annotations

import sqlite3
import threading
import time
from typing import TYPE_CHECKING, Any, Mapping

from meterlink.storage.files import StorageError
from meterlink.storage.rows import event_row, seq_ranges

if TYPE_CHECKING:
    from meterlink.storage.store import Store


class BatchWriter:
    """Buffers rows for one session and commits them by size or at most max_age_s after the first.

    A batch leaves the buffer only once it is stored: a commit that fails (a full disk, an I/O
    error) puts it back, and the next flush tries again. So that memory stays bounded while the
    file cannot be written, at most max_keep readings are kept; beyond that the oldest are dropped
    and the drop is itself kept as an event with the exact count and sequence ranges.
    """

    KINDS = ("readings", "statuses", "spectra", "events", "epochs")

    def __init__(self, store: "Store", session_id: int, max_rows: int = 500, max_age_s: float = 1.0,
                 max_keep: int = 500_000):
        self.store, self.session_id = store, session_id
        self.max_rows, self.max_age_s, self.max_keep = max_rows, max_age_s, max_keep
        self._lock = threading.Lock()
        self._flush_lock = threading.Lock()
        self._buf: dict[str, list] = {k: [] for k in self.KINDS}
        self._first: float | None = None
        self.new_readings = 0
        self.failures = 0                  # commits failed in a row (0: the last one worked)
        self.last_error: str | None = None
        self.dropped = 0                   # readings dropped because max_keep was reached (each in an event)
        self._drop_row: dict | None = None  # the drop event still in the buffer, grown while the episode lasts
        self._drop_count, self._drop_ranges = 0, []
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None

    def _add(self, key: str, row: Mapping) -> None:
        with self._lock:
            self._buf[key].append(row)
            if self._first is None:
                self._first = time.monotonic()
            if self.failures:
                self._bound()        # not storing: memory stays bounded between retries too
            n = sum(len(v) for v in self._buf.values())
        if n >= self.max_rows and not self.failures:
            try:
                self.flush()
            except (sqlite3.DatabaseError, StorageError):
                pass  # kept in the buffer; the owner sees failures and last_error

    def add_reading(self, row: Mapping) -> None:
        self._add("readings", row)

    def add_status(self, row: Mapping) -> None:
        self._add("statuses", row)

    def add_spectrum(self, row: Mapping) -> None:
        self._add("spectra", row)

    def add_epoch(self, row: Mapping) -> None:
        self._add("epochs", row)

    def add_event(self, kind: str, severity: str, message: str, t_utc: float | None = None, **detail: Any) -> None:
        self._add("events", event_row(kind, severity, message, t_utc, **detail))

    @property
    def pending_readings(self) -> int:
        with self._lock:
            return len(self._buf["readings"])

    def due(self) -> bool:
        with self._lock:
            return self._first is not None and time.monotonic() - self._first >= self.max_age_s

    def flush_if_due(self) -> None:
        if self.due():
            self.flush()

    # two phases, for a caller that writes several writers' batches in one transaction of its own
    def take(self) -> dict[str, list]:
        """Everything buffered, removed from the buffer: store it with write_taken, or give it back with put_back."""
        with self._lock:
            buf, self._buf = self._buf, {k: [] for k in self.KINDS}
            self._first = None
        return buf

    def write_taken(self, buf: dict[str, list]) -> None:
        if any(buf.values()):
            self.new_readings += self.store.write_batch(self.session_id, **buf)

    def put_back(self, buf: dict[str, list], error: BaseException | None = None) -> None:
        """A taken batch that was not stored goes back in front of what came since (order kept)."""
        with self._lock:
            for k in self.KINDS:
                self._buf[k] = buf[k] + self._buf[k]
            if any(self._buf.values()):
                self._first = time.monotonic()
            if error is not None:
                self.failures += 1
                self.last_error = f"{type(error).__name__}: {error}"
            self._bound()

    def stored(self) -> None:
        """The caller's transaction holding the taken batch committed."""
        self.failures, self.last_error = 0, None

    def _bound(self) -> None:
        """Keep at most max_keep readings; an overflow drops the oldest, recorded as an event (lock held)."""
        rows = self._buf["readings"]
        extra = len(rows) - self.max_keep
        if extra <= 0:
            return
        gone, self._buf["readings"] = rows[:extra], rows[extra:]
        self._record_drop(extra, seq_ranges(gone))

    def _record_drop(self, extra: int, ranges: list) -> None:
        """Count `extra` readings dropped for want of storage: ONE readings_dropped event per episode, kept
        last among the buffered events and grown in place, with adjacent seq ranges merged (lock held)."""
        self.dropped += extra
        events = self._buf["events"]
        count = extra
        if self._drop_row is not None and events and events[-1] is self._drop_row:  # one event per episode
            events.pop()
            count += self._drop_count
            old = self._drop_ranges
            if old and ranges and old[-1][:2] == ranges[0][:2] and old[-1][3] + 1 == ranges[0][2]:
                ranges = old[:-1] + [[*old[-1][:3], ranges[0][3]]] + ranges[1:]
            else:
                ranges = old + ranges
        self._drop_count, self._drop_ranges = count, ranges
        self._drop_row = event_row(
            "readings_dropped", "error", f"{count} reading(s) dropped: the database could not be written "
            f"({self.last_error}) and at most {self.max_keep} are kept in memory", count=count,
            reason="not_storing", ranges=ranges)
        events.append(self._drop_row)

    def flush(self) -> None:
        """Commit everything buffered now; on failure the batch is kept and the error raised."""
        with self._flush_lock:
            buf = self.take()
            try:
                self.write_taken(buf)
            except (sqlite3.OperationalError, sqlite3.DatabaseError, StorageError) as exc:
                self.put_back(buf, exc)
                raise
            self.stored()

    def start(self) -> "BatchWriter":
        """Flush on a background thread every max_age_s / 4 (optional: a loop may call flush_if_due)."""
        self._thread = threading.Thread(target=self._run, name="meterlink-batch-writer", daemon=True)
        self._thread.start()
        return self

    def _run(self) -> None:
        while not self._stop.wait(self.max_age_s / 4):
            try:
                self.flush_if_due()
            except (sqlite3.DatabaseError, StorageError):
                pass  # kept in the buffer; the owner sees failures and last_error

    def close(self) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join()
        self.flush()

