"""The span index of the readings table: where a session's readings lie, by boot, sequence and time.

Raw readings arrive in order and in bulk, and are looked up only by session and time, or checked
for repeats by (session, boot, seq). Keeping a per-row index for each of those costs about as much
as writing the rows, and roughly doubles the file. So ``readings`` has no secondary index; instead
``reading_spans`` holds one row per run of up to SPAN_ROWS readings of one (session, boot), with
the exact bounds of their ids, sequence numbers and times (a block-range index). Invariants, kept
by every insert and delete here in the same transaction as the rows:

- the spans of one (session, boot) have disjoint id ranges, and a span's readings are exactly the
  rows of its session and boot inside [id_lo, id_hi]; every stored reading is in one span;
- ``n`` counts them, and [id_lo, id_hi], [seq_lo, seq_hi], [t_lo, t_hi] are their exact bounds.

A span's id range may also hold rows of other sessions or boots (several meters write one file),
so row queries always filter on session_id too. ``check`` verifies the invariants.
"""

from __future__ import annotations

import sqlite3
from typing import Callable, Iterable, Sequence

import numpy as np

SPAN_ROWS = 4096  # readings per span, soft cap: a single batch larger than this gets one span of its own

DDL = (
    "CREATE TABLE reading_spans (id INTEGER PRIMARY KEY, "
    "session_id INTEGER NOT NULL REFERENCES sessions(id), boot INTEGER NOT NULL, "
    "seq_lo INTEGER NOT NULL, seq_hi INTEGER NOT NULL, id_lo INTEGER NOT NULL, id_hi INTEGER NOT NULL, "
    "t_lo REAL NOT NULL, t_hi REAL NOT NULL, n INTEGER NOT NULL)",
    "CREATE INDEX reading_spans_seq ON reading_spans (session_id, boot, seq_hi)",
    "CREATE INDEX reading_spans_boot ON reading_spans (session_id, boot)",  # newest span of a boot, by id
    "CREATE INDEX reading_spans_time ON reading_spans (session_id, t_hi)",
)

INSERT_SQL = ("insert into readings (session_id, boot, seq, tick_ms, t_utc, raw_x, raw_y, raw_z, flags, "
              "range_index) values (?,?,?,?,?,?,?,?,?,?)")
_I64 = (-(2 ** 63), 2 ** 63 - 1)


def create(conn: sqlite3.Connection) -> None:
    """Create reading_spans, fill it from the readings already stored, and drop the per-row indexes."""
    for stmt in DDL:
        conn.execute(stmt)
    conn.execute(
        "insert into reading_spans (session_id, boot, seq_lo, seq_hi, id_lo, id_hi, t_lo, t_hi, n) "
        "select session_id, boot, min(seq), max(seq), min(id), max(id), min(t_utc), max(t_utc), count(*) "
        f"from readings group by session_id, boot, id / {SPAN_ROWS} order by min(id)")
    conn.execute("DROP INDEX IF EXISTS idx_readings_session_id_boot_seq")
    conn.execute("DROP INDEX IF EXISTS idx_readings_session_id_t_utc")


# -- writing -----------------------------------------------------------------------------------
def _keys(tuples: Sequence[tuple]) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """(boot, seq, t_utc, usable) of reading tuples laid out as INSERT_SQL's parameters.

    A row is usable when boot and seq are 64-bit integers and t_utc a finite number; others are
    refused, since a reading that cannot be placed by sequence and time cannot be deduplicated or found.
    """
    n = len(tuples)
    try:  # the common case: every row well formed
        boot = np.array([t[1] for t in tuples], dtype=np.int64)
        seq = np.array([t[2] for t in tuples], dtype=np.int64)
        t_utc = np.array([t[4] for t in tuples], dtype=float)
        if all(type(t[1]) is int and type(t[2]) is int for t in tuples):
            return boot, seq, t_utc, np.isfinite(t_utc)
    except (TypeError, ValueError, OverflowError, IndexError):
        pass
    boot, seq, t_utc = np.zeros(n, np.int64), np.zeros(n, np.int64), np.zeros(n)
    ok = np.zeros(n, bool)
    for i, t in enumerate(tuples):
        try:
            b, s, tt = t[1], t[2], t[4]
        except (TypeError, IndexError):
            continue
        if (type(b) is int and type(s) is int and _I64[0] <= b <= _I64[1] and _I64[0] <= s <= _I64[1]
                and isinstance(tt, (int, float)) and not isinstance(tt, bool) and np.isfinite(tt)):
            boot[i], seq[i], t_utc[i], ok[i] = b, s, float(tt), True
    return boot, seq, t_utc, ok


def _repeats(conn: sqlite3.Connection, session_id: int, boot: np.ndarray, seq: np.ndarray,
             live: np.ndarray) -> np.ndarray:
    """Mask of live rows whose (boot, seq) is already stored or came earlier in this batch."""
    rep = np.zeros(boot.shape, bool)
    idx = np.flatnonzero(live)
    if idx.size == 0:
        return rep
    b, s = boot[idx], seq[idx]
    one_boot = bool(np.all(b == b[0]))
    if not (one_boot and np.all(s[1:] > s[:-1])):  # the usual batch is one boot, rising seq
        order = np.lexsort((idx, s, b))  # by boot, seq, then arrival: the first copy is kept
        same = np.r_[False, (b[order][1:] == b[order][:-1]) & (s[order][1:] == s[order][:-1])]
        rep[idx[order[same]]] = True
    for bb in ([int(b[0])] if one_boot else np.unique(b).tolist()):
        sel = live & ~rep if one_boot else live & ~rep & (boot == bb)
        if not sel.any():
            continue
        lo, hi = int(seq[sel].min()), int(seq[sel].max())
        stored: list[int] = []
        for id_lo, id_hi in conn.execute("select id_lo, id_hi from reading_spans where session_id = ? and boot = ? "
                                         "and seq_hi >= ? and seq_lo <= ?", (session_id, bb, lo, hi)).fetchall():
            stored += [x for (x,) in conn.execute("select seq from readings where id between ? and ? and "
                                                  "session_id = ? and boot = ? and seq between ? and ?",
                                                  (id_lo, id_hi, session_id, bb, lo, hi))]
        if stored:
            rep |= sel & np.isin(seq, np.array(stored, dtype=np.int64))
    return rep


def _max_id(conn: sqlite3.Connection) -> int:
    return int(conn.execute("select coalesce(max(id), 0) from readings").fetchone()[0])


def insert(conn: sqlite3.Connection, session_id: int, tuples: Sequence[tuple],
           keys: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None,
           sql: str = INSERT_SQL) -> tuple[int, int, list[tuple[int, str]]]:
    """Store readings not already stored, and keep the spans exact; call inside a transaction.

    tuples are INSERT_SQL's parameters, or, when keys (the rows' boot, seq and t_utc as arrays)
    are given, the parameters of ``sql``: an INSERT into readings that may carry columns common to
    all rows as literals. Returns (new, repeated, refused), refused listing (row index, reason).
    """
    n = len(tuples)
    if n == 0:
        return 0, 0, []
    if keys is None:
        sql = INSERT_SQL
        boot, seq, t_utc, ok = _keys(tuples)
    else:
        boot, seq, t_utc = (np.asarray(k) for k in keys)
        ok = np.isfinite(t_utc)
    refused = [(int(i), "boot and seq must be integers and t_utc a finite time") for i in np.flatnonzero(~ok)]
    rep = _repeats(conn, session_id, boot, seq, ok)
    take = ok & ~rep
    idx = np.flatnonzero(take)
    rows = tuples if idx.size == n else [tuples[i] for i in idx.tolist()]
    stored = np.ones(idx.size, bool)
    first = _max_id(conn) + 1
    conn.execute("savepoint ml_spans")  # a failing executemany may have stored some rows: undo them
    try:
        conn.executemany(sql, rows)
        conn.execute("release ml_spans")
    except (TypeError, ValueError, OverflowError, sqlite3.Error):
        conn.execute("rollback to ml_spans")
        conn.execute("release ml_spans")
        for k, row in enumerate(rows):  # find the bad rows one by one; the good ones still go in
            try:
                conn.execute(sql, row)
            except (TypeError, ValueError, OverflowError, sqlite3.Error) as exc:
                stored[k] = False
                refused.append((int(idx[k]), str(exc)))
    last = _max_id(conn)
    new = int(stored.sum())
    if new:
        got = idx[stored]
        if last - first + 1 == new:  # SQLite gave each new row max(id) + 1: ids in insertion order
            ids = np.arange(first, last + 1)
        else:  # not seen, but cheap to be exact anyway: read back what was stored
            ids = np.array([i for (i,) in conn.execute("select id from readings where id >= ? order by id", (first,))])
        _extend(conn, session_id, boot[got], seq[got], t_utc[got], ids)
    return new, int(rep.sum()), sorted(refused)


def _extend(conn: sqlite3.Connection, session_id: int, boot: np.ndarray, seq: np.ndarray, t_utc: np.ndarray,
            ids: np.ndarray) -> None:
    """Account for just-inserted readings (their ids in ``ids``): grow each boot's newest span or start one.

    Only the newest span of a (session, boot) ever grows, so that boot's spans keep disjoint id
    ranges and a span's readings are exactly its session's and boot's rows inside its id range.
    """
    one_boot = bool(np.all(boot == boot[0]))
    for bb in ([int(boot[0])] if one_boot else np.unique(boot).tolist()):
        s, t, i = (seq, t_utc, ids) if one_boot else (seq[boot == bb], t_utc[boot == bb], ids[boot == bb])
        lo, hi, t_lo, t_hi, k = int(s.min()), int(s.max()), float(t.min()), float(t.max()), int(s.size)
        id_lo, id_hi = int(i.min()), int(i.max())
        last = conn.execute("select id, seq_hi, n from reading_spans where session_id = ? and boot = ? "
                            "order by id desc limit 1", (session_id, bb)).fetchone()
        if last is not None and last[1] < lo and last[2] + k <= SPAN_ROWS:
            conn.execute("update reading_spans set seq_hi = ?, id_hi = ?, t_lo = min(t_lo, ?), t_hi = max(t_hi, ?), "
                         "n = n + ? where id = ?", (hi, id_hi, t_lo, t_hi, k, last[0]))
        else:
            conn.execute("insert into reading_spans (session_id, boot, seq_lo, seq_hi, id_lo, id_hi, t_lo, t_hi, n) "
                         "values (?,?,?,?,?,?,?,?,?)", (session_id, bb, lo, hi, id_lo, id_hi, t_lo, t_hi, k))


# -- reading -----------------------------------------------------------------------------------
def id_ranges(conn: sqlite3.Connection, session_id: int, t0: float | None = None,
              t1: float | None = None) -> list[tuple[int, int]]:
    """Disjoint, ascending id ranges holding every reading of the session with t0 <= t_utc < t1."""
    where, params = "session_id = ?", [session_id]
    if t0 is not None:
        where, params = where + " and t_hi >= ?", params + [t0]
    if t1 is not None:
        where, params = where + " and t_lo < ?", params + [t1]
    spans = conn.execute(f"select id_lo, id_hi from reading_spans where {where} order by id_lo", params).fetchall()
    out: list[list[int]] = []
    for lo, hi in spans:
        if out and lo <= out[-1][1] + 1:  # touching or overlapping: one range
            out[-1][1] = max(out[-1][1], hi)
        else:
            out.append([lo, hi])
    return [(lo, hi) for lo, hi in out]


def select(conn: sqlite3.Connection, columns: str, session_id: int, t0: float | None = None,
           t1: float | None = None) -> list[tuple]:
    """Rows (the given columns) of a session's readings with t0 <= t_utc < t1, in id order."""
    where, extra = "id between ? and ? and session_id = ?", []
    if t0 is not None:
        where, extra = where + " and t_utc >= ?", extra + [t0]
    if t1 is not None:
        where, extra = where + " and t_utc < ?", extra + [t1]
    rows: list[tuple] = []
    for lo, hi in id_ranges(conn, session_id, t0, t1):
        rows += conn.execute(f"select {columns} from readings where {where} order by id",
                             [lo, hi, session_id, *extra]).fetchall()
    return rows


def summary(conn: sqlite3.Connection, session_id: int) -> tuple[int, float | None, float | None]:
    """(count, first t_utc, last t_utc) of a session's readings, from the spans alone."""
    n, t0, t1 = conn.execute("select coalesce(sum(n), 0), min(t_lo), max(t_hi) from reading_spans "
                             "where session_id = ?", (session_id,)).fetchone()
    return int(n), t0, t1


# -- deleting ----------------------------------------------------------------------------------
def delete_before(conn: sqlite3.Connection, session_id: int, before_utc: float, limit: int,
                  dependents: Iterable[tuple[str, str]] = ()) -> int:
    """Delete up to ``limit`` of a session's oldest readings with t_utc < before_utc (and rows of
    ``dependents``, (table, reading-id column) pairs, that refer to them); returns how many went."""
    left, done = limit, 0
    spans = conn.execute("select id, boot, id_lo, id_hi from reading_spans where session_id = ? and t_lo < ? "
                         "order by t_lo, id", (session_id, before_utc)).fetchall()
    for span_id, boot, lo, hi in spans:
        if left <= 0:
            break
        ids = [i for (i,) in conn.execute("select id from readings where id between ? and ? and session_id = ? "
                                          "and boot = ? and t_utc < ? order by id limit ?",
                                          (lo, hi, session_id, boot, before_utc, left))]
        if not ids:
            continue
        for k in range(0, len(ids), 500):
            part = ids[k:k + 500]
            marks = ",".join("?" * len(part))
            for table, col in dependents:
                conn.execute(f"delete from {table} where {col} in ({marks})", part)
            conn.execute(f"delete from readings where id in ({marks})", part)
        refresh(conn, span_id)
        left -= len(ids)
        done += len(ids)
    return done


def refresh(conn: sqlite3.Connection, span_id: int) -> None:
    """Recompute one span's bounds and count from its readings (after a delete); drop it if empty."""
    sid, boot, lo, hi = conn.execute("select session_id, boot, id_lo, id_hi from reading_spans where id = ?",
                                     (span_id,)).fetchone()
    row = _measure(conn, sid, boot, lo, hi)
    if row[0] == 0:
        conn.execute("delete from reading_spans where id = ?", (span_id,))
    else:
        conn.execute("update reading_spans set n = ?, seq_lo = ?, seq_hi = ?, id_lo = ?, id_hi = ?, t_lo = ?, "
                     "t_hi = ? where id = ?", (*row, span_id))


def _measure(conn: sqlite3.Connection, session_id: int, boot: int, id_lo: int, id_hi: int) -> tuple:
    """(n, seq_lo, seq_hi, id_lo, id_hi, t_lo, t_hi) of one session's and boot's readings in an id range."""
    return tuple(conn.execute("select count(*), min(seq), max(seq), min(id), max(id), min(t_utc), max(t_utc) "
                              "from readings where id between ? and ? and session_id = ? and boot = ?",
                              (id_lo, id_hi, session_id, boot)).fetchone())


def check(conn: sqlite3.Connection, progress: Callable[[int, int], None] | None = None) -> list[str]:
    """Problems with the span invariants (empty when the index is sound); reads every reading.

    progress, if given, is called as progress(spans_done, spans_total) along the way.
    """
    problems = []
    counted = dict(conn.execute("select session_id, count(*) from readings group by session_id").fetchall())
    in_spans = dict(conn.execute("select session_id, sum(n) from reading_spans group by session_id").fetchall())
    for sid in sorted(set(counted) | set(in_spans)):
        if counted.get(sid, 0) != in_spans.get(sid, 0):
            problems.append(f"session {sid}: {counted.get(sid, 0)} readings stored, {in_spans.get(sid, 0)} in spans")
    all_spans = conn.execute("select id, session_id, boot, seq_lo, seq_hi, id_lo, id_hi, t_lo, t_hi, n "
                             "from reading_spans").fetchall()
    for k, (span_id, sid, boot, s_lo, s_hi, i_lo, i_hi, t_lo, t_hi, n) in enumerate(all_spans):
        if progress is not None and k % 64 == 0:
            progress(k, len(all_spans))
        row = _measure(conn, sid, boot, i_lo, i_hi)
        if row != (n, s_lo, s_hi, i_lo, i_hi, t_lo, t_hi):
            problems.append(f"span {span_id} (session {sid}, boot {boot}) says n={n}, seq {s_lo}..{s_hi}, "
                            f"id {i_lo}..{i_hi}, t {t_lo}..{t_hi}; its readings give {row}")
    overlap = conn.execute("select count(*) from reading_spans a join reading_spans b on a.session_id = b.session_id "
                           "and a.boot = b.boot and a.id < b.id and a.id_lo <= b.id_hi and b.id_lo <= a.id_hi"
                           ).fetchone()[0]
    if overlap:
        problems.append(f"{overlap} pair(s) of spans of one session and boot overlap in ids")
    return problems
