"""The central store against a real PostgreSQL server and the real ingest service (a child process).

Idempotent re-send, conflict recording, token refusals and station isolation, bad bodies, a link cut
after the service acted but before the station heard, the service and the database down then back,
and a station clock that was far off.
"""

from __future__ import annotations

import gzip
import json
import signal
import sqlite3

import pytest

from test_central_support import (Proxy, Service, add_blocks, central_database, count, free_port,
                                  make_station_db, post, write_central_config)


@pytest.fixture(scope="module")
def central(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("central")
    with central_database() as dsn:
        port = free_port()
        cfg = write_central_config(tmp / "central.toml", dsn, port, max_body_bytes=4 * 1024 * 1024)
        svc = Service(cfg, port, tmp / "service.log").start()
        try:
            yield {"dsn": dsn, "svc": svc, "cfg": cfg, "tmp": tmp}
        finally:
            svc.stop()


def _station(dsn: str, name: str):
    from meterlink.network import central

    conn = central.connect(dsn)
    try:
        su = central.add_station(conn, name)
        tid, _, token = central.create_token(conn, su, "test")
    finally:
        conn.close()
    return su, tid, token


def _settings(url, token, su, **kw):
    from meterlink.network.syncd import SyncSettings

    return SyncSettings(url=url, token=token, station_uuid=su, timeout_s=5.0, **kw)


def _sync(db, settings, **kw):
    from meterlink.network.syncd import sync_once
    from meterlink.storage.store import Store

    with Store(db, create=False) as store:
        return sync_once(store, settings, **kw)


def _file_uuid(db) -> str:
    with sqlite3.connect(db) as c:
        return c.execute("SELECT value FROM meta WHERE key='file_uuid'").fetchone()[0]


def test_sync_stores_every_row_once_and_a_resend_changes_nothing(central, tmp_path):
    dsn, url = central["dsn"], central["svc"].url
    su, _, token = _station(dsn, "resend")
    db = tmp_path / "a.db"
    make_station_db(db, "resend", n_blocks=30, n_events=4)
    s = _sync(db, _settings(url, token, su, batch_rows=7))
    with sqlite3.connect(db) as c:
        n_blocks = c.execute("SELECT count(*) FROM mon_block").fetchone()[0]
        n_run = c.execute("SELECT count(*) FROM mon_running").fetchone()[0]
        n_ev = c.execute("SELECT count(*) FROM events").fetchone()[0]
        assert c.execute("SELECT count(*) FROM sync_log").fetchone()[0] == 0   # acknowledged entries are gone
    assert n_blocks == 30 and n_ev >= 4 and s.error is None and sum(s.pending.values()) == 0
    assert s.new == s.rows == n_blocks + n_run + n_ev and s.duplicate == 0
    assert count(dsn, "SELECT count(*) FROM blocks WHERE station_uuid=%s", (su,)) == n_blocks
    assert count(dsn, "SELECT count(*) FROM running WHERE station_uuid=%s", (su,)) == n_run
    assert count(dsn, "SELECT count(*) FROM events WHERE station_uuid=%s", (su,)) == n_ev
    # the same content offered again, as after a lost acknowledgement: cursors back to 0, batch number kept
    with sqlite3.connect(db) as c:
        c.execute("UPDATE sync_cursor SET acked = 0")
        c.execute("INSERT INTO sync_log (tbl, rid) SELECT 'mon_block', rowid FROM mon_block")
        c.execute("UPDATE meta SET value = CAST(value - 1 AS TEXT) WHERE key = 'sync_batch_no'")
    s2 = _sync(db, _settings(url, token, su, batch_rows=1000))
    assert s2.rows == n_blocks and s2.new == 0 and s2.duplicate == n_blocks and s2.conflicts == 0
    assert count(dsn, "SELECT count(*) FROM blocks WHERE station_uuid=%s", (su,)) == n_blocks
    assert count(dsn, "SELECT count(*) FROM conflicts WHERE station_uuid=%s", (su,)) == 0


def test_a_changed_row_is_recorded_as_a_conflict_and_never_overwrites(central, tmp_path):
    dsn, url = central["dsn"], central["svc"].url
    su, _, token = _station(dsn, "conflict")
    db = tmp_path / "c.db"
    make_station_db(db, "conflict", n_blocks=5, n_events=0)
    _sync(db, _settings(url, token, su))
    with sqlite3.connect(db) as c:
        t, e_old = c.execute("SELECT t_start_utc, e_rms_v_per_m FROM mon_block ORDER BY t_start_utc LIMIT 1").fetchone()
        # the monitor rewrites a block (INSERT OR REPLACE) with other content: a new log entry
        c.execute("INSERT OR REPLACE INTO mon_block SELECT station_id, meter, band, t_start_utc, block_s, energy * 4, "
                  "covered_s, n, e_rms_v_per_m * 2, e_max_v_per_m, complete, n_overrange FROM mon_block "
                  "WHERE t_start_utc = ?", (t,))
    s = _sync(db, _settings(url, token, su))
    assert (s.rows, s.new, s.conflicts) == (1, 0, 1)
    assert count(dsn, "SELECT count(*) FROM blocks WHERE station_uuid=%s AND t_start_utc=%s "
                      "AND e_rms_v_per_m=%s", (su, t, e_old)) == 1          # the stored row is untouched
    assert count(dsn, "SELECT count(*) FROM conflicts WHERE station_uuid=%s AND tbl='blocks'", (su,)) == 1
    import psycopg

    with psycopg.connect(dsn) as c:
        stored, offered = c.execute("SELECT stored, offered FROM conflicts WHERE station_uuid=%s", (su,)).fetchone()
    assert json.loads(stored)["e_rms_v_per_m"] == e_old and json.loads(offered)["e_rms_v_per_m"] == 2 * e_old
    # offering the same differing row again records nothing new
    with sqlite3.connect(db) as c:
        c.execute("INSERT OR REPLACE INTO mon_block SELECT * FROM mon_block WHERE t_start_utc = ?", (t,))
    s = _sync(db, _settings(url, token, su))
    assert s.conflicts == 1 and count(dsn, "SELECT count(*) FROM conflicts WHERE station_uuid=%s", (su,)) == 1


def test_tokens_and_station_isolation(central, tmp_path):
    from meterlink.network import central as admin
    from meterlink.network.syncd import RefusedByCentral

    dsn, url = central["dsn"], central["svc"].url
    su_a, tid_a, tok_a = _station(dsn, "iso-a")
    su_b, _, tok_b = _station(dsn, "iso-b")
    db = tmp_path / "a.db"
    make_station_db(db, "iso-a", n_blocks=3, n_events=1)
    for token, su, status, words in (("mlt_not-a-token", su_a, 401, "unknown token"),
                                     (tok_b, su_a, 403, "token belongs to station"),
                                     (tok_a, su_b, 403, "token belongs to station")):
        with pytest.raises(RefusedByCentral) as ei:
            _sync(db, _settings(url, token, su))
        assert ei.value.status == status and words in ei.value.reason
    assert count(dsn, "SELECT count(*) FROM blocks WHERE station_uuid IN (%s, %s)", (su_a, su_b)) == 0
    with sqlite3.connect(db) as c:       # nothing lost on the station: every row still waits
        assert c.execute("SELECT count(*) FROM sync_log").fetchone()[0] > 0
        assert c.execute("SELECT max(acked) FROM sync_cursor").fetchone()[0] == 0
    _sync(db, _settings(url, tok_a, su_a))
    assert count(dsn, "SELECT count(*) FROM blocks WHERE station_uuid=%s", (su_a,)) == 3
    # station B may not write into station A's database file, even with its own valid token
    code, ans = post(url, {"format": 1, "station_uuid": su_b, "file_uuid": _file_uuid(db), "batch_no": 99,
                           "schema_version": 6}, tok_b)
    assert code == 403 and "belongs to another station" in ans["reason"]
    conn = admin.connect(dsn)
    admin.revoke_token(conn, tid_a)
    conn.close()
    with pytest.raises(RefusedByCentral) as ei:
        _sync(db, _settings(url, tok_a, su_a))
    assert ei.value.status == 403 and "revoked" in ei.value.reason
    assert count(dsn, "SELECT count(*) FROM ingest_log WHERE status IN (401, 403)") >= 4   # refusals are logged


def test_bad_bodies_are_refused_with_a_reason_and_store_nothing(central, tmp_path):
    dsn, url = central["dsn"], central["svc"].url
    su, _, token = _station(dsn, "bad-bodies")
    db = tmp_path / "b.db"
    make_station_db(db, "bad-bodies", n_blocks=2, n_events=0)
    fid = _file_uuid(db)
    good = {"format": 1, "station_uuid": su, "file_uuid": fid, "batch_no": 1, "schema_version": 6,
            "table": "events", "columns": ["id", "session_id", "t_utc", "kind", "severity", "message", "detail"],
            "rows": [[1, None, 1.7e9, "k", "info", "m", None]]}
    cases = [
        (None, b"{not json", {}, 400, "not valid JSON"),
        (None, b"\x1f\x8b\x08garbage", {"Content-Encoding": "gzip"}, 400, "not valid gzip"),
        ({**good, "format": 2}, None, {}, 422, "newer than this service"),
        ({**good, "table": "users"}, None, {}, 400, "unknown table"),
        ({**good, "rows": [[1, None, "yesterday", "k", "info", "m", None]]}, None, {}, 400, "rows[0].t_utc"),
        ({**good, "columns": ["id"]}, None, {}, 400, "columns of events"),
        ({**good, "file_uuid": "not-a-uuid"}, None, {}, 400, "file_uuid"),
        (None, gzip.compress(b" " * (5 * 1024 * 1024)), {"Content-Encoding": "gzip"}, 413, "max_body_bytes"),
    ]
    for body, raw, headers, status, words in cases:
        code, ans = post(url, body, token, raw=raw, headers=headers)
        assert (code, ans["ok"]) == (status, False), (words, code, ans)
        assert words in ans["reason"] and "\n" not in ans["reason"], ans
    assert count(dsn, "SELECT count(*) FROM events WHERE station_uuid=%s", (su,)) == 0
    code, ans = post(url, {**good, "batch_no": 5}, token)
    assert code == 200 and ans["new"] == 1
    code, ans = post(url, {**good, "batch_no": 4}, token)           # a replay of an older batch
    assert code == 409 and "replay of batch 4" in ans["reason"]
    code, ans = post(url, {**good, "batch_no": 5}, token)           # the last batch again: a re-send, harmless
    assert code == 200 and ans["resent"] and ans["duplicate"] == 1
    assert count(dsn, "SELECT count(*) FROM events WHERE station_uuid=%s", (su,)) == 1
    # a file restored from a backup numbers its batches from an older point: refused until an operator
    # resets the file (meterlink central file-reset), then its rows are recognised by their keys
    import subprocess
    import sys

    p = subprocess.run([sys.executable, "-m", "meterlink", "central", "file-reset", fid, "--config",
                        str(central["cfg"])], capture_output=True, text=True, timeout=60)
    assert p.returncode == 0 and "it had reached 5" in p.stdout, p.stdout + p.stderr
    code, ans = post(url, {**good, "batch_no": 2}, token)
    assert code == 200 and ans["duplicate"] == 1 and ans["new"] == 0
    p = subprocess.run([sys.executable, "-m", "meterlink", "central", "file-reset", "nope", "--config",
                        str(central["cfg"])], capture_output=True, text=True, timeout=60)
    assert p.returncode == 2 and "expected a UUID" in p.stderr and "Traceback" not in p.stderr


def test_link_cut_after_the_store_acted_then_resend(central, tmp_path):
    """The reply never reaches the station: the cursor stays, the same batch number goes again, nothing doubles."""
    from meterlink.network.syncd import Unavailable

    dsn = central["dsn"]
    su, _, token = _station(dsn, "cut")
    db = tmp_path / "cut.db"
    make_station_db(db, "cut", n_blocks=20, n_events=2)
    proxy = Proxy(central["svc"].port)
    try:
        proxy.drop_replies = True
        with pytest.raises(Unavailable) as ei:
            _sync(db, _settings(proxy.url, token, su, batch_rows=10))
        assert ei.value.summary.batches == 0 and proxy.replies_dropped >= 1
        stored_first = count(dsn, "SELECT count(*) FROM events WHERE station_uuid=%s", (su,)) + \
            count(dsn, "SELECT count(*) FROM blocks WHERE station_uuid=%s", (su,))
        assert stored_first > 0                                   # the service did store the first batch
        with sqlite3.connect(db) as c:
            assert c.execute("SELECT max(acked) FROM sync_cursor").fetchone()[0] == 0
        proxy.drop_replies = False
        s = _sync(db, _settings(proxy.url, token, su, batch_rows=10))
        assert s.duplicate == stored_first and s.conflicts == 0 and sum(s.pending.values()) == 0
    finally:
        proxy.close()
    with sqlite3.connect(db) as c:
        nb = c.execute("SELECT count(*) FROM mon_block").fetchone()[0]
        ne = c.execute("SELECT count(*) FROM events").fetchone()[0]
    assert count(dsn, "SELECT count(*) FROM blocks WHERE station_uuid=%s", (su,)) == nb
    assert count(dsn, "SELECT count(*) FROM events WHERE station_uuid=%s", (su,)) == ne


def test_service_killed_and_database_closed_then_back(central, tmp_path):
    import psycopg

    from meterlink.network.syncd import Unavailable

    dsn, svc = central["dsn"], central["svc"]
    su, _, token = _station(dsn, "down")
    db = tmp_path / "down.db"
    make_station_db(db, "down", n_blocks=4, n_events=1)
    svc.kill(signal.SIGKILL)                                      # the service is gone: connection refused
    with pytest.raises(Unavailable):
        _sync(db, _settings(svc.url, token, su))
    svc.start()
    name = dsn.split("dbname=")[1]
    admin = dsn.replace(f"dbname={name}", "dbname=postgres")
    with psycopg.connect(admin, autocommit=True) as c:              # the database refuses connections
        c.execute(f"ALTER DATABASE {name} ALLOW_CONNECTIONS false")
        c.execute("SELECT pg_terminate_backend(pid) FROM pg_stat_activity WHERE datname = %s", (name,))
    try:
        with pytest.raises(Unavailable) as ei:
            _sync(db, _settings(svc.url, token, su))
        assert "503" in str(ei.value) and "central database unavailable" in str(ei.value)
    finally:
        with psycopg.connect(admin, autocommit=True) as c:
            c.execute(f"ALTER DATABASE {name} ALLOW_CONNECTIONS true")
    with sqlite3.connect(db) as c:
        waiting = c.execute("SELECT count(*) FROM sync_log").fetchone()[0]
    s = _sync(db, _settings(svc.url, token, su))
    assert s.rows == waiting and s.new == waiting and sum(s.pending.values()) == 0


def test_a_station_clock_far_off_still_lands_in_its_own_partitions(central, tmp_path):
    from meterlink.storage.store import Store

    dsn, url = central["dsn"], central["svc"].url
    su, _, token = _station(dsn, "clock")
    db = tmp_path / "clock.db"
    make_station_db(db, "clock", n_blocks=2, n_events=0, t0=946_684_800.0)      # 2000-01-01
    with Store(db) as store:
        add_blocks(store, 1, "m1", 2_208_988_800.0, 2)                           # 2040-01-01
    _sync(db, _settings(url, token, su))
    assert count(dsn, "SELECT count(*) FROM blocks WHERE station_uuid=%s", (su,)) == 4
    assert count(dsn, "SELECT count(*) FROM pg_tables WHERE tablename IN ('blocks_y2000m01', 'blocks_y2040m01')") == 2
    code, ans = post(url, {"format": 1, "station_uuid": su, "file_uuid": _file_uuid(db), "batch_no": 1000,
                           "schema_version": 6, "table": "events",
                           "columns": ["id", "session_id", "t_utc", "kind", "severity", "message", "detail"],
                           "rows": [[9, None, 1e300, "k", "info", "m", None]]}, token)
    assert code == 400 and "outside the years" in ans["reason"]


def test_every_central_table_and_column_is_documented(central):
    """docs/central-schema.md lists every table and column of a migrated database (partitions aside), and no other."""
    import re
    from pathlib import Path

    import psycopg

    text = (Path(__file__).resolve().parents[1] / "docs" / "central-schema.md").read_text(encoding="utf-8")
    doc: dict[str, set[str]] = {}
    table = None
    for line in text.splitlines():
        if line.startswith("#"):
            m = re.fullmatch(r"## ([a-z_]+)", line)
            table = m.group(1) if m else None
            if table:
                doc[table] = set()
        elif table and line.startswith("|"):
            first = line.strip("|").split("|")[0].strip()
            if first not in ("column", "") and not set(first) <= set("-: "):
                doc[table].update(c.strip() for c in first.split(","))
    with psycopg.connect(central["dsn"]) as c:
        rows = c.execute("SELECT c.relname, a.attname FROM pg_class c JOIN pg_namespace n ON n.oid = c.relnamespace "
                         "JOIN pg_attribute a ON a.attrelid = c.oid WHERE n.nspname = 'public' AND c.relkind IN "
                         "('r', 'p') AND NOT c.relispartition AND a.attnum > 0 AND NOT a.attisdropped").fetchall()
    actual: dict[str, set[str]] = {}
    for t, col in rows:
        actual.setdefault(t, set()).add(col)
    assert doc == actual, {t: (sorted(actual.get(t, set()) ^ doc.get(t, set()))) for t in set(doc) | set(actual)
                           if actual.get(t) != doc.get(t)}
