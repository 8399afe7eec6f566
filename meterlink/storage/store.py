"""SQLite storage for sessions, raw readings, spectra, status and link events (docs/schema.md).

The Store opens database files through sqlite-utils and brings them to the current schema with
the migrations of schema.py (the version is kept in ``meta``); the readings' index lives in
spans.py. Raw device counts are stored as they arrived, so a later certificate can be re-applied.
"""

from __future__ import annotations

import contextlib
import itertools
import json
import os
import sqlite3
import sys
import threading
import time
import urllib.parse
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Iterable, Mapping

import numpy as np
import sqlite_utils

from meterlink import __version__

from meterlink.storage import spans
from meterlink.errors import MeterlinkError
from meterlink.storage.schema import _SLOW_MIGRATIONS, APP_ID, MIGRATIONS, SCHEMA_VERSION  # noqa: F401 (re-exported)

SEVERITIES = ("info", "warning", "error")
READING_COLUMNS = ("boot", "seq", "tick_ms", "t_utc", "raw_x", "raw_y", "raw_z", "flags", "range_index")
# a reading row may carry "epoch" too (meterlink.storage.spans: one per connection to a device); absent, it is 0


class StorageError(MeterlinkError):
    """A database file that cannot be created, opened or written."""


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


class DamagedDatabaseError(StorageError):
    """A database file whose pages SQLite cannot read ("malformed"): see `sessions --verify`."""


SQLITE_HEADER = b"SQLite format 3\x00"


def check_database_file(path: Path, must_exist: bool, allow_empty: bool) -> bool:
    """Whether path exists as an SQLite file; StorageError naming the path if it is anything else.

    Looks at the file's first bytes before SQLite does, so that a 0-byte file or a stray PNG given
    to a command that only reads is refused instead of being turned into a database.
    """
    name = str(path)
    if path.is_dir():
        raise StorageError(f"database path {name!r} is a directory")
    if not path.exists():
        if must_exist:
            raise StorageError(f"no database at {name!r}")
        return False
    try:
        with open(path, "rb") as fh:
            head = fh.read(len(SQLITE_HEADER))
    except OSError as exc:
        raise StorageError(f"cannot read database {name!r}: {exc.strerror}") from None
    if not head:
        if allow_empty:
            return True
        raise StorageError(f"{name!r} is empty (0 bytes), not a meterlink database")
    if head != SQLITE_HEADER:
        raise StorageError(f"{name!r} is not an SQLite database (its first bytes are not an SQLite header)")
    return True


def open_readonly(path: str | Path) -> sqlite3.Connection:
    """A read-only (``mode=ro``) connection to an existing SQLite file; StorageError naming it otherwise."""
    p = Path(path)
    check_database_file(p, must_exist=True, allow_empty=False)
    uri = "file:" + urllib.parse.quote(str(p.resolve())) + "?mode=ro"
    try:
        conn = sqlite3.connect(uri, uri=True, check_same_thread=False, timeout=10.0)
        conn.execute("select count(*) from sqlite_master").fetchone()   # the schema must be readable
    except sqlite3.DatabaseError as exc:
        raise describe_sqlite_error(p, exc) from None
    return conn


def describe_sqlite_error(path: str | Path, exc: sqlite3.Error) -> StorageError:
    """The StorageError a user should see for an sqlite3 error on the file at path."""
    text = str(exc)
    if "malformed" in text or "not a database" in text or "disk I/O" in text:
        return DamagedDatabaseError(f"database {str(path)!r} is damaged ({text}); 'meterlink sessions --db "
                                    f"{path} --verify' says what can be salvaged")
    return StorageError(f"cannot use database {str(path)!r}: {text}")


class Store:
    """A meterlink database file: open (creating or migrating it) and read/write through methods.

    readonly: open with SQLite's ``mode=ro`` (commands that only read; the file must exist and is
    never changed). create=False: the file must already exist (commands that add to a recording).
    A file this Store created is removed again if the ``with`` block fails before anything was stored.
    """

    def __init__(self, path: str | Path, *, readonly: bool = False, create: bool = True):
        self.path = Path(path)
        self.readonly = readonly
        self.created = False
        self._lock = threading.RLock()
        existed = check_database_file(self.path, must_exist=readonly or not create,
                                      allow_empty=create and not readonly)
        if readonly:
            conn = open_readonly(self.path)
        else:
            try:
                conn = sqlite3.connect(str(self.path), check_same_thread=False, timeout=10.0)
            except sqlite3.Error as exc:
                raise StorageError(f"cannot open database {str(self.path)!r}: {exc}") from None
            self.created = not existed
        try:
            self.db = sqlite_utils.Database(conn)
            self._prepare()
        except sqlite3.DatabaseError as exc:
            conn.close()
            self._remove_if_created()
            raise describe_sqlite_error(self.path, exc) from None
        except BaseException:
            conn.close()
            self._remove_if_created()
            raise

    def _remove_if_created(self) -> None:
        """Delete the file (and its -wal/-shm) if this Store created it: a failed command leaves none."""
        if not self.created:
            return
        for suffix in ("", "-wal", "-shm", "-journal"):
            with contextlib.suppress(OSError):
                Path(str(self.path) + suffix).unlink()
        self.created = False

    def holds_nothing(self) -> bool:
        """True when no table but meta holds a row (a file just created, into which nothing was stored)."""
        with self._lock:
            for name in self.db.table_names():
                if name == "meta" or name.startswith("sqlite_"):
                    continue
                if self.db.execute(f"select exists(select 1 from [{name}])").fetchone()[0]:
                    return False
        return True

    def check_sound(self) -> None:
        """DamagedDatabaseError unless SQLite's quick check passes (reads every page): before writing."""
        with self._lock:
            try:
                rows = [r[0] for r in self.db.execute("PRAGMA quick_check").fetchall()]
            except sqlite3.DatabaseError as exc:
                rows = [str(exc)]
        if rows != ["ok"]:
            raise DamagedDatabaseError(
                f"database {str(self.path)!r} is damaged ({rows[0]}{' ...' if len(rows) > 1 else ''}); refusing "
                f"to write into it: 'meterlink sessions --db {self.path} --verify' says what can be salvaged")

    # -- schema --------------------------------------------------------------------------------
    def _prepare(self) -> None:
        db = self.db
        tables = set(db.table_names())
        if tables and "meta" not in tables:
            raise StorageError(f"{str(self.path)!r} is an SQLite file but not a meterlink database")
        version = 0
        if "meta" in tables:
            meta = {r["key"]: r["value"] for r in db["meta"].rows}
            if meta.get("app") != APP_ID:
                raise StorageError(f"{str(self.path)!r} is an SQLite file but not a meterlink database")
            version = int(meta.get("schema_version", 0))
            if version > SCHEMA_VERSION:
                raise StorageError(f"{str(self.path)!r} has schema version {version}, newer than this "
                                   f"meterlink ({SCHEMA_VERSION}): upgrade meterlink")
        if self.readonly:
            if version < SCHEMA_VERSION:
                self._upgrade_then_reopen(version)
            return
        db.enable_wal()
        db.execute("PRAGMA synchronous=NORMAL")
        db.execute("PRAGMA foreign_keys=ON")
        for v in sorted(MIGRATIONS):
            if v <= version:
                continue
            if version and v in _SLOW_MIGRATIONS:  # an existing file: say why opening it takes a while
                sys.stderr.write(f"meterlink: upgrading {str(self.path)!r} to schema {v}: "
                                 f"{_SLOW_MIGRATIONS[v]} (once)\n")
            with self.write():
                if v <= self._stored_version():  # another process opening the file did it meanwhile
                    continue
                MIGRATIONS[v](db)
                db["meta"].upsert({"key": "schema_version", "value": str(v)}, pk="key")

    def _upgrade_then_reopen(self, version: int) -> None:
        """A read-only open of a file of an older schema: upgrade it once (if writable), then read it."""
        self.db.conn.close()
        if not os.access(self.path, os.W_OK):
            raise StorageError(f"{str(self.path)!r} has schema version {version}, older than this meterlink "
                               f"({SCHEMA_VERSION}), and is read-only: copy it somewhere writable to upgrade it")
        Store(self.path, create=False).close()
        self.db = sqlite_utils.Database(open_readonly(self.path))

    def _stored_version(self) -> int:
        if "meta" not in self.db.table_names():
            return 0
        row = self.db.execute("select value from meta where key = 'schema_version'").fetchone()
        return int(row[0]) if row else 0

    @contextlib.contextmanager
    def write(self):
        """A write transaction that takes SQLite's write lock at its start (BEGIN IMMEDIATE).

        Several processes may write one file (a monitor, and someone assessing its data). A
        transaction begun deferred that reads before it writes cannot take the write lock once
        another connection has written, and fails at once with "database is locked"; this one
        waits for the lock (up to the connection's 10 s busy timeout). Nested: a savepoint.
        """
        conn = self.db.conn
        with self._lock:
            if conn.in_transaction:
                with self.db.atomic():
                    yield conn
                return
            conn.execute("BEGIN IMMEDIATE")
            try:
                yield conn
            except BaseException:
                if conn.in_transaction:
                    conn.execute("ROLLBACK")
                raise
            conn.execute("COMMIT")

    @property
    def schema_version(self) -> int:
        return int(self.db["meta"].get("schema_version")["value"])

    @property
    def journal_mode(self) -> str:
        return self.db.journal_mode

    def close(self) -> None:
        with self._lock:
            self.db.close()

    def __enter__(self) -> "Store":
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        failed_empty = exc_type is not None and self.created and self._holds_nothing_quietly()
        self.close()
        if failed_empty:
            self._remove_if_created()

    def _holds_nothing_quietly(self) -> bool:
        try:
            return self.holds_nothing()
        except sqlite3.Error:
            return False

    # -- devices and sessions ------------------------------------------------------------------
    def device_id(self, model: str, serial: str, probe_serial: str = "", cert_ref: str = "",
                  sensor_kind: int | None = None, fw_version: str = "", protocol_version: str = "") -> int:
        """Id of the device row with these identity fields, creating it on first sight."""
        row = {"model": model, "serial": serial, "probe_serial": probe_serial, "cert_ref": cert_ref,
               "sensor_kind": sensor_kind, "fw_version": fw_version, "protocol_version": protocol_version}
        with self.write():
            where = " and ".join(f"{k} is ?" for k in row)
            found = list(self.db["devices"].rows_where(where, list(row.values()), limit=1))
            if found:
                return int(found[0]["id"])
            return int(self.db["devices"].insert({**row, "first_seen_utc": time.time()}).last_pk)

    def begin_session(self, kind: str, port: str = "", device_id: int | None = None, interval_ms: int | None = None,
                      freq_hz: float | None = None, band_lo_hz: float | None = None,
                      band_hi_hz: float | None = None, notes: str = "", started_utc: float | None = None) -> int:
        """Create a session row and return its id."""
        row = {"kind": kind, "port": port, "device_id": device_id, "interval_ms": interval_ms,
               "freq_hz": freq_hz, "band_lo_hz": band_lo_hz, "band_hi_hz": band_hi_hz, "notes": notes,
               "started_utc": time.time() if started_utc is None else started_utc,
               "software_version": __version__}
        with self.write():
            return int(self.db["sessions"].insert(row).last_pk)

    def update_session(self, session_id: int, **fields: Any) -> None:
        """Set session columns (device_id, interval_ms, clock_*, notes, ...)."""
        with self.write():
            self.db["sessions"].update(session_id, fields)

    def make_room(self) -> bool:
        """After a write failed on a full disk: move the write-ahead log into the file and truncate it
        (PRAGMA wal_checkpoint(TRUNCATE)), which may free enough space to close a session. True if done."""
        with self._lock:
            try:
                busy = self.db.execute("PRAGMA wal_checkpoint(TRUNCATE)").fetchone()[0]
            except sqlite3.DatabaseError:
                return False
        return busy == 0

    def new_epoch(self, session_id: int, boot: int | None, reason: str, device_id: int | None = None,
                  started_utc: float | None = None) -> int:
        """Open an epoch of a session (one connection to a device) now and return its number.

        Readings are told apart by (session, boot, epoch, seq): a device that reuses a boot count it
        used before (a reflash, a replacement, a wrapped count) starts a new epoch and so never
        collides with readings already stored. A writer that batches uses epoch_row() instead.
        """
        row = epoch_row(session_id, boot, reason, device_id, started_utc)
        with self.write() as conn:
            self._insert_epochs(conn, [row])
        return row["id"]

    @staticmethod
    def _insert_epochs(conn: sqlite3.Connection, rows: list) -> None:
        conn.executemany("insert or ignore into epochs (id, session_id, boot, started_utc, reason, device_id) "
                         "values (:id, :session_id, :boot, :started_utc, :reason, :device_id)", rows)

    def end_session(self, session_id: int, ended_utc: float | None = None, **fields: Any) -> None:
        self.update_session(session_id, ended_utc=time.time() if ended_utc is None else ended_utc, **fields)

    def sessions(self) -> list[dict]:
        with self._lock:
            return list(self.db["sessions"].rows_where(order_by="id"))

    def session(self, session_id: int) -> dict:
        """One session row joined with its device's fields (device_model, ...); StorageError if absent."""
        with self._lock:
            rows = list(self.db.query(
                "select s.*, d.model as device_model, d.serial as device_serial, d.probe_serial as "
                "device_probe_serial, d.cert_ref as device_cert_ref, d.sensor_kind as device_sensor_kind, "
                "d.fw_version as device_fw_version, d.protocol_version as device_protocol_version "
                "from sessions s left join devices d on d.id = s.device_id where s.id = ?", [session_id]))
        if not rows:
            raise StorageError(f"no session {session_id} in {str(self.path)!r}")
        return rows[0]

    # -- hot path ------------------------------------------------------------------------------
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

    # -- queries -------------------------------------------------------------------------------
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
        """Events (detail decoded from JSON), in time order."""
        clauses, params = [], []
        if session_id is not None:
            clauses, params = ["session_id = ?"], [session_id]
        if kind is not None:
            clauses.append("kind = ?")
            params.append(kind)
        with self._lock:
            rows = list(self.db["events"].rows_where(" and ".join(clauses) or None, params, order_by="t_utc, id"))
        for r in rows:
            r["detail"] = json.loads(r["detail"]) if r["detail"] else {}
        return rows

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
        severity and calibrations, and the outcome of its latest assessment (if any)."""
        sql = """
            select s.id, s.kind, s.port, s.started_utc, s.ended_utc, s.notes, s.freq_hz, s.band_lo_hz, s.band_hi_hz,
                   d.model, d.serial, d.probe_serial, d.sensor_kind,
                   (select coalesce(sum(n), 0) from reading_spans r where r.session_id = s.id) as readings,
                   (select count(*) from spectra p where p.session_id = s.id) as spectra,
                   (select min(t_lo) from reading_spans r where r.session_id = s.id) as first_utc,
                   (select max(t_hi) from reading_spans r where r.session_id = s.id) as last_utc,
                   (select count(*) from events e where e.session_id = s.id) as events,
                   (select count(*) from events e where e.session_id = s.id and e.severity = 'warning') as warnings,
                   (select count(*) from events e where e.session_id = s.id and e.severity = 'error') as errors,
                   (select count(*) from calibrations c where c.session_id = s.id) as calibrations,
                   (select json_extract(e.detail, '$.outcome') from events e where e.session_id = s.id
                      and e.kind = 'assessment' order by e.t_utc desc, e.id desc limit 1) as last_outcome
            from sessions s left join devices d on d.id = s.device_id order by s.id"""
        with self._lock:
            return list(self.db.query(sql))

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
                         s_w_per_m2, u_expanded_db, flags) -> None:
        """Store one calibration's values for many readings in one transaction (NaN stored as NULL)."""
        def f(x):
            x = float(x)
            return x if x == x else None

        rows = [(int(i), calibration_id, f(e), f(a[0]), f(a[1]), f(a[2]), f(h), f(s_), f(u), int(fl))
                for i, e, a, h, s_, u, fl in zip(reading_ids, e_v_per_m, axes_v_per_m, h_a_per_m, s_w_per_m2,
                                                 u_expanded_db, flags)]
        with self.write():
            self.db.conn.executemany(
                "insert into field_values (reading_id, calibration_id, e_v_per_m, ex_v_per_m, ey_v_per_m, "
                "ez_v_per_m, h_a_per_m, s_w_per_m2, u_expanded_db, flags) values (?,?,?,?,?,?,?,?,?,?)", rows)

    def field_values(self, calibration_id: int) -> dict[str, np.ndarray]:
        """One calibration's values joined with reading times, ordered by time (NULL -> NaN)."""
        with self._lock:
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


class BatchWriter:
    """Buffers rows for one session and commits them by size or at most max_age_s after the first.

    A batch leaves the buffer only once it is stored: a commit that fails (a full disk, an I/O
    error) puts it back, and the next flush tries again. So that memory stays bounded while the
    file cannot be written, at most max_keep readings are kept; beyond that the oldest are dropped
    and the drop is itself kept as an event with the exact count and sequence ranges.
    """

    KINDS = ("readings", "statuses", "spectra", "events", "epochs")

    def __init__(self, store: Store, session_id: int, max_rows: int = 500, max_age_s: float = 1.0,
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
        self.dropped += extra
        events = self._buf["events"]
        count, ranges = extra, seq_ranges(gone)
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
