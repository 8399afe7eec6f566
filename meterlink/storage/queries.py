"""The Store's queries: readings, events, counts, overview, and the derived (calibrated) values."""

from __future__ import annotations

from typing import Any, Callable, Mapping

import numpy as np

from meterlink.physics import units
from meterlink.physics.calibrate import NEAR_FIELD
from meterlink.storage import listing, spans
from meterlink.storage.files import StorageError
from meterlink.storage.rows import ReadingArrays


class SessionQueries:
    """Mixin of Store: reading a session back, and its calibrations with provenance."""

    def readings(self, session_id: int, t0: float | None = None, t1: float | None = None) -> ReadingArrays:
        """Readings of a session with t0 <= t_utc < t1 (either bound optional), ordered by t_utc."""
        with self._lock:
            rows = spans.select(self.db.conn, "id, boot, seq, tick_ms, t_utc, raw_x, raw_y, raw_z, flags, range_index",
                                session_id, t0, t1)
        cols = list(zip(*rows)) if rows else [()] * 10

        def ints(i: int) -> np.ndarray:
            return np.array([0 if v is None else v for v in cols[i]], dtype=np.int64)

        t_utc = np.array(cols[4], dtype=float)
        # rows come in id (arrival) order; the clock keeps that in time order, but not across, say,
        # a host clock step: a stable sort then gives time order with ties in arrival order
        order = np.argsort(t_utc, kind="stable") if np.any(np.diff(t_utc) < 0) else slice(None)
        return ReadingArrays(ids=ints(0)[order], boot=ints(1)[order], seq=ints(2)[order], tick_ms=ints(3)[order],
                             t_utc=t_utc[order], raw=np.stack([ints(5), ints(6), ints(7)], axis=1).reshape(-1, 3)[order],
                             flags=ints(8)[order], range_index=ints(9)[order])

    def events(self, session_id: int | None = None, kind: str | None = None) -> list[dict]:
        """Events (detail decoded from JSON), in time order (the query: meterlink.storage.listing)."""
        with self._lock:
            return listing.events(self.db.conn, session_id, kind)

    def count(self, table: str, session_id: int) -> int:
        if table not in ("readings", "spectra", "status", "events"):
            raise StorageError(f"unknown table {table!r}")
        with self._lock:
            if table == "readings":
                return spans.summary(self.db.conn, session_id)[0]
            return int(self.db.execute(f"select count(*) from {table} where session_id = ?", [session_id]).fetchone()[0])


    def verify(self, progress: Callable[[str, int, int], None] | None = None) -> list[str]:
        """Problems found by SQLite's integrity check and the span index check (empty: sound).

        progress, if given, is called as progress(stage, done, total); both stages read the whole file.
        """
        with self._lock:
            if progress:
                progress("SQLite integrity check", 0, 1)
            rows = [r[0] for r in self.db.execute("PRAGMA integrity_check").fetchall()]
            problems = [] if rows == ["ok"] else [f"sqlite: {r}" for r in rows]
            if progress:
                progress("SQLite integrity check", 1, 1)
            step = (lambda d, t: progress("span index", d, t)) if progress else None
            problems += spans.check(self.db.conn, step)
            if progress:
                progress("span index", 1, 1)
            return problems

    def session_overview(self) -> list[dict]:
        """One row per session with its device, span and counts of readings, spectra, events by
        severity and calibrations, and the outcome of its latest assessment (meterlink.storage.listing)."""
        with self._lock:
            return listing.session_overview(self.db.conn)

    # -- derived values: calibrations with provenance ------------------------------------------
    def status_temperatures(self, session_id: int) -> list[float]:
        """Temperatures (degC) the device reported during a session, in time order."""
        with self._lock:
            return [r[0] for r in self.db.execute(
                "select temperature_degc from status where session_id = ? order by t_utc", [session_id])]

    def add_calibration(self, row: Mapping[str, Any]) -> int:
        """Record that a certificate was applied to a session (provenance); returns the calibration id."""
        with self.write():
            return int(self.db["calibrations"].insert(dict(row)).last_pk)

    def calibrations(self, session_id: int) -> list[dict]:
        """Calibrations applied to a session, oldest first."""
        with self._lock:
            return list(self.db["calibrations"].rows_where("session_id = ?", [session_id], order_by="id"))

    def add_field_values(self, calibration_id: int, reading_ids, e_v_per_m, axes_v_per_m, h_a_per_m,
                         s_w_per_m2, u_expanded_db, flags, t_utc) -> None:
        """Store one calibration's values for many readings in one transaction, packed per run of
        readings (field_spans; schema 13: no per-reading rows, storage/streamed.py says why).

        H is packed only where it is not exactly E / Z0, and S is rebuilt from E on reading, so S must
        be E^2 / Z0 (NaN in near-field rows) as physics.calibrate gives it: other values are refused."""
        packed = _packed_rows(calibration_id, reading_ids, t_utc, e_v_per_m, axes_v_per_m, h_a_per_m, s_w_per_m2,
                              u_expanded_db, flags)
        cal = int(calibration_id)
        with self.write() as conn:
            if conn.execute("select 1 from calibrations where id = ?", [cal]).fetchone() is None:
                raise StorageError(f"no calibration {cal} in {str(self.path)!r}")
            conn.executemany(
                "insert into field_spans (calibration_id, id_lo, id_hi, n, t_lo, t_hi, reading_id, t_utc, e_v_per_m, "
                "axes_v_per_m, u_expanded_db, flags, h_a_per_m) values (?,?,?,?,?,?,?,?,?,?,?,?,?)", packed)

    def packed_count(self, calibration_id: int) -> int:
        """How many readings a calibration holds packed in field_spans (0: none, read field_values)."""
        with self._lock:
            return int(self.db.execute("select coalesce(sum(n), 0) from field_spans where calibration_id = ?",
                                       [calibration_id]).fetchone()[0])

    def packed_chunks(self, calibration_id: int):
        """Generator: a calibration's field_spans rows in id order, each as a dict of numpy arrays."""
        with self._lock:
            cur = self.db.conn.cursor()
            cur.execute("select id_lo, id_hi, n, reading_id, t_utc, e_v_per_m, axes_v_per_m, u_expanded_db, flags "
                        "from field_spans where calibration_id = ? order by id_lo", [calibration_id])
        try:
            while True:
                with self._lock:
                    got = cur.fetchmany(8)
                if not got:
                    return
                for r in got:
                    yield _unpack(r)
        finally:
            cur.close()

    def drop_calibration(self, calibration_id: int) -> None:
        """Remove a calibration and its values: only for one whose writing failed part-way (streamed)."""
        with self.write() as conn:
            conn.execute("delete from field_values where calibration_id = ?", [calibration_id])
            conn.execute("delete from field_spans where calibration_id = ?", [calibration_id])
            conn.execute("delete from calibrations where id = ?", [calibration_id])

    # -- streaming: a session span by span (meterlink.storage.recording) ----------------------
    def reading_spans(self, session_id: int) -> list[tuple]:
        """The session's span index rows (id_lo, id_hi, n, t_lo, t_hi), by id: where its readings lie."""
        with self._lock:
            return self.db.execute("select id_lo, id_hi, n, t_lo, t_hi from reading_spans where session_id = ? "
                                   "order by id_lo", [session_id]).fetchall()

    def recording_rows(self, session_id: int, calibration_id: int | None = None, events: bool = False) -> dict:
        """Everything the recording loader reads about a session, in one call under one lock: the
        session row with its device, calibrations, temperatures, span index rows, how many values
        the calibration in force (the latest, or calibration_id) holds packed, and optionally events."""
        with self._lock:
            cals = self.calibrations(session_id)
            cal = (cals[-1] if cals else None) if calibration_id is None else \
                next((c for c in cals if c["id"] == calibration_id), None)
            return {"session": self.session(session_id), "calibrations": cals, "calibration": cal,
                    "temperatures": self.status_temperatures(session_id), "spans": self.reading_spans(session_id),
                    "packed": self.packed_count(cal["id"]) if cal is not None else 0,
                    "events": self.events(session_id) if events else None}

    def row_chunks(self, sql: str, params_of, id_ranges, rows: int):
        """Generator: fetchall() of ``sql`` for id sub-ranges [lo, hi] of about ``rows`` ids each.

        ``params_of(lo, hi)`` gives the statement's parameters; each chunk is a list of tuples,
        so memory stays bounded by one chunk however long the session."""
        for lo, hi in id_ranges:
            for a in range(lo, hi + 1, rows):
                b = min(a + rows - 1, hi)
                with self._lock:
                    got = self.db.execute(sql, params_of(a, b)).fetchall()
                if got:
                    yield got

    def field_values(self, calibration_id: int) -> dict[str, np.ndarray]:
        """One calibration's values with their reading times, ordered by time (NULL -> NaN): from its
        packed rows (schema 13 on, readings since removed left out), else its per-reading rows."""
        with self._lock:
            got = _packed_field_values(self.db.conn, calibration_id)
            if got is not None:
                return got
            rows = self.db.execute(
                "select v.reading_id, r.t_utc, v.e_v_per_m, v.ex_v_per_m, v.ey_v_per_m, v.ez_v_per_m, "
                "v.h_a_per_m, v.s_w_per_m2, v.u_expanded_db, v.flags from field_values v "
                "join readings r on r.id = v.reading_id where v.calibration_id = ? order by r.t_utc, r.id",
                [calibration_id]).fetchall()
        a = np.array(rows, dtype=float).reshape(-1, 10)
        return {"reading_id": a[:, 0].astype(np.int64), "t_utc": a[:, 1], "e_v_per_m": a[:, 2],
                "axes_v_per_m": a[:, 3:6], "h_a_per_m": a[:, 6], "s_w_per_m2": a[:, 7],
                "u_expanded_db": a[:, 8], "flags": a[:, 9].astype(np.int64)}

    def spectrum_lines(self, session_id: int) -> dict[str, np.ndarray]:
        """All stored receiver lines of a session: line id, frequency (Hz) and level (dBuV)."""
        with self._lock:
            rows = self.db.execute(
                "select l.id, l.freq_hz, l.level_dbuv from spectrum_lines l join spectra s on s.id = l.spectrum_id "
                "where s.session_id = ? order by s.t_utc, s.id, l.id", [session_id]).fetchall()
        a = np.array(rows, dtype=float).reshape(-1, 3)
        return {"line_id": a[:, 0].astype(np.int64), "freq_hz": a[:, 1], "level_dbuv": a[:, 2]}

    def add_spectrum_values(self, calibration_id: int, line_ids, e_v_per_m, u_expanded_db, flags) -> None:
        """Store one calibration's field per receiver line (NaN stored as NULL)."""
        rows = [(int(i), calibration_id, float(e) if e == e else None, float(u), int(fl))
                for i, e, u, fl in zip(line_ids, e_v_per_m, u_expanded_db, flags)]
        with self.write():
            self.db.conn.executemany("insert into spectrum_values (spectrum_line_id, calibration_id, e_v_per_m, "
                                     "u_expanded_db, flags) values (?,?,?,?,?)", rows)

    def spectrum_values(self, calibration_id: int) -> dict[str, np.ndarray]:
        """One calibration's line values with their sweep, boot, orientation, frequency and time."""
        with self._lock:
            rows = self.db.execute(
                "select s.boot, s.sweep, s.orientation, s.t_utc, l.freq_hz, v.e_v_per_m, v.u_expanded_db, v.flags "
                "from spectrum_values v join spectrum_lines l on l.id = v.spectrum_line_id "
                "join spectra s on s.id = l.spectrum_id where v.calibration_id = ? order by s.t_utc, s.id, l.id",
                [calibration_id]).fetchall()
        a = np.array(rows, dtype=float).reshape(-1, 8)
        return {"boot": a[:, 0].astype(np.int64), "sweep": a[:, 1].astype(np.int64),
                "orientation": a[:, 2].astype(np.int64), "t_utc": a[:, 3], "freq_hz": a[:, 4],
                "e_v_per_m": a[:, 5], "u_expanded_db": a[:, 6], "flags": a[:, 7].astype(np.int64)}


#: Readings per field_spans row.
PACKED_ROWS = 16384


def _rebuilt_h(e, h_blob) -> np.ndarray:
    """H of a packed row: E / Z0 where the row stores none (empty blob), else the stored array."""
    if not h_blob:
        return units.e_to_h(e)
    h = np.frombuffer(h_blob, "<f8")
    return np.broadcast_to(h, e.shape) if h.size == 1 and e.size != 1 else h


def _rebuilt_s(e, flags) -> np.ndarray:
    """S of a packed row: E^2 / Z0 as physics.calibrate computes it, NaN in near-field rows."""
    return np.where((np.asarray(flags) & NEAR_FIELD) != 0, np.nan, units.e_to_s(e))


def _same_bits(a: np.ndarray, b: np.ndarray) -> bool:
    return a.shape == b.shape and np.ascontiguousarray(a, "<f8").tobytes() == np.ascontiguousarray(b, "<f8").tobytes()


def _packed_rows(calibration_id, reading_ids, t_utc, e_v_per_m, axes, h_a_per_m, s_w_per_m2, u_expanded_db,
                 flags) -> list[tuple]:
    """field_spans rows of one calibration's values: sorted by reading id, PACKED_ROWS at a time.

    Ids that run without a hole (id_hi - id_lo + 1 == n, one meter per file) are stored as an empty
    blob, H as an empty blob where it is E / Z0 to the last bit, and an uncertainty, flags or H
    column that is the same for the whole row as one element. S is not stored: it must be what
    _rebuilt_s gives back, bit for bit (else StorageError)."""
    ids = np.asarray(reading_ids, dtype=np.int64)
    n = ids.size
    e = np.asarray(e_v_per_m, dtype="<f8").reshape(n)
    fl_all = np.asarray(flags, dtype="<i8").reshape(n)
    if not _same_bits(np.asarray(s_w_per_m2, dtype="<f8").reshape(n), _rebuilt_s(e, fl_all)):
        raise StorageError(f"calibration {calibration_id}: power density is not E^2/Z0 (NaN in near field), "
                           f"which the packed values rebuild; not stored")
    order = np.argsort(ids, kind="stable") if np.any(np.diff(ids) < 0) else slice(None)
    cols = [ids[order], np.asarray(t_utc, dtype="<f8")[order], e[order],
            np.asarray(axes, dtype="<f8").reshape(n, 3)[order], np.asarray(u_expanded_db, dtype="<f8")[order],
            fl_all[order], np.asarray(h_a_per_m, dtype="<f8").reshape(n)[order]]
    out = []
    for a in range(0, n, PACKED_ROWS):
        part = [np.ascontiguousarray(c[a:a + PACKED_ROWS]) for c in cols]
        i, t = part[0], part[1]
        lo, hi = int(i[0]), int(i[-1])
        if hi - lo + 1 == i.size:
            part[0] = part[0][:0]
        if _same_bits(part[6], units.e_to_h(part[2])):
            part[6] = part[6][:0]
        for k in (4, 5, 6):
            c = part[k]
            if c.size and (np.all(c == c[0]) if k == 5 else _same_bits(c, np.full(c.size, c[0]))):
                part[k] = c[:1]
        out.append((calibration_id, lo, hi, int(i.size), float(np.min(t)), float(np.max(t)),
                    *(c.tobytes() for c in part)))
    return out


def _packed_field_values(conn, calibration_id: int) -> dict[str, np.ndarray] | None:
    """Store.field_values from a calibration's packed rows, None if it has none written from schema 13
    on (rows written before hold no H: their H and S are read from field_values)."""
    got = conn.execute("select session_id from calibrations where id = ?", [calibration_id]).fetchone()
    if got is None:
        return None
    ranges = spans.id_ranges(conn, got[0])
    parts = []
    for r in conn.execute("select id_lo, id_hi, n, reading_id, t_utc, e_v_per_m, axes_v_per_m, u_expanded_db, flags, "
                          "h_a_per_m from field_spans where calibration_id = ? order by id_lo", [calibration_id]):
        if r[9] is None:
            return None
        d = _unpack(r)
        d["h_a_per_m"] = _rebuilt_h(d["e_v_per_m"], r[9])
        d["s_w_per_m2"] = _rebuilt_s(d["e_v_per_m"], d["flags"])
        keep = spans.in_ranges(ranges, d["reading_id"])
        parts.append({k: v[keep] for k, v in d.items()})
    if not parts:
        return None
    d = {k: np.concatenate([p[k] for p in parts]) for k in parts[0]}
    order = np.lexsort((d["reading_id"], d["t_utc"]))     # by time, ties by id: as the join's order by
    return {k: d[k][order] for k in ("reading_id", "t_utc", "e_v_per_m", "axes_v_per_m", "h_a_per_m",
                                     "s_w_per_m2", "u_expanded_db", "flags")}


def _unpack(r) -> dict:
    """A field_spans row (id_lo, id_hi, n, then the six blobs) as a dict of arrays (see _packed_rows)."""
    lo, hi, n = r[0], r[1], r[2]
    ids = np.frombuffer(r[3], "<i8") if r[3] else np.arange(lo, hi + 1, dtype=np.int64)
    u = np.frombuffer(r[7], "<f8")
    fl = np.frombuffer(r[8], "<i8")
    return {"reading_id": ids, "t_utc": np.frombuffer(r[4], "<f8"), "e_v_per_m": np.frombuffer(r[5], "<f8"),
            "axes_v_per_m": np.frombuffer(r[6], "<f8").reshape(-1, 3),
            "u_expanded_db": np.broadcast_to(u, (n,)) if u.size == 1 and n != 1 else u,
            "flags": np.broadcast_to(fl, (n,)) if fl.size == 1 and n != 1 else fl}
