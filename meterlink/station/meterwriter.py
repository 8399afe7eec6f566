"""The monitor's buffer of one meter's rows: raw readings as array chunks, the rest as row dicts.

Readings arrive from the link in runs (``ReadingBatch``) and are stored with one
``Store.add_reading_arrays`` call per commit; statuses, spectra, events and epochs go through the
``BatchWriter`` row path. The rules are BatchWriter's: nothing leaves the buffer before its
transaction commits, and while the file cannot be written at most ``max_keep`` readings are kept,
the oldest beyond that dropped and recorded as a ``readings_dropped`` event with the exact count
and sequence ranges.
"""

from __future__ import annotations

import time

import numpy as np

from meterlink.storage.store import BatchWriter

COLUMNS = ("boot", "epoch", "seq", "tick_ms", "t_utc", "raw", "flags", "range_index")


def _ranges(chunks: list[dict], limit: int = 50) -> list[list[int]]:
    """[[boot, epoch, first_seq, last_seq], ...] of consecutive runs in array chunks (as seq_ranges)."""
    out: list[list[int]] = []
    for c in chunks:
        seq = c["seq"]
        if not seq.size:
            continue
        b, e = int(c["boot"]), int(c["epoch"])
        cut = np.flatnonzero(np.diff(seq) != 1) + 1
        for lo, hi in zip(np.r_[0, cut].tolist(), np.r_[cut, seq.size].tolist()):
            q0, q1 = int(seq[lo]), int(seq[hi - 1])
            if out and out[-1][0] == b and out[-1][1] == e and out[-1][3] + 1 == q0:
                out[-1][3] = q1
            elif len(out) >= limit and out[-1][0] == b and out[-1][1] == e:
                out[-1][3] = max(out[-1][3], q1)
            else:
                out.append([b, e, q0, q1])
    return out


class MeterWriter(BatchWriter):
    """A BatchWriter whose readings are kept as array chunks and stored with add_reading_arrays."""

    def __init__(self, *args, **kwargs):
        super().__init__(*args, **kwargs)
        self._chunks: list[dict] = []
        self._n_arrays = 0

    def add_arrays(self, boot: int, epoch: int, seq, tick_ms, t_utc, raw, flags, range_index) -> None:
        """Queue readings given as arrays (raw (N, 3)); boot and epoch are common to the chunk."""
        chunk = {"boot": int(boot), "epoch": int(epoch), "seq": seq, "tick_ms": tick_ms, "t_utc": t_utc,
                 "raw": raw, "flags": flags, "range_index": range_index}
        with self._lock:
            self._chunks.append(chunk)
            self._n_arrays += int(seq.size)
            if self._first is None:
                self._first = time.monotonic()
            if self.failures:
                self._bound()

    @property
    def pending_readings(self) -> int:
        with self._lock:
            return len(self._buf["readings"]) + self._n_arrays

    def take(self) -> dict[str, list]:
        with self._lock:
            buf, self._buf = self._buf, {k: [] for k in self.KINDS}
            buf["arrays"], self._chunks, self._n_arrays = self._chunks, [], 0
            self._first = None
        return buf

    def write_taken(self, buf: dict[str, list]) -> None:
        rows = {k: buf[k] for k in self.KINDS}
        if any(rows.values()):
            self.new_readings += self.store.write_batch(self.session_id, **rows)
        chunks = buf.get("arrays") or []
        if chunks:
            cat = {k: (np.concatenate([np.full(c["seq"].size, c[k], np.int64) for c in chunks])
                       if k in ("boot", "epoch") else np.concatenate([c[k] for c in chunks])) for k in COLUMNS}
            boot = int(cat["boot"][0]) if bool(np.all(cat["boot"] == cat["boot"][0])) else cat["boot"]
            epoch = int(cat["epoch"][0]) if bool(np.all(cat["epoch"] == cat["epoch"][0])) else cat["epoch"]
            self.new_readings += self.store.add_reading_arrays(
                self.session_id, boot, cat["seq"], cat["tick_ms"], cat["t_utc"], cat["raw"], cat["flags"],
                cat["range_index"], epoch=epoch)

    def put_back(self, buf: dict[str, list], error: BaseException | None = None) -> None:
        with self._lock:
            chunks = buf.get("arrays") or []
            self._chunks = chunks + self._chunks
            self._n_arrays += sum(int(c["seq"].size) for c in chunks)
        super().put_back({k: buf[k] for k in self.KINDS}, error)

    def _bound(self) -> None:
        """As BatchWriter._bound, over row readings and array chunks together (lock held)."""
        super()._bound()
        extra = len(self._buf["readings"]) + self._n_arrays - self.max_keep
        if extra <= 0 or not self._n_arrays:
            return
        extra = min(extra, self._n_arrays)
        gone, left = [], extra
        while left:
            c = self._chunks[0]
            n = int(c["seq"].size)
            if n <= left:
                gone.append(self._chunks.pop(0))
                left -= n
            else:
                gone.append({k: (v[:left] if k not in ("boot", "epoch") else v) for k, v in c.items()})
                self._chunks[0] = {k: (v[left:] if k not in ("boot", "epoch") else v) for k, v in c.items()}
                left = 0
        self._n_arrays -= extra
        self._record_drop(extra, _ranges(gone))
