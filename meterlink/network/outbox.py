"""Station side of the sync: the station's SQLite file is the outbox (docs/network.md).

Once a station is set to sync, a trigger on each synced table logs every inserted row in ``sync_log``
(schema 6), and the rows already there are logged once, in the same transaction. A batch is the next
rows of one table after its cursor; the cursor advances, and the acknowledged log entries go, in one
local transaction only after the central store acknowledged the batch. Raw readings, where sent,
follow their own id instead of the log (a trigger per reading would cost as much as the reading).
"""

from __future__ import annotations

import sqlite3
import time

from meterlink.network.batch import TABLES

# synced tables with a row log, in the order they are sent (certificates before the rows that use them)
LOGGED = ("calibrations", "events", "mon_block", "mon_running")
_WHERE = {"calibrations": "t.certificate_sha256 IS NOT NULL AND t.certificate_text IS NOT NULL"}


def _exists(conn, name: str, kind: str = "table") -> bool:
    return conn.execute("SELECT 1 FROM sqlite_master WHERE type=? AND name=?", (kind, name)).fetchone() is not None


def enable(conn, send_raw: bool) -> list[str]:
    """Add the log trigger of each synced table that exists and has none, logging its rows already
    stored (call inside a write transaction); the tables newly enabled."""
    done = []
    for t in LOGGED:
        if not _exists(conn, t) or _exists(conn, f"sync_{t}", "trigger"):
            continue
        conn.execute(f"INSERT INTO sync_log (tbl, rid) SELECT '{t}', rowid FROM {t} ORDER BY rowid")
        conn.execute(f"CREATE TRIGGER sync_{t} AFTER INSERT ON {t} BEGIN "
                     f"INSERT INTO sync_log (tbl, rid) VALUES ('{t}', NEW.rowid); END")
        conn.execute("INSERT OR IGNORE INTO sync_cursor (tbl) VALUES (?)", (t,))
        done.append(t)
    if send_raw:
        conn.execute("INSERT OR IGNORE INTO sync_cursor (tbl) VALUES ('readings')")
    return done


def tables(conn) -> list[str]:
    """The tables this file sends, in order."""
    have = {r[0] for r in conn.execute("SELECT tbl FROM sync_cursor")}
    return [t for t in (*LOGGED, "readings") if t in have]


def cursor(conn, tbl: str) -> int:
    row = conn.execute("SELECT acked FROM sync_cursor WHERE tbl=?", (tbl,)).fetchone()
    return int(row[0]) if row else 0


def pending(conn) -> dict[str, int]:
    """Rows (log entries, or readings) not yet acknowledged, per table."""
    out = {}
    for t in tables(conn):
        if t == "readings":
            out[t] = conn.execute("SELECT count(*) FROM readings WHERE id > ?", (cursor(conn, t),)).fetchone()[0]
        else:
            out[t] = conn.execute("SELECT count(*) FROM sync_log WHERE tbl=? AND seq > ?",
                                  (t, cursor(conn, t))).fetchone()[0]
    return out


def next_rows(conn, tbl: str, limit: int) -> tuple[list[list], int | None]:
    """(rows in the batch's column order, the position the cursor takes once they are acknowledged);
    position None: nothing pending. Log entries whose row has gone since (retention) are passed over."""
    at = cursor(conn, tbl)
    cols = ", ".join(f"t.{c}" for c, _ in TABLES[tbl])
    if tbl == "readings":
        top = conn.execute("SELECT max(id) FROM readings").fetchone()[0]
        if top is not None and top < at:     # every reading deleted and ids begun again: start over
            at = 0
        got = conn.execute(f"SELECT t.id, {cols} FROM readings t WHERE t.id > ? ORDER BY t.id LIMIT ?",
                           (at, limit)).fetchall()
        return [list(r[1:]) for r in got], (got[-1][0] if got else None)
    where = _WHERE.get(tbl, "1")
    got = conn.execute(f"SELECT l.seq, t.rowid IS NOT NULL AND {where}, {cols} FROM "
                       f"(SELECT seq, rid FROM sync_log WHERE tbl=? AND seq > ? ORDER BY seq LIMIT ?) l "
                       f"LEFT JOIN {tbl} t ON t.rowid = l.rid ORDER BY l.seq", (tbl, at, limit)).fetchall()
    if not got:
        return [], None
    return [list(r[2:]) for r in got if r[1]], got[-1][0]


def acknowledge(store, tbl: str, upto: int, n_rows: int, batch_no: int, certificates=()) -> None:
    """The central store took the batch: advance the cursor and drop the log entries, in one transaction."""
    with store.write() as conn:
        conn.execute("UPDATE sync_cursor SET acked = max(acked, ?), acked_utc = ?, rows_acked = rows_acked + ? "
                     "WHERE tbl = ?", (upto, time.time(), n_rows, tbl))
        if tbl != "readings":
            conn.execute("DELETE FROM sync_log WHERE tbl = ? AND seq <= ?", (tbl, upto))
        set_batch_no(conn, batch_no)
        if certificates:
            certificates_sent(conn, certificates)


def batch_no(conn) -> int:
    """The number of the file's last acknowledged batch (0: none yet)."""
    row = conn.execute("SELECT value FROM meta WHERE key='sync_batch_no'").fetchone()
    return int(row[0]) if row else 0


def set_batch_no(conn, n: int) -> None:
    conn.execute("INSERT INTO meta (key, value) VALUES ('sync_batch_no', ?) ON CONFLICT (key) DO UPDATE "
                 "SET value = CAST(max(CAST(value AS INTEGER), CAST(excluded.value AS INTEGER)) AS TEXT)", (str(n),))


def file_uuid(conn) -> str:
    return conn.execute("SELECT value FROM meta WHERE key='file_uuid'").fetchone()[0]


def snapshot(conn) -> dict:
    """The station's identity, meters (with the SHA-256 of their newest certificate) and alarm states."""
    out: dict = {"station": None, "meters": [], "alarms": []}
    if not _exists(conn, "mon_station"):
        return out
    conn.row_factory = sqlite3.Row
    try:
        st = conn.execute("SELECT name, latitude_deg, longitude_deg, elevation_m, standard, tier, convention, "
                          "block_s, timezone, id FROM mon_station ORDER BY id LIMIT 1").fetchone()
        if st is None:
            return out
        d = dict(st)
        sid = d.pop("id")
        out["station"] = d
        if _exists(conn, "mon_meter"):
            for m in conn.execute("SELECT m.meter, m.port, m.certificate, (SELECT c.certificate_sha256 FROM calibrations c "
                                  "WHERE c.session_id = m.session_id ORDER BY c.id DESC LIMIT 1) AS certificate_sha256, "
                                  "m.cert_due, m.freq_hz, m.band_lo_hz, m.band_hi_hz, m.e_ref_v_per_m, m.s_ref_w_per_m2, "
                                  "m.last_seen_utc, m.link_state, m.battery_pct, m.temperature_degc, m.drift_ppm, "
                                  "m.last_e_v_per_m, m.u_expanded_db FROM mon_meter m WHERE m.station_id = ?", (sid,)):
                m = {k: _finite(v) for k, v in dict(m).items()}
                if m["certificate_sha256"] is None and m["certificate"]:
                    cert = certificate(m["certificate"])
                    m["certificate_sha256"] = cert["sha256"] if cert else None
                out["meters"].append(m)
        if _exists(conn, "mon_alarm"):
            out["alarms"] = [{k: _finite(v) for k, v in dict(a).items()} for a in conn.execute(
                "SELECT rule, meter, band, state, t_on_utc, peak_t_utc, peak_value, last_t_utc FROM mon_alarm "
                "WHERE station_id = ?", (sid,))]
        out["station"] = {k: _finite(v) for k, v in d.items()}
    finally:
        conn.row_factory = None
    return out


def certificate(ref: str) -> dict | None:
    """{sha256, name, text} of a meter's certificate (a file, or a packaged one by name); None if unreadable."""
    import hashlib
    from pathlib import Path

    from meterlink.physics.certificate import _packaged

    try:
        p = Path(ref)
        text = p.read_text(encoding="utf-8") if p.is_file() else _packaged()[ref].read_text(encoding="utf-8")
    except (OSError, KeyError, UnicodeDecodeError):
        return None
    return {"sha256": hashlib.sha256(text.encode("utf-8")).hexdigest(), "name": Path(ref).name, "text": text}


def certificates_unsent(conn, meters: list[dict]) -> list[dict]:
    """The meters' certificates the central store has not acknowledged yet (meta 'sync_certificates')."""
    import json

    row = conn.execute("SELECT value FROM meta WHERE key='sync_certificates'").fetchone()
    sent = set(json.loads(row[0])) if row else set()
    out = {}
    for m in meters:
        if m.get("certificate") and m.get("certificate_sha256") not in sent:
            c = certificate(m["certificate"])
            if c is not None and c["sha256"] == m["certificate_sha256"]:
                out[c["sha256"]] = c
    return list(out.values())


def certificates_sent(conn, shas) -> None:
    import json

    row = conn.execute("SELECT value FROM meta WHERE key='sync_certificates'").fetchone()
    sent = set(json.loads(row[0])) if row else set()
    conn.execute("INSERT OR REPLACE INTO meta (key, value) VALUES ('sync_certificates', ?)",
                 (json.dumps(sorted(sent | set(shas))),))


def _finite(v):
    return None if isinstance(v, float) and v != v or v in (float("inf"), float("-inf")) else v


def acked_reading_id(conn) -> int | None:
    """The newest raw reading id the central store acknowledged, or None when raw readings are not sent."""
    row = conn.execute("SELECT acked FROM sync_cursor WHERE tbl='readings'").fetchone()
    return None if row is None else int(row[0])
