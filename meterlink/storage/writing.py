"""The Store's hot path: readings, statuses, spectra and events written in one transaction per batch."""

from __future__ import annotations

import contextlib
import sqlite3
from typing import Any, Iterable, Mapping

import numpy as np

from meterlink.storage import spans
from meterlink.storage.files import StorageError
from meterlink.storage.rows import READING_COLUMNS, _LazyRows, event_row


class ReadingWriter:
    """Mixin of Store: writing rows of a session (expects self.db, self.path, self._lock, self.write)."""

    @contextlib.contextmanager
    def _session_tx(self, session_id: int | None):
        """One write transaction of rows of one session (or of no session, for global events).

        The session is checked once here, and SQLite's per-row foreign-key check is off for the
        transaction (it cost about 15 % of a bulk insert of readings): every row written in it
        refers only to this session or to rows made in the same transaction.
        """
        conn = self.db.conn
        own = not conn.in_transaction  # the pragma is a no-op inside a transaction
        if own:
            conn.execute("PRAGMA foreign_keys=OFF")
        try:
            with self.write():
                if session_id is not None and conn.execute("select 1 from sessions where id = ?",
                                                           (session_id,)).fetchone() is None:
                    raise StorageError(f"no session {session_id} in {str(self.path)!r}")
                yield conn
        finally:
            if own:
                conn.execute("PRAGMA foreign_keys=ON")

    def add_readings(self, session_id: int, rows: Iterable[Mapping[str, Any]]) -> int:
        """Insert readings (dicts with READING_COLUMNS) in one transaction; returns rows actually new."""
        return self.write_batch(session_id, readings=rows)

    def add_reading(self, session_id: int, row: Mapping[str, Any]) -> int:
        return self.add_readings(session_id, [row])

    def add_status(self, session_id: int, row: Mapping[str, Any]) -> None:
        self.write_batch(session_id, statuses=[row])

    def add_spectrum(self, session_id: int, row: Mapping[str, Any]) -> None:
        """row: boot, seq, tick_ms, t_utc, orientation, sweep, lines [(freq_hz, level_dbuv), ...]."""
        self.write_batch(session_id, spectra=[row])

    def add_event(self, session_id: int | None, kind: str, severity: str, message: str,
                  t_utc: float | None = None, **detail: Any) -> None:
        self.write_batch(session_id, events=[event_row(kind, severity, message, t_utc, **detail)])

    def write_batch(self, session_id: int | None, readings: Iterable[Mapping] = (), statuses: Iterable[Mapping] = (),
                    spectra: Iterable[Mapping] = (), events: Iterable[Mapping] = (),
                    epochs: Iterable[Mapping] = ()) -> int:
        """Write everything in one transaction; a bad row becomes an event instead. Returns new readings.

        A full disk or an I/O error raises (sqlite3.OperationalError) with nothing of the batch stored,
        so the caller can keep it and try again.
        """
        readings, statuses, spectra, events = list(readings), list(statuses), list(spectra), list(events)
        bad: list[dict] = []
        with self._lock, self._session_tx(session_id) as conn:
            if epochs:
                self._insert_epochs(conn, list(epochs))
            new = self._insert_readings(conn, session_id, readings, bad)
            for st in statuses:
                try:
                    conn.execute("insert into status (session_id, boot, seq, tick_ms, t_utc, battery_mv, "
                                 "battery_pct, temperature_degc, flags, interval_ms) values (?,?,?,?,?,?,?,?,?,?)",
                                 (session_id, st["boot"], st["seq"], st["tick_ms"], st["t_utc"], st["battery_mv"],
                                  st.get("battery_pct"), st["temperature_degc"], st["flags"], st["interval_ms"]))
                except (KeyError, TypeError, sqlite3.IntegrityError, sqlite3.InterfaceError, sqlite3.ProgrammingError,
                        sqlite3.DataError) as exc:  # a full disk is the caller's to handle (keep the batch)
                    bad.append(event_row("bad_row", "error", f"status row not stored: {exc}", table="status"))
            for sp in spectra:
                self._insert_spectrum(conn, session_id, sp, bad)
            self._insert_events(conn, session_id, events + bad)
        return new

    def add_reading_arrays(self, session_id: int, boot, seq, tick_ms, t_utc, raw, flags, range_index,
                           epoch=0) -> int:
        """Insert readings given as arrays (raw is (N, 3)) in one transaction; returns rows actually new.

        Same rules as write_batch: a reading already stored (session, boot, epoch, seq) with the same
        content is skipped and reported as one duplicate_reading event.
        """
        raw = np.asarray(raw).reshape(-1, 3)
        n = raw.shape[0]
        values = [session_id, boot, seq, tick_ms, t_utc, raw[:, 0], raw[:, 1], raw[:, 2], flags, range_index, epoch]
        if all(np.asarray(c).dtype.kind in kinds for c, kinds in ((boot, "iu"), (seq, "iu"), (t_utc, "iuf"),
                                                                 (epoch, "iu"), (tick_ms, "iu"), (raw, "iu"),
                                                                 (flags, "iu"), (range_index, "iu"))):
            keys = tuple(np.broadcast_to(np.asarray(c, dt), (n,)) for c, dt in
                         ((boot, np.int64), (seq, np.int64), (t_utc, float), (epoch, np.int64)))
            content = np.empty((n, 6), np.int64)
            for j, c in enumerate((tick_ms, raw[:, 0], raw[:, 1], raw[:, 2], flags, range_index)):
                content[:, j] = np.broadcast_to(np.asarray(c, np.int64), (n,))
            keys = (*keys, content)
            # an integer common to every row (session, boot, flags, ...) goes into the statement as
            # a literal: fewer values to bind per row, the same rows stored
            names, marks, cols = [], [], []
            for name, v in zip(("session_id",) + READING_COLUMNS + ("epoch",), values):
                a = np.asarray(v)
                names.append(name)
                if a.ndim == 1 and a.size > 1 and a.dtype.kind in "iu" and a[0] == a[-1] and np.all(a == a[0]):
                    a = a[0]  # the same in every row (flags and range are, mostly): one literal
                if a.ndim == 0 and a.dtype.kind in "iu" and abs(int(a)) < 2 ** 63:
                    marks.append(str(int(a)))
                else:
                    marks.append("?")
                    cols.append(np.broadcast_to(a, (n,)).tolist())
            sql = f"insert into readings ({', '.join(names)}) values ({', '.join(marks)})"
            tuples = _LazyRows(cols, n)
        else:  # not all numbers: each row is checked as write_batch checks it
            keys, sql = None, spans.INSERT_SQL
            tuples = _LazyRows([np.asarray(v).item() if np.ndim(v) == 0 else np.broadcast_to(np.asarray(v), (n,)).tolist()
                                for v in values], n)
        bad: list[dict] = []
        with self._lock, self._session_tx(session_id) as conn:
            new = self._insert_tuples(conn, session_id, tuples, bad, keys=keys, sql=sql)
            self._insert_events(conn, session_id, bad)
        return new

    def _insert_readings(self, conn: sqlite3.Connection, session_id, rows: list, bad: list) -> int:
        if not rows:
            return 0
        try:
            tuples = [(session_id, *(r[c] for c in READING_COLUMNS), r.get("epoch", 0)) for r in rows]
        except (KeyError, TypeError, AttributeError):
            tuples = []  # find the bad rows one by one; the good ones still go in
            for r in rows:
                try:
                    tuples.append((session_id, *(r[c] for c in READING_COLUMNS), r.get("epoch", 0)))
                except (KeyError, TypeError, AttributeError) as exc:
                    bad.append(event_row("bad_row", "error", f"reading not stored: {exc}", table="readings",
                                         seq=r.get("seq") if isinstance(r, Mapping) else None))
        return self._insert_tuples(conn, session_id, tuples, bad)

    @staticmethod
    def _insert_tuples(conn: sqlite3.Connection, session_id, tuples, bad: list, keys=None,
                       sql: str = spans.INSERT_SQL) -> int:
        """The one insert of readings (write_batch and add_reading_arrays): repeats skipped and counted."""
        if not tuples:
            return 0
        if session_id is None:
            bad.append(event_row("bad_row", "error", f"{len(tuples)} reading(s) not stored: no session",
                                 table="readings"))
            return 0
        new, dup, refused, reused = spans.insert(conn, session_id, tuples, keys, sql)
        for i, why in refused:
            seq = int(keys[1][i]) if keys is not None else (tuples[i][2] if len(tuples[i]) > 2 else None)
            bad.append(event_row("bad_row", "error", f"reading not stored: {why}", table="readings",
                                 seq=seq if isinstance(seq, int) else repr(seq)))
        if dup > 0:
            bad.append(event_row("duplicate_reading", "info", f"{dup} reading(s) already stored, ignored", count=dup))
        if reused > 0:
            bad.append(event_row("seq_reused", "warning", f"{reused} reading(s) stored whose boot and sequence "
                                 "number were already taken by a reading of different content", count=reused))
        return new

    @staticmethod
    def _insert_events(conn: sqlite3.Connection, session_id, events: list) -> None:
        for ev in events:
            conn.execute("insert into events (session_id, t_utc, kind, severity, message, detail) "
                         "values (?,?,?,?,?,?)", (session_id, ev["t_utc"], ev["kind"], ev["severity"],
                                                  ev["message"], ev["detail"]))

    def _insert_spectrum(self, conn: sqlite3.Connection, session_id, sp: Mapping, bad: list) -> None:
        try:
            cur = conn.execute("insert or ignore into spectra (session_id, boot, seq, tick_ms, t_utc, orientation, "
                               "sweep, epoch) values (?,?,?,?,?,?,?,?)",
                               (session_id, sp["boot"], sp["seq"], sp["tick_ms"], sp["t_utc"], sp["orientation"],
                                sp["sweep"], sp.get("epoch", 0)))
            if cur.rowcount != 1:
                bad.append(event_row("duplicate_reading", "info", "spectrum already stored, ignored", count=1))
                return
            sid = cur.lastrowid
            conn.executemany("insert into spectrum_lines (spectrum_id, freq_hz, level_dbuv) values (?,?,?)",
                             [(sid, float(f), float(lv)) for f, lv in sp["lines"]])
        except (KeyError, TypeError, ValueError, AttributeError, sqlite3.IntegrityError, sqlite3.InterfaceError,
                sqlite3.ProgrammingError, sqlite3.DataError) as exc:  # a full disk is the caller's to handle
            bad.append(event_row("bad_row", "error", f"spectrum not stored: {exc}", table="spectra"))
