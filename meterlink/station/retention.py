"""Retention of a station database: every table that grows is thinned to its own age, a chunk at a time.

Tables and their limits (station file ``[retention]``, docs/station-file.md):
- raw readings and spectra (with their calibrated values, per reading and packed): ``raw_days``, and
  never past the newest stored 6-minute block less the longest window and the hold (a restart
  replays from there);
- ``status`` rows (battery, temperature: the context of the raw readings): ``status_days``;
- ``events`` of the station and its meters' sessions: ``events_days``;
- the derived series ``mon_block`` and ``mon_running``: ``derived_days``, 0 keeps them for ever.
Each step deletes at most ``chunk_rows`` rows in one short transaction, so the daemon interleaves
them with its commits and acquisition never waits long.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from meterlink.station import derived

from meterlink.storage import spans
from meterlink.storage.store import Store

DAY_S = 86400.0


@dataclass
class Task:
    """Delete rows of one table (for one meter's session, or the whole station) older than before_utc."""

    table: str                       # 'readings', 'status', 'events' or 'derived'
    before_utc: float
    meter: str | None = None
    session_ids: tuple = ()
    station_id: int | None = None
    removed: int = 0

    def step(self, store: Store, limit: int) -> int:
        """Delete up to ``limit`` rows; returns how many went (fewer than limit: the task is done)."""
        if self.table == "readings":
            n = thin_readings(store, self.session_ids[0], self.before_utc, limit)
        elif self.table == "status":
            n = _thin_by_time(store, "status", "session_id = ?", (self.session_ids[0],), self.before_utc, limit)
        elif self.table == "events":
            n = 0
            for sid in self.session_ids:            # per session: each delete uses (session_id, t_utc)
                cond, args = ("session_id IS NULL", ()) if sid is None else ("session_id = ?", (sid,))
                n += _thin_by_time(store, "events", cond, args, self.before_utc, limit - n)
                if n >= limit:
                    break
        elif self.table == "derived":
            n = _thin_by_time(store, "mon_block", "station_id = ?", (self.station_id,), self.before_utc, limit,
                              t_col="t_start_utc", key="rowid")
            n += _thin_by_time(store, "mon_running", "station_id = ?", (self.station_id,), self.before_utc,
                               limit - n, t_col="t_start_utc", key="rowid")
        else:
            raise ValueError(f"unknown retention table {self.table!r}")
        self.removed += n
        return n


def plan(conn, retention, station_id: int, meters, now_utc: float, longest_window_s: float) -> list[Task]:
    """The tasks of one retention pass. ``meters``: (name, session_id, interval_s) of each meter."""
    tasks = []
    raw_cut = now_utc - retention.raw_days * DAY_S
    for name, sid, interval_s in meters:
        end = derived.last_final_block_end(conn, station_id, name)
        if end is not None:     # raw readings only once the derived series covers them
            tasks.append(Task("readings", min(raw_cut, end - longest_window_s - 3.0 * interval_s, unsent_from(conn, sid)),
                              name, (sid,)))
        tasks.append(Task("status", now_utc - retention.status_days * DAY_S, name, (sid,)))
    tasks.append(Task("events", now_utc - retention.events_days * DAY_S,
                      session_ids=(*(sid for _, sid, _ in meters), None)))
    if retention.derived_days > 0:
        tasks.append(Task("derived", now_utc - retention.derived_days * DAY_S, station_id=station_id))
    return tasks


def unsent_from(conn, session_id: int) -> float:
    """Time of the session's oldest raw reading a central store has not acknowledged yet (docs/network.md);
    inf where raw readings are not sent or all were acknowledged. Retention never deletes past it."""
    row = conn.execute("SELECT acked FROM sync_cursor WHERE tbl = 'readings'").fetchone()
    if row is None:
        return math.inf
    t = conn.execute("SELECT min(t_utc) FROM readings WHERE id > ? AND session_id = ?", (row[0], session_id)).fetchone()[0]
    return math.inf if t is None else t


def thin_readings(store: Store, session_id: int, before_utc: float, limit: int) -> int:
    """Delete up to ``limit`` raw readings and spectra of a session older than before_utc (with their values)."""
    conn = store.db.conn
    with store.write():
        gone = spans.delete_before(conn, session_id, before_utc, limit, dependents=[("field_values", "reading_id")])
        _drop_packed_before(conn, session_id)
        left = limit - gone
        sp = [r[0] for r in conn.execute("SELECT id FROM spectra WHERE session_id=? AND t_utc < ? LIMIT ?",
                                         (session_id, before_utc, left))] if left > 0 else []
        if sp:
            marks = ",".join("?" * len(sp))
            conn.execute(f"DELETE FROM spectrum_values WHERE spectrum_line_id IN (SELECT id FROM spectrum_lines "
                         f"WHERE spectrum_id IN ({marks}))", sp)
            conn.execute(f"DELETE FROM spectrum_lines WHERE spectrum_id IN ({marks})", sp)
            conn.execute(f"DELETE FROM spectra WHERE id IN ({marks})", sp)
    return gone + len(sp)


def _drop_packed_before(conn, session_id: int) -> None:
    """Delete the packed values (field_spans) of the session's calibrations that lie wholly before its
    first remaining reading; a row cut only in part stays until it is wholly cut (readers keep only
    the readings still stored)."""
    first = conn.execute("SELECT min(id_lo) FROM reading_spans WHERE session_id = ?", (session_id,)).fetchone()[0]
    conn.execute("DELETE FROM field_spans WHERE calibration_id IN (SELECT id FROM calibrations WHERE session_id = ?) "
                 "AND id_hi < ?", (session_id, (1 << 63) - 1 if first is None else first))


def _thin_by_time(store: Store, table: str, cond: str, args: tuple, before_utc: float, limit: int,
                  t_col: str = "t_utc", key: str = "id") -> int:
    if limit <= 0:
        return 0
    with store.write() as conn:
        cur = conn.execute(f"DELETE FROM {table} WHERE {key} IN (SELECT {key} FROM {table} WHERE {cond} "
                           f"AND {t_col} < ? ORDER BY {t_col} LIMIT ?)", (*args, before_utc, limit))
        return cur.rowcount
