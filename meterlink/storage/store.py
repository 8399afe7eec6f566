"""SQLite storage for sessions, raw readings, spectra, status and link events (docs/schema.md).

The Store opens database files through sqlite-utils and brings them to the current schema with
the migrations of schema.py (the version is kept in ``meta``); the readings' index lives in
spans.py. Raw device counts are stored as they arrived, so a later certificate can be re-applied.
"""

from __future__ import annotations

import contextlib
import os
import sqlite3
import sys
import threading
import time
from pathlib import Path
from typing import Any

import sqlite_utils

from meterlink import __version__

from meterlink.storage.schema import _SLOW_MIGRATIONS, APP_ID, MIGRATIONS, SCHEMA_VERSION  # noqa: F401 (re-exported)

from meterlink.storage.batch import BatchWriter  # noqa: F401 (re-exported)
from meterlink.storage.files import (DamagedDatabaseError, SQLITE_HEADER, StorageError,  # noqa: F401 (re-exported)
                                     check_database_file, describe_sqlite_error, open_readonly)
from meterlink.storage import listing
from meterlink.storage.queries import SessionQueries
from meterlink.storage.rows import (READING_COLUMNS, SEVERITIES, ReadingArrays,  # noqa: F401 (re-exported)
                                    epoch_row, event_row, seq_ranges)
from meterlink.storage.writing import ReadingWriter


class Store(ReadingWriter, SessionQueries):
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
        version = listing.schema_version(db.conn, self.path)   # refuses other SQLite files and newer schemas
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

