"""Retention of every growing table of a station database (meterlink/station/retention.py), on real files.

1. The retention pass alone on a real SQLite file: raw readings, status rows, events (of the station's
   sessions and of the station itself) and the derived series are each cut at their own age, in
   chunks; rows of other sessions and stations are left alone; the span index stays exact.
   Expected counts follow from the rule "a row older than now - days is deleted" (worked below).
2. The daemon applies it: a running Monitor on a pty simulator deletes old status rows, events and
   blocks written into its database, keeps its own new rows, and records what it deleted.
"""

from __future__ import annotations

import json
import sqlite3
import threading
import time

from meterlink.station import derived, retention

from meterlink.storage import spans
from meterlink.station.monitor import Monitor
from meterlink.station.stationfile import Retention, parse_station
from meterlink.storage.store import Store, event_row
from meterlink.simulators.pty_meter import SimulatedMeter

DAY = 86400.0
NOW = 2_000_000_000.0


def _status(t):
    return {"boot": 1, "seq": int(t) % 100000, "tick_ms": 0, "t_utc": t, "battery_mv": 4000, "battery_pct": 80,
            "temperature_degc": 20.0, "flags": 0, "interval_ms": 1000}


def _block(conn, station_id, meter, t):
    conn.execute("INSERT INTO mon_block VALUES (?,?,?,?,?,?,?,?,?,?,?,?)",
                 (station_id, meter, "total", t, 360.0, 1.0, 360.0, 360, 1.0, 1.0, 1, 0))
    conn.execute("INSERT INTO mon_running VALUES (?,?,?,?,?,?,?,?,?)",
                 (station_id, meter, "total", 360.0, t, 1.0, 1.0, 1.0, t))


def test_each_table_cut_at_its_own_age(tmp_path):
    store = Store(tmp_path / "r.db")
    conn = store.db.conn
    with store.write():
        derived.ensure_schema(conn)
    a, b, other = (store.begin_session("monitor", notes=n) for n in ("a", "b", "not this station"))
    # readings of meter a: 5 a day for days 0..14 before NOW
    rows = [{"boot": 1, "seq": 100 * d + k, "tick_ms": 0, "t_utc": NOW - d * DAY + k, "raw_x": 1, "raw_y": 2,
             "raw_z": 3, "flags": 0, "range_index": 0} for d in range(15) for k in range(5)]
    store.write_batch(a, readings=rows)
    for sid in (a, b, other):      # status: one a day for days 0..19 before NOW
        store.write_batch(sid, statuses=[_status(NOW - d * DAY) for d in range(20)])
    for sid in (a, b, other, None):  # events: days 0, 10, ..., 90 before NOW
        store.write_batch(sid, events=[event_row("x", "info", "m", NOW - d * DAY) for d in range(0, 100, 10)])
    with store.write():
        for d in range(200):         # blocks: one a day for days 0..199 before NOW, station 1; one of station 2
            _block(conn, 1, "a", NOW - d * DAY)
        _block(conn, 2, "a", NOW - 500 * DAY)
    keep = Retention(raw_days=10, status_days=5, events_days=30, derived_days=100, chunk_rows=7)
    tasks = retention.plan(conn, keep, 1, [("a", a, 1.0), ("b", b, 1.0)], NOW, 1800.0)
    # meter b has no block yet: its raw readings are not touched (the derived series does not cover them)
    assert [(t.table, t.meter) for t in tasks] == [("readings", "a"), ("status", "a"), ("status", "b"),
                                                    ("events", None), ("derived", None)]
    steps = 0
    for t in tasks:
        while t.step(store, keep.chunk_rows) == keep.chunk_rows:
            steps += 1
    assert steps > 10                                  # done in chunks of 7 rows
    # readings: newest block ends NOW + 360 s; bound = min(NOW - 10 d, NOW + 360 - 1800 - 3) = NOW - 10 d;
    # days 11..14 go (4 x 5 rows), days 0..10 stay (the day-10 rows are at NOW - 10 d + k, k >= 0)
    assert conn.execute("SELECT count(*) FROM readings").fetchone()[0] == 11 * 5
    assert tasks[0].removed == 20
    # status of a and b: days 6..19 are older than NOW - 5 d (day 5 is exactly at the bound: kept)
    n = dict(conn.execute("SELECT session_id, count(*) FROM status GROUP BY session_id").fetchall())
    assert n == {a: 6, b: 6, other: 20}
    # events: days 40..90 go, 0..30 stay, for a, b and the station's own (no session); other untouched
    n = dict(conn.execute("SELECT coalesce(session_id, 0), count(*) FROM events GROUP BY session_id").fetchall())
    assert n == {a: 4, b: 4, 0: 4, other: 10}
    assert tasks[3].removed == 3 * 6
    # derived: days 101..199 go for station 1; station 2's old block stays
    assert conn.execute("SELECT count(*) FROM mon_block WHERE station_id=1").fetchone()[0] == 101
    assert conn.execute("SELECT count(*) FROM mon_running WHERE station_id=1").fetchone()[0] == 101
    assert conn.execute("SELECT count(*) FROM mon_block WHERE station_id=2").fetchone()[0] == 1
    assert tasks[4].removed == 2 * 99
    assert spans.check(conn) == [] and conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    store.close()


def test_derived_days_zero_keeps_for_ever_and_is_validated(tmp_path):
    base = ('format = "meterlink-station/1"\n[station]\nname = "s"\ndatabase = "s.db"\n[assessment]\n'
            'standard = "icnirp-2020"\ntier = "public"\nfreq = "100 MHz"\n[[meter]]\nname = "m"\nport = "p"\n'
            'certificate = "demo-probe"\n[retention]\n')
    r = parse_station(base + "raw_days = 30\n").retention
    assert (r.raw_days, r.status_days, r.events_days, r.derived_days) == (30, 30, 365, 0)
    assert not [t for t in retention.plan(_empty(tmp_path), r, 1, [],
                                          NOW, 360.0) if t.table == "derived"]
    try:
        parse_station(base + "raw_days = 30\nderived_days = 10\n", tmp_path / "st.toml")
    except Exception as exc:  # noqa: BLE001 - the type is checked next
        assert type(exc).__name__ == "StationFileError"
        assert "retention.derived_days" in str(exc) and "st.toml" in str(exc)
    else:
        raise AssertionError("derived_days below raw_days accepted")


def _empty(tmp_path):
    store = Store(tmp_path / "e.db")
    with store.write():
        derived.ensure_schema(store.db.conn)
    return store.db.conn


STATION = """
format = "meterlink-station/1"
[station]
name = "Kestle Down retention station"
database = "keep.db"
[assessment]
standard = "icnirp-2020"
tier = "public"
freq = "94.3 MHz"
interval_s = 0.5
[[meter]]
name = "probe-1"
port = "PORT"
certificate = "demo-probe"
[retention]
raw_days = 1
status_days = 1
events_days = 2
derived_days = 2
check_every_s = 1
chunk_rows = 50
"""


def test_daemon_applies_retention(tmp_path):
    with SimulatedMeter("station", meter=1, seed=6, speed=1.0) as sim:
        st = parse_station(STATION.replace("PORT", sim.port), tmp_path / "station.toml")
        mon = Monitor(st, backoff_max_s=0.5)
        th = threading.Thread(target=mon.run)
        th.start()
        conn = sqlite3.connect(st.database, timeout=10)
        try:
            sid = mon.meters[0].session_id
            now = time.time()
            with conn:   # old rows, as a station running for days would have them
                conn.executemany("INSERT INTO status (session_id, boot, seq, tick_ms, t_utc, battery_mv, "
                                 "battery_pct, temperature_degc, flags, interval_ms) VALUES (?,1,?,0,?,4000,80,20,0,500)",
                                 [(sid, i, now - 3 * DAY + i) for i in range(120)])
                conn.executemany("INSERT INTO events (session_id, t_utc, kind, severity, message) "
                                 "VALUES (?,?,'old','info','old')", [(s, now - 5 * DAY + i) for i in range(40)
                                                                      for s in (sid, None)])
                for i in range(30):
                    _block(conn, mon.station_id, "probe-1", now - 3 * DAY + 360.0 * i)
            deadline = time.monotonic() + 40

            def done():
                got = {json.loads(d)["table"] for d, in conn.execute(
                    "SELECT detail FROM events WHERE kind='retention'")}
                return {"status", "events", "derived"} <= got
            while not done():
                assert time.monotonic() < deadline, "no retention within 40 s"
                th.join(0.2)
                assert th.is_alive()
        finally:
            mon.stop()
            th.join(30)
        assert not th.is_alive()
    cut = now - DAY
    assert conn.execute("SELECT count(*) FROM status WHERE t_utc < ?", (cut,)).fetchone()[0] == 0
    assert conn.execute("SELECT count(*) FROM status WHERE t_utc >= ?", (cut,)).fetchone()[0] > 0   # its own
    assert conn.execute("SELECT count(*) FROM events WHERE kind='old'").fetchone()[0] == 0
    assert conn.execute("SELECT count(*) FROM events WHERE kind='monitor_started'").fetchone()[0] == 1
    assert conn.execute("SELECT count(*) FROM mon_block WHERE t_start_utc < ?", (now - 2 * DAY,)).fetchone()[0] == 0
    assert conn.execute("SELECT count(*) FROM mon_running WHERE t_start_utc < ?", (now - 2 * DAY,)).fetchone()[0] == 0
    removed = {json.loads(d)["table"]: json.loads(d)["removed"] for d, in conn.execute(
        "SELECT detail FROM events WHERE kind='retention'")}
    assert removed["status"] == 120 and removed["events"] == 80 and removed["derived"] == 60
    assert conn.execute("SELECT count(*) FROM readings").fetchone()[0] > 0
    conn.close()
