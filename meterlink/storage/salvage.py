"""Damaged database files: what is sound, which sessions still read whole, and copying those out.

A power cut or a failing card can leave pages SQLite cannot read ("database disk image is
malformed"). ``examine`` answers "is my file sound?" without ever failing on the damage itself:
SQLite's integrity check, the span index check, and then, per session, whether every one of its
rows still reads. ``salvage`` copies the sessions that read whole (with their ids, raw readings,
span index, events, calibrations and survey rows) and every other table that reads whole into a
new file, in the spirit of SQLite's ``.recover``, but keeping only what is known to be complete.
"""

from __future__ import annotations

import itertools
import sqlite3
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Iterable, Iterator

from meterlink.storage import spans
from meterlink.storage.store import Store, StorageError, describe_sqlite_error, open_readonly

# rows of a session in a table, as a WHERE clause over :sid (tables with a session_id column and
# not listed here use "session_id = :sid"); readings go span by span (see _session_rows)
_OWNED_BY = {
    "sessions": "id = :sid",
    "spectrum_lines": "spectrum_id in (select id from spectra where session_id = :sid)",
    "field_values": "calibration_id in (select id from calibrations where session_id = :sid)",
    "field_spans": "calibration_id in (select id from calibrations where session_id = :sid)",
    "spectrum_values": "calibration_id in (select id from calibrations where session_id = :sid)",
    "survey_samples": "point_id in (select id from survey_points where session_id = :sid)",
    "survey_emitters": "point_id in (select id from survey_points where session_id = :sid)",
    "sel_bands": "point_id in (select id from sel_points where session_id = :sid)",
    "sel_traces": "band_id in (select b.id from sel_bands b join sel_points p on p.id = b.point_id "
                  "where p.session_id = :sid)",
}
_GLOBAL_EVENTS = "events of no session"
# parents before children, so that foreign keys hold while copying
_ORDER = ("devices", "sessions", "readings", "reading_spans", "spectra", "spectrum_lines", "status", "events",
          "calibrations", "field_values", "field_spans", "spectrum_values", "survey", "survey_sources", "survey_points",
          "survey_samples", "survey_emitters", "survey_trace", "sel_points", "sel_bands", "sel_traces",
          "survey_photos", "survey_revisions")


@dataclass
class SessionState:
    """One session of a damaged file: whether all its rows read, the counts read, the first error."""

    session_id: int
    intact: bool
    rows: dict[str, int] = field(default_factory=dict)
    error: str | None = None
    readings_readable: int | None = None    # for a damaged session: readings in the spans that still read
    readings_indexed: int | None = None     # ... of this many in its span index


@dataclass
class Examination:
    """What `examine` found: problems (empty: sound), per-session states, unreadable shared tables."""

    path: str
    problems: list[str]
    sessions: list[SessionState]
    shared_tables: dict[str, str | None]   # table -> None if it reads whole, else the error
    schema_readable: bool = True

    @property
    def sound(self) -> bool:
        return not self.problems

    def as_dict(self) -> dict:
        return {"database": self.path, "sound": self.sound, "problems": self.problems,
                "schema_readable": self.schema_readable,
                "sessions": [{"id": s.session_id, "intact": s.intact, "rows": s.rows, "error": s.error,
                              "readings_readable": s.readings_readable, "readings_indexed": s.readings_indexed}
                             for s in self.sessions],
                "shared_tables": self.shared_tables}


def _tables(conn: sqlite3.Connection) -> list[str]:
    names = [r[0] for r in conn.execute("select name from sqlite_master where type = 'table' "
                                        "and name not like 'sqlite_%'")]
    return sorted(names, key=lambda n: (_ORDER.index(n) if n in _ORDER else len(_ORDER), n))


def _columns(conn: sqlite3.Connection, table: str) -> list[str]:
    return [r[1] for r in conn.execute(f"pragma table_info([{table}])")]


def _session_clause(conn: sqlite3.Connection, table: str) -> str | None:
    if table in _OWNED_BY:
        return _OWNED_BY[table]
    return "session_id = :sid" if "session_id" in _columns(conn, table) else None


def _has_spans(conn: sqlite3.Connection) -> bool:
    """Whether the file has the span index (schema 3 on; older files index readings per row)."""
    return conn.execute("select 1 from sqlite_master where name = 'reading_spans'").fetchone() is not None


def _session_rows(conn: sqlite3.Connection, table: str, sid: int) -> Iterator[tuple]:
    """All rows of one session in one table, streamed. Readings are read span by span through their
    id ranges, so that damage in another session's pages of the (unindexed) readings table does not
    spoil this one; a reading outside every span would be missed, which the span check reports."""
    if table == "readings" and _has_spans(conn):
        for lo, hi in conn.execute("select id_lo, id_hi from reading_spans where session_id = ? order by id_lo",
                                   (sid,)).fetchall():
            yield from conn.execute("select * from readings where id between ? and ? and session_id = ?",
                                    (lo, hi, sid))
        return
    yield from conn.execute(f"select * from [{table}] where {_session_clause(conn, table)}", {"sid": sid})


def _whole_row_sum(conn: sqlite3.Connection, table: str) -> str:
    """An SQL expression that makes SQLite decode every column of a row (overflow pages included),
    so that a count over it cannot be answered from an index alone and meets any damaged page."""
    return " + ".join(f"length(quote([{c}]))" for c in _columns(conn, table)) or "0"


def _session_count(conn: sqlite3.Connection, table: str, sid: int) -> int:
    """How many rows of one session a table holds, reading each whole (the count runs inside SQLite)."""
    expr = _whole_row_sum(conn, table)
    if table == "readings" and _has_spans(conn):
        n = 0
        for lo, hi in conn.execute("select id_lo, id_hi from reading_spans where session_id = ? order by id_lo",
                                   (sid,)).fetchall():
            n += conn.execute(f"select count(*), sum({expr}) from readings where id between ? and ? "
                              f"and session_id = ?", (lo, hi, sid)).fetchone()[0]
        return n
    return conn.execute(f"select count(*), sum({expr}) from [{table}] where {_session_clause(conn, table)}",
                        {"sid": sid}).fetchone()[0]


def _count_readable_readings(conn: sqlite3.Connection, st: SessionState) -> None:
    """How many of a damaged session's readings still read, span by span (None if the spans do not)."""
    try:
        spans_ = conn.execute("select id_lo, id_hi, n from reading_spans where session_id = ?",
                              (st.session_id,)).fetchall()
    except sqlite3.DatabaseError:
        return
    expr, ok = _whole_row_sum(conn, "readings"), 0
    for lo, hi, _ in spans_:
        try:
            ok += conn.execute(f"select count(*), sum({expr}) from readings where id between ? and ? "
                               f"and session_id = ?", (lo, hi, st.session_id)).fetchone()[0]
        except sqlite3.DatabaseError:
            continue
    st.readings_readable, st.readings_indexed = ok, sum(n for _, _, n in spans_)


def examine(path: str | Path, progress: Callable[[str, int, int], None] | None = None) -> Examination:
    """Check a database file and say, per session, what still reads whole. Never raises on damage."""
    p = Path(path)
    conn = open_readonly(p)   # StorageError for a missing, empty, non-SQLite or unreadable file
    try:
        return _examine(conn, str(p), progress or (lambda *_: None))
    finally:
        conn.close()


def _examine(conn: sqlite3.Connection, name: str, progress) -> Examination:
    problems: list[str] = []
    progress("SQLite integrity check", 0, 1)
    try:
        rows = [r[0] for r in conn.execute("PRAGMA integrity_check").fetchall()]
        problems += [] if rows == ["ok"] else [f"sqlite: {r}" for r in rows]
    except sqlite3.DatabaseError as exc:
        problems.append(f"sqlite: integrity check stopped: {exc}")
    progress("SQLite integrity check", 1, 1)
    try:
        tables = _tables(conn)
        ids = [r[0] for r in conn.execute("select id from sessions order by id")]
    except sqlite3.DatabaseError as exc:
        problems.append(f"the list of sessions cannot be read: {exc}")
        return Examination(name, problems, [], {}, schema_readable=False)
    if "reading_spans" in tables:
        try:
            problems += spans.check(conn, lambda d, t: progress("span index", d, t))
        except sqlite3.DatabaseError as exc:
            problems.append(f"span index: check stopped: {exc}")
    progress("span index", 1, 1)
    states = []
    owned = [t for t in tables if _session_clause(conn, t) is not None]
    for k, sid in enumerate(ids):
        progress("sessions", k, len(ids))
        st = SessionState(sid, True)
        for t in owned:
            try:
                st.rows[t] = _session_count(conn, t, sid)
            except sqlite3.DatabaseError as exc:
                st.intact, st.error = False, f"{t}: {exc}"
                break
        if not st.intact and _has_spans(conn):
            _count_readable_readings(conn, st)
        states.append(st)
    shared = {}
    for t in tables:
        if t in owned:
            continue
        try:
            conn.execute(f"select count(*), sum({_whole_row_sum(conn, t)}) from [{t}]").fetchone()
            shared[t] = None
        except sqlite3.DatabaseError as exc:
            shared[t] = str(exc)
    if "events" in tables:      # station-wide events belong to no session
        try:
            conn.execute(f"select count(*), sum({_whole_row_sum(conn, 'events')}) from events "
                         f"where session_id is null").fetchone()
            shared[_GLOBAL_EVENTS] = None
        except sqlite3.DatabaseError as exc:
            shared[_GLOBAL_EVENTS] = str(exc)
    for t, err in shared.items():
        if err:
            problems.append(f"{t} does not read whole: {err}")
    return Examination(name, problems, states, shared)


def salvage(src: str | Path, out: str | Path) -> tuple[Examination, list[int]]:
    """Copy every session that reads whole, and every other table that reads whole, from src into a
    new file out (which must not exist). Returns the examination and the ids of the sessions copied."""
    out_p = Path(out)
    if out_p.exists():
        raise StorageError(f"--salvage {str(out_p)!r} exists: give a new file name")
    ex = examine(src)
    if not ex.schema_readable:
        raise StorageError(f"{str(src)!r}: the list of sessions cannot be read; meterlink can salvage nothing")
    conn = open_readonly(src)
    copied: list[int] = []
    try:
        with Store(out_p) as dest:
            d = dest.db.conn
            with dest.write():
                d.execute("PRAGMA defer_foreign_keys = ON")
                for t, err in ex.shared_tables.items():
                    if err is None and t not in ("meta", _GLOBAL_EVENTS):
                        _copy(conn, d, t, conn.execute(f"select * from [{t}]"))
                tables = [t for t in _tables(conn) if t not in ex.shared_tables]
                for st in ex.sessions:
                    if not st.intact:
                        continue
                    for t in tables:
                        _copy(conn, d, t, _session_rows(conn, t, st.session_id))
                    copied.append(st.session_id)
                if ex.shared_tables.get(_GLOBAL_EVENTS, "absent") is None:
                    _copy(conn, d, "events", conn.execute("select * from events where session_id is null"))
                if not _has_spans(conn):    # a file from before the span index: build it for the copy
                    d.execute("insert into reading_spans (session_id, boot, seq_lo, seq_hi, id_lo, id_hi, t_lo, "
                              "t_hi, n) select session_id, boot, min(seq), max(seq), min(id), max(id), min(t_utc), "
                              f"max(t_utc), count(*) from readings group by session_id, boot, id / {spans.SPAN_ROWS} "
                              "order by min(id)")
                problems = spans.check(d)
                if problems:
                    raise StorageError(f"salvaged copy {str(out_p)!r} failed its span check: {problems[0]}")
    except sqlite3.DatabaseError as exc:
        raise describe_sqlite_error(src, exc) from None
    finally:
        conn.close()
    return ex, copied


def _copy(src: sqlite3.Connection, dest: sqlite3.Connection, table: str, rows: Iterable[tuple]) -> None:
    """Insert rows of src's table into dest's table of that name, by the columns both have (streamed)."""
    have = _columns(src, table)
    want = set(_columns(dest, table)) if dest.execute(
        "select 1 from sqlite_master where type = 'table' and name = ?", (table,)).fetchone() else set()
    if not want:   # a table this meterlink does not create (another program's): recreate its schema
        sql = src.execute("select sql from sqlite_master where type = 'table' and name = ?", (table,)).fetchone()[0]
        dest.execute(sql)
        want = set(have)
    idx = [i for i, c in enumerate(have) if c in want]
    cols = ", ".join(f"[{have[i]}]" for i in idx)
    marks = ", ".join("?" for _ in idx)
    it = iter(rows)
    while chunk := list(itertools.islice(it, 5000)):
        dest.executemany(f"insert or replace into [{table}] ({cols}) values ({marks})",
                         [tuple(r[i] for i in idx) for r in chunk])
