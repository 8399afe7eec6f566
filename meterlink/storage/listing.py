"""Read-only listings of a meterlink database on plain sqlite3: the one place of their SQL.

``meterlink sessions`` lists through these on a bare read-only connection (no numpy, no sqlite-utils:
the command starts in a fraction of the Store's import time); the Store's ``session_overview`` and
``events`` call the same functions on its own connection, so each query is written once.
"""

from __future__ import annotations

import json
import sqlite3
from pathlib import Path

from meterlink.storage.files import StorageError, open_readonly
from meterlink.storage.schema import APP_ID, SCHEMA_VERSION

OVERVIEW_SQL = """
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
              and e.kind = 'assessment' order by e.t_utc desc, e.id desc limit 1) as last_outcome,
           case when s.kind = 'survey' then (select json_group_array(p.verdict) from survey_points p
              where p.session_id = s.id and p.replaced_by is null) end as survey_point_verdicts,
           case when s.kind = 'survey' then (select json_group_array(p.verdict_extrapolated) from survey_points p
              where p.session_id = s.id and p.replaced_by is null) end as survey_point_verdicts_extrapolated,
           case when s.kind = 'survey' then (exists (select 1 from survey_sources c where c.session_id = s.id)
              or exists (select 1 from sel_bands b join sel_points q on q.id = b.point_id
                         where q.session_id = s.id and b.extrapolation_json is not null)) end as survey_max_power
    from sessions s left join devices d on d.id = s.device_id order by s.id"""


def _dicts(cur: sqlite3.Cursor) -> list[dict]:
    cols = [c[0] for c in cur.description]
    return [dict(zip(cols, r)) for r in cur.fetchall()]


def schema_version(conn: sqlite3.Connection, path: str | Path) -> int:
    """The schema version a file records (0: an empty file); StorageError if it is an SQLite file but not
    a meterlink database, or one written by a newer meterlink."""
    tables = {r[0] for r in conn.execute("select name from sqlite_master where type = 'table'")}
    if not tables:
        return 0
    if "meta" not in tables:
        raise StorageError(f"{str(path)!r} is an SQLite file but not a meterlink database")
    meta = dict(conn.execute("select key, value from meta").fetchall())
    if meta.get("app") != APP_ID:
        raise StorageError(f"{str(path)!r} is an SQLite file but not a meterlink database")
    version = int(meta.get("schema_version", 0))
    if version > SCHEMA_VERSION:
        raise StorageError(f"{str(path)!r} has schema version {version}, newer than this "
                           f"meterlink ({SCHEMA_VERSION}): upgrade meterlink")
    return version


def open_current(path: str | Path) -> sqlite3.Connection | None:
    """A read-only connection to a meterlink file of the current schema; None when the file is of an
    older schema (the caller opens it through the Store, which upgrades it once). StorageError naming
    the file if it is missing, damaged or not a meterlink database."""
    conn = open_readonly(path)
    try:
        version = schema_version(conn, path)
    except BaseException:
        conn.close()
        raise
    if version < SCHEMA_VERSION:
        conn.close()
        return None
    return conn


def session_overview(conn: sqlite3.Connection) -> list[dict]:
    """One row per session with its device, span and counts of readings, spectra, events by severity
    and calibrations, and the outcome of its latest assessment (if any); for a survey, the outcomes of
    its points' current captures as measured and at maximum power (survey_point_verdicts[_extrapolated],
    JSON lists) and whether a maximum power was declared (survey_max_power): the site's outcomes are read
    from them by meterlink.survey.outcome, the rule of the survey report's conclusion)."""
    return _dicts(conn.execute(OVERVIEW_SQL))


def events(conn: sqlite3.Connection, session_id: int | None = None, kind: str | None = None) -> list[dict]:
    """Events (detail decoded from JSON), in time order; of one session and/or one kind if given."""
    clauses, params = [], []
    if session_id is not None:
        clauses.append("session_id = ?")
        params.append(session_id)
    if kind is not None:
        clauses.append("kind = ?")
        params.append(kind)
    where = f" where {' and '.join(clauses)}" if clauses else ""
    rows = _dicts(conn.execute(f"select * from events{where} order by t_utc, id", params))
    for r in rows:
        r["detail"] = json.loads(r["detail"]) if r["detail"] else {}
    return rows


def require_session(conn: sqlite3.Connection, session_id: int, path: str | Path) -> None:
    """StorageError naming the file unless it holds session ``session_id``."""
    if conn.execute("select 1 from sessions where id = ?", [session_id]).fetchone() is None:
        raise StorageError(f"no session {session_id} in {str(path)!r}")
