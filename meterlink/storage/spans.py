"""The span index of the readings table: where a session's readings lie, by boot, sequence and time.

Raw readings arrive in order and in bulk, and are looked up only by session and time, or checked
for repeats by (session, boot, epoch, seq). An epoch is one connection to one device (schema 4): a
meter that restarts with a boot count it used before (a reflash, a replacement unit, a wrapped
count) starts a new epoch, so its readings are never taken for ones already stored. Keeping a
per-row index for each of those costs about as much as writing the rows, and roughly doubles the file. So ``readings`` has no secondary index; instead
``reading_spans`` holds one row per run of up to SPAN_ROWS readings of one (session, boot, epoch),
with the exact bounds of their ids, sequence numbers and times (a block-range index). Invariants, kept
by every insert and delete here in the same transaction as the rows:

- the spans of one (session, boot, epoch) have disjoint id ranges, and a span's readings are exactly
  the rows of its session, boot and epoch inside [id_lo, id_hi]; every stored reading is in one span;
- ``n`` counts them, and [id_lo, id_hi], [seq_lo, seq_hi], [t_lo, t_hi] are their exact bounds.

A span's id range may also hold rows of other sessions, boots or epochs (several meters write one file),
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
              "range_index, epoch) values (?,?,?,?,?,?,?,?,?,?,?)")
# the device's own content of a reading, as INSERT_SQL parameter positions: a repeat of (boot,
# epoch, seq) is a duplicate only when these match too (tick_ms, raw_x, raw_y, raw_z, flags, range_index)
CONTENT_POS = (3, 5, 6, 7, 8, 9)
CONTENT_COLUMNS = "tick_ms, raw_x, raw_y, raw_z, flags, range_index"
_I64 = (-(2 ** 63), 2 ** 63 - 1)
# errors that belong to one row (cannot be bound or violate a constraint); anything else (a full disk,
# an I/O error, a lock) belongs to the transaction and must reach the caller, who keeps the batch
_ROW_ERRORS = (TypeError, ValueError, OverflowError, sqlite3.IntegrityError, sqlite3.InterfaceError,
               sqlite3.ProgrammingError, sqlite3.DataError)


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


def add_epochs(conn: sqlite3.Connection) -> None:
    """Schema 4: readings and spans gain an epoch (0 for everything stored before); no row is rewritten."""
    conn.execute("ALTER TABLE readings ADD COLUMN epoch INTEGER NOT NULL DEFAULT 0")
    conn.execute("ALTER TABLE reading_spans ADD COLUMN epoch INTEGER NOT NULL DEFAULT 0")
    conn.execute("DROP INDEX IF EXISTS reading_spans_seq")
    conn.execute("DROP INDEX IF EXISTS reading_spans_boot")
    conn.execute("CREATE INDEX reading_spans_seq ON reading_spans (session_id, boot, epoch, seq_hi)")
    conn.execute("CREATE INDEX reading_spans_boot ON reading_spans (session_id, boot, epoch)")


# -- writing -----------------------------------------------------------------------------------
def _keys(tuples: Sequence[tuple]) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """(boot, seq, t_utc, epoch, usable) of reading tuples laid out as INSERT_SQL's parameters.

    A row is usable when boot, seq and epoch are 64-bit integers and t_utc a finite number; others
    are refused, since a reading that cannot be placed by sequence and time cannot be deduplicated or found.
    A tuple without the epoch (ten parameters) is of epoch 0.
    """
    n = len(tuples)
    try:  # the common case: every row well formed
        boot = np.array([t[1] for t in tuples], dtype=np.int64)
        seq = np.array([t[2] for t in tuples], dtype=np.int64)
        t_utc = np.array([t[4] for t in tuples], dtype=float)
        epoch = np.array([t[10] if len(t) > 10 else 0 for t in tuples], dtype=np.int64)
        if all(type(t[1]) is int and type(t[2]) is int and (len(t) <= 10 or type(t[10]) is int) for t in tuples):
            return boot, seq, t_utc, epoch, np.isfinite(t_utc)
    except (TypeError, ValueError, OverflowError, IndexError):
        pass
    boot, seq, t_utc, epoch = np.zeros(n, np.int64), np.zeros(n, np.int64), np.zeros(n), np.zeros(n, np.int64)
    ok = np.zeros(n, bool)
    for i, t in enumerate(tuples):
        try:
            b, s, tt = t[1], t[2], t[4]
            e = t[10] if len(t) > 10 else 0
        except (TypeError, IndexError):
            continue
        if (all(type(v) is int and _I64[0] <= v <= _I64[1] for v in (b, s, e))
                and isinstance(tt, (int, float)) and not isinstance(tt, bool) and np.isfinite(tt)):
            boot[i], seq[i], t_utc[i], epoch[i], ok[i] = b, s, float(tt), e, True
    return boot, seq, t_utc, epoch, ok


def _groups(boot: np.ndarray, epoch: np.ndarray, sel: np.ndarray) -> list[tuple[int, int, np.ndarray]]:
    """(boot, epoch, mask) for each (boot, epoch) among the selected rows; one group, the usual batch, cheaply."""
    idx = np.flatnonzero(sel)
    if idx.size == 0:
        return []
    b, e = boot[idx], epoch[idx]
    if np.all(b == b[0]) and np.all(e == e[0]):
        return [(int(b[0]), int(e[0]), sel)]
    pairs = sorted(set(zip(b.tolist(), e.tolist())))
    return [(bb, ee, sel & (boot == bb) & (epoch == ee)) for bb, ee in pairs]


def _repeats(conn: sqlite3.Connection, session_id: int, boot: np.ndarray, seq: np.ndarray, epoch: np.ndarray,
             live: np.ndarray, content: Callable[[int], tuple]) -> tuple[np.ndarray, int]:
    """(mask of live rows already stored or earlier in this batch, count of reused keys).

    A repeat has the same (boot, epoch, seq) AND the same content (content(i): the row's CONTENT_COLUMNS);
    a row that shares the key but not the content is a different reading: it is kept and counted as reused.
    """
    rep = np.zeros(boot.shape, bool)
    reused = 0
    idx = np.flatnonzero(live)
    if idx.size == 0:
        return rep, 0
    b, s, e = boot[idx], seq[idx], epoch[idx]
    if not (np.all(b == b[0]) and np.all(e == e[0]) and np.all(s[1:] > s[:-1])):  # the usual batch: rising seq
        order = np.lexsort((idx, s, e, b))  # by boot, epoch, seq, then arrival: the first copy is kept
        bo, eo, so = b[order], e[order], s[order]
        same = np.r_[False, (bo[1:] == bo[:-1]) & (eo[1:] == eo[:-1]) & (so[1:] == so[:-1])]
        seen: set = set()
        for k in range(order.size):
            i = int(idx[order[k]])
            if not same[k]:
                seen = {content(i)}
                continue
            c = content(i)
            if c in seen:
                rep[i] = True
            else:
                seen.add(c)
                reused += 1
    for bb, ee, sel in _groups(boot, epoch, live & ~rep):
        lo, hi = int(seq[sel].min()), int(seq[sel].max())
        stored: dict[int, set] = {}
        for id_lo, id_hi in conn.execute("select id_lo, id_hi from reading_spans where session_id = ? and boot = ? "
                                         "and epoch = ? and seq_hi >= ? and seq_lo <= ?",
                                         (session_id, bb, ee, lo, hi)).fetchall():
            for seq_i, *c in conn.execute(f"select seq, {CONTENT_COLUMNS} from readings where id between ? and ? "
                                          "and session_id = ? and boot = ? and epoch = ? and seq between ? and ?",
                                          (id_lo, id_hi, session_id, bb, ee, lo, hi)):
                stored.setdefault(seq_i, set()).add(tuple(c))
        if not stored:
            continue
        hit = sel & np.isin(seq, np.fromiter(stored, dtype=np.int64, count=len(stored)))
        for i in np.flatnonzero(hit).tolist():
            if content(i) in stored[int(seq[i])]:
                rep[i] = True
            else:
                reused += 1
    return rep, reused


def _max_id(conn: sqlite3.Connection) -> int:
    return int(conn.execute("select coalesce(max(id), 0) from readings").fetchone()[0])


def insert(conn: sqlite3.Connection, session_id: int, tuples: Sequence[tuple],
           keys: tuple | None = None, sql: str = INSERT_SQL) -> tuple[int, int, list[tuple[int, str]], int]:
    """Store readings not already stored, and keep the spans exact; call inside a transaction.

    tuples are INSERT_SQL's parameters, or, when keys (the rows' boot, seq, t_utc and epoch as
    arrays and their content as an (N, 6) array of CONTENT_COLUMNS) are given, the parameters of
    ``sql``: an INSERT into readings that may carry columns common to all rows as literals.
    Returns (new, repeated, refused, reused): refused lists (row index, reason); reused counts rows
    stored although their (boot, epoch, seq) was already taken by a reading of different content.
    """
    n = len(tuples)
    if n == 0:
        return 0, 0, [], 0
    if keys is None:
        sql = INSERT_SQL
        boot, seq, t_utc, epoch, ok = _keys(tuples)

        def content(i: int) -> tuple:
            t = tuples[i]
            return tuple(t[p] for p in CONTENT_POS)
    else:
        boot, seq, t_utc, epoch = (np.asarray(k) for k in keys[:4])
        ok = np.isfinite(t_utc)
        cont = keys[4]

        def content(i: int) -> tuple:
            return tuple(cont[i].tolist())
    refused = [(int(i), "boot, seq and epoch must be integers and t_utc a finite time") for i in np.flatnonzero(~ok)]
    rep, reused = _repeats(conn, session_id, boot, seq, epoch, ok, content)
    take = ok & ~rep
    idx = np.flatnonzero(take)
    rows = tuples if idx.size == n else [tuples[i] for i in idx.tolist()]
    stored = np.ones(idx.size, bool)
    first = _max_id(conn) + 1
    conn.execute("savepoint ml_spans")  # a failing executemany may have stored some rows: undo them
    try:
        conn.executemany(sql, rows)
        conn.execute("release ml_spans")
    except _ROW_ERRORS:  # a row SQLite cannot take; a full disk or an I/O error is raised to the caller
        conn.execute("rollback to ml_spans")
        conn.execute("release ml_spans")
        for k, row in enumerate(rows):  # find the bad rows one by one; the good ones still go in
            try:
                conn.execute(sql, row)
            except _ROW_ERRORS as exc:
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
        _extend(conn, session_id, boot[got], seq[got], t_utc[got], epoch[got], ids)
    return new, int(rep.sum()), sorted(refused), reused


def _extend(conn: sqlite3.Connection, session_id: int, boot: np.ndarray, seq: np.ndarray, t_utc: np.ndarray,
            epoch: np.ndarray, ids: np.ndarray) -> None:
    """Account for just-inserted readings (their ids in ``ids``): grow each group's newest span or start one.

    Only the newest span of a (session, boot, epoch) ever grows, so that group's spans keep disjoint
    id ranges and a span's readings are exactly its session's, boot's and epoch's rows inside its id range.
    """
    for bb, ee, sel in _groups(boot, epoch, np.ones(boot.shape, bool)):
        s, t, i = seq[sel], t_utc[sel], ids[sel]
        lo, hi, t_lo, t_hi, k = int(s.min()), int(s.max()), float(t.min()), float(t.max()), int(s.size)
        id_lo, id_hi = int(i.min()), int(i.max())
        last = conn.execute("select id, seq_hi, n from reading_spans where session_id = ? and boot = ? and epoch = ? "
                            "order by id desc limit 1", (session_id, bb, ee)).fetchone()
        if last is not None and last[1] < lo and last[2] + k <= SPAN_ROWS:
            conn.execute("update reading_spans set seq_hi = ?, id_hi = ?, t_lo = min(t_lo, ?), t_hi = max(t_hi, ?), "
                         "n = n + ? where id = ?", (hi, id_hi, t_lo, t_hi, k, last[0]))
        else:
            conn.execute("insert into reading_spans (session_id, boot, epoch, seq_lo, seq_hi, id_lo, id_hi, t_lo, "
                         "t_hi, n) values (?,?,?,?,?,?,?,?,?,?)", (session_id, bb, ee, lo, hi, id_lo, id_hi, t_lo,
                                                                   t_hi, k))

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


def in_ranges(ranges: Sequence[tuple[int, int]], ids: np.ndarray) -> np.ndarray:
    """Which of ``ids`` lie in one of the disjoint, ascending [lo, hi] ``ranges`` (as id_ranges gives)."""
    r = np.asarray(ranges, dtype=np.int64).reshape(-1, 2)
    k = np.searchsorted(r[:, 0], ids, side="right") - 1
    return (k >= 0) & (ids <= r[np.maximum(k, 0), 1]) if r.size else np.zeros(np.shape(ids), dtype=bool)


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
    spans = conn.execute("select id, boot, epoch, id_lo, id_hi from reading_spans where session_id = ? and t_lo < ? "
                         "order by t_lo, id", (session_id, before_utc)).fetchall()
    for span_id, boot, epoch, lo, hi in spans:
        if left <= 0:
            break
        ids = [i for (i,) in conn.execute("select id from readings where id between ? and ? and session_id = ? "
                                          "and boot = ? and epoch = ? and t_utc < ? order by id limit ?",
                                          (lo, hi, session_id, boot, epoch, before_utc, left))]
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
    sid, boot, epoch, lo, hi = conn.execute("select session_id, boot, epoch, id_lo, id_hi from reading_spans "
                                            "where id = ?", (span_id,)).fetchone()
    row = _measure(conn, sid, boot, epoch, lo, hi)
    if row[0] == 0:
        conn.execute("delete from reading_spans where id = ?", (span_id,))
    else:
        conn.execute("update reading_spans set n = ?, seq_lo = ?, seq_hi = ?, id_lo = ?, id_hi = ?, t_lo = ?, "
                     "t_hi = ? where id = ?", (*row, span_id))


def _measure(conn: sqlite3.Connection, session_id: int, boot: int, epoch: int, id_lo: int, id_hi: int) -> tuple:
    """(n, seq_lo, seq_hi, id_lo, id_hi, t_lo, t_hi) of one session's, boot's and epoch's readings in an id range."""
    return tuple(conn.execute("select count(*), min(seq), max(seq), min(id), max(id), min(t_utc), max(t_utc) "
                              "from readings where id between ? and ? and session_id = ? and boot = ? and epoch = ?",
                              (id_lo, id_hi, session_id, boot, epoch)).fetchone())


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
    all_spans = conn.execute("select id, session_id, boot, epoch, seq_lo, seq_hi, id_lo, id_hi, t_lo, t_hi, n "
                             "from reading_spans").fetchall()
    for k, (span_id, sid, boot, epoch, s_lo, s_hi, i_lo, i_hi, t_lo, t_hi, n) in enumerate(all_spans):
        if progress is not None and k % 64 == 0:
            progress(k, len(all_spans))
        row = _measure(conn, sid, boot, epoch, i_lo, i_hi)
        if row != (n, s_lo, s_hi, i_lo, i_hi, t_lo, t_hi):
            problems.append(f"span {span_id} (session {sid}, boot {boot}, epoch {epoch}) says n={n}, "
                            f"seq {s_lo}..{s_hi}, "
                            f"id {i_lo}..{i_hi}, t {t_lo}..{t_hi}; its readings give {row}")
    overlap = conn.execute("select count(*) from reading_spans a join reading_spans b on a.session_id = b.session_id "
                           "and a.boot = b.boot and a.epoch = b.epoch and a.id < b.id and a.id_lo <= b.id_hi "
                           "and b.id_lo <= a.id_hi").fetchone()[0]
    if overlap:
        problems.append(f"{overlap} pair(s) of spans of one session, boot and epoch overlap in ids")
    return problems
