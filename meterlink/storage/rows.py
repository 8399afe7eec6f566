"""Row helpers shared by the Store and its batch writer: reading arrays, event and epoch rows."""

from __future__ import annotations

import itertools
import json
import threading
import time
from dataclasses import dataclass
from typing import Any

import numpy as np

SEVERITIES = ("info", "warning", "error")
READING_COLUMNS = ("boot", "seq", "tick_ms", "t_utc", "raw_x", "raw_y", "raw_z", "flags", "range_index")
# a reading row may carry "epoch" too (meterlink.storage.spans: one per connection to a device); absent, it is 0


@dataclass(frozen=True)
class ReadingArrays:
    """Readings of one session as arrays, ordered by time: raw counts are (N, 3) [x, y, z]."""

    ids: np.ndarray
    boot: np.ndarray
    seq: np.ndarray
    tick_ms: np.ndarray
    t_utc: np.ndarray
    raw: np.ndarray
    flags: np.ndarray
    range_index: np.ndarray

    def __len__(self) -> int:
        return int(self.ids.size)


class _LazyRows:
    """Reading tuples made from columns when iterated (executemany takes them one by one, so the
    list of 10-tuples is never built) or when one is asked for by index (a refused row)."""

    def __init__(self, cols: list, n: int):
        self.cols, self.n = cols, n  # each a list, or the one value of every row

    def __len__(self) -> int:
        return self.n

    def __iter__(self):
        return zip(*(c if isinstance(c, list) else itertools.repeat(c, self.n) for c in self.cols))

    def __getitem__(self, i: int) -> tuple:
        return tuple(c[i] if isinstance(c, list) else c for c in self.cols)


_epoch_lock = threading.Lock()
_last_epoch = 0


def epoch_row(session_id: int, boot: int | None, reason: str, device_id: int | None = None,
              started_utc: float | None = None) -> dict:
    """A new epoch as a row dict; its number (``id``) is the host's UTC in microseconds, bumped to stay
    strictly rising in this process, so it is unique without asking the database (a full disk
    cannot stop a new epoch from being told apart; the row is stored with the next batch)."""
    global _last_epoch
    with _epoch_lock:
        _last_epoch = max(time.time_ns() // 1000, _last_epoch + 1)
        eid = _last_epoch
    return {"id": eid, "session_id": session_id, "boot": boot, "reason": reason, "device_id": device_id,
            "started_utc": time.time() if started_utc is None else float(started_utc)}


def event_row(kind: str, severity: str, message: str, t_utc: float | None = None, **detail: Any) -> dict:
    """An event as a row dict; severity is info, warning or error; detail is stored as JSON."""
    if severity not in SEVERITIES:
        raise ValueError(f"severity {severity!r} is not one of {SEVERITIES}")
    return {"kind": kind, "severity": severity, "message": message,
            "t_utc": time.time() if t_utc is None else float(t_utc),
            "detail": json.dumps(detail, default=str, sort_keys=True) if detail else None}


def seq_ranges(rows: list, limit: int = 50) -> list[list[int]]:
    """[[boot, epoch, first_seq, last_seq], ...] of consecutive runs in reading rows (at most ``limit``, the
    rest merged into the last), so that a drop names exactly which readings went."""
    out: list[list[int]] = []
    for r in rows:
        try:
            b, e, q = int(r["boot"]), int(r.get("epoch", 0)), int(r["seq"])
        except (KeyError, TypeError, ValueError, AttributeError):
            continue
        if out and out[-1][0] == b and out[-1][1] == e and out[-1][3] + 1 == q:
            out[-1][3] = q
        elif len(out) >= limit and out[-1][0] == b and out[-1][1] == e:
            out[-1][3] = max(out[-1][3], q)
        else:
            out.append([b, e, q, q])
    return out

