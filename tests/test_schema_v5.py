"""Schema version 5: the monitoring tables move into the numbered migrations.

A version-4 file is built the way the code before version 5 built it (migrations 1-4, then the
monitor's own CREATE TABLE IF NOT EXISTS statements, typed below as that code had them) and filled
with rows; opening it with the Store must migrate it to version 5, keep every row and leave the
same tables and columns as a fresh file.
"""

from __future__ import annotations

import sqlite3

import sqlite_utils

from meterlink.storage.schema import MIGRATIONS, SCHEMA_VERSION
from meterlink.storage.store import Store

# The statements the monitor ran itself before version 5 (meterlink/station/derived.py SCHEMA and
# mon_storage in meterlink/station/monitor.py), copied from that code.
OLD_MONITOR_SQL = [
    """CREATE TABLE IF NOT EXISTS mon_station (
    id INTEGER PRIMARY KEY, name TEXT NOT NULL UNIQUE, config_path TEXT, config_text TEXT,
    standard TEXT, tier TEXT, convention TEXT, block_s REAL, windows_s TEXT,
    latitude_deg REAL, longitude_deg REAL, elevation_m REAL, timezone TEXT,
    created_utc REAL, started_utc REAL, heartbeat_utc REAL, pid INTEGER, state TEXT, runs INTEGER DEFAULT 0)""",
    """CREATE TABLE IF NOT EXISTS mon_meter (
    station_id INTEGER NOT NULL, meter TEXT NOT NULL, session_id INTEGER, port TEXT, certificate TEXT,
    freq_hz REAL, band_lo_hz REAL, band_hi_hz REAL, e_ref_v_per_m REAL, s_ref_w_per_m2 REAL,
    cert_due TEXT, last_seen_utc REAL, link_state TEXT, battery_pct REAL, temperature_degc REAL,
    drift_ppm REAL, last_e_v_per_m REAL, u_expanded_db REAL,
    PRIMARY KEY (station_id, meter))""",
    """CREATE TABLE IF NOT EXISTS mon_block (
    station_id INTEGER NOT NULL, meter TEXT NOT NULL, band TEXT NOT NULL, t_start_utc REAL NOT NULL,
    block_s REAL NOT NULL, energy REAL NOT NULL, covered_s REAL NOT NULL, n INTEGER NOT NULL,
    e_rms_v_per_m REAL, e_max_v_per_m REAL, complete INTEGER NOT NULL, n_overrange INTEGER NOT NULL,
    PRIMARY KEY (station_id, meter, band, t_start_utc))""",
    """CREATE TABLE IF NOT EXISTS mon_running (
    station_id INTEGER NOT NULL, meter TEXT NOT NULL, band TEXT NOT NULL, window_s REAL NOT NULL,
    t_start_utc REAL NOT NULL, e_end_v_per_m REAL, coverage_end REAL, e_max_v_per_m REAL, t_max_utc REAL,
    PRIMARY KEY (station_id, meter, band, window_s, t_start_utc))""",
    """CREATE TABLE IF NOT EXISTS mon_alarm (
    station_id INTEGER NOT NULL, rule TEXT NOT NULL, meter TEXT NOT NULL, band TEXT NOT NULL,
    state TEXT NOT NULL, t_on_utc REAL, peak_t_utc REAL, peak_value REAL, last_t_utc REAL,
    PRIMARY KEY (station_id, rule, meter, band))""",
    "CREATE TABLE IF NOT EXISTS mon_storage (station_id INTEGER PRIMARY KEY, storing INTEGER, "
    "since_utc REAL, error TEXT, pending_readings INTEGER, checked_utc REAL)",
]


def _v4_file(path, statements=OLD_MONITOR_SQL) -> None:
    """A version-4 meterlink file as the code before version 5 left it after a monitor ran on it."""
    db = sqlite_utils.Database(path)
    for v in range(1, 5):
        MIGRATIONS[v](db)
    db["meta"].upsert({"key": "schema_version", "value": "4"}, pk="key")
    for stmt in statements:
        db.execute(stmt)
    conn = db.conn
    conn.execute("INSERT INTO mon_station (name, created_utc, runs, state) VALUES ('old', 1.0e9, 3, 'stopped')")
    conn.execute("INSERT INTO mon_meter (station_id, meter, port) VALUES (1, 'roof', '/dev/ttyX')")
    conn.execute("INSERT INTO mon_block VALUES (1, 'roof', 'total', 360.0, 360.0, 1440.0, 360.0, 36, 2.0, 2.5, 1, 0)")
    conn.execute("INSERT INTO mon_running VALUES (1, 'roof', 'total', 360.0, 360.0, 2.0, 1.0, 2.1, 700.0)")
    conn.execute("INSERT INTO mon_alarm VALUES (1, 'r', 'roof', 'total', 'idle', NULL, NULL, NULL, 710.0)")
    conn.execute("INSERT INTO mon_storage VALUES (1, 1, NULL, NULL, 0, 720.0)")
    conn.commit()
    conn.close()


def _tables(path) -> dict[str, list[str]]:
    conn = sqlite3.connect(path)
    try:
        names = [r[0] for r in conn.execute("SELECT name FROM sqlite_master WHERE type='table' "
                                             "AND name NOT LIKE 'sqlite_%'")]
        return {n: sorted(r[1] for r in conn.execute(f"PRAGMA table_info('{n}')")) for n in names}
    finally:
        conn.close()


def test_a_fresh_file_has_the_monitoring_tables_at_version_5(tmp_path):
    with Store(tmp_path / "fresh.db") as s:
        assert s.schema_version == SCHEMA_VERSION and "mon_block" in s.db.table_names()
    tables = _tables(tmp_path / "fresh.db")
    assert {"mon_station", "mon_meter", "mon_block", "mon_running", "mon_alarm", "mon_storage"} <= set(tables)


def test_a_version_4_station_file_made_by_the_old_code_migrates_and_keeps_its_rows(tmp_path):
    old = tmp_path / "old.db"
    _v4_file(old)
    Store(tmp_path / "fresh.db").close()
    with Store(old) as s:
        assert s.schema_version == SCHEMA_VERSION  # 5 (monitoring tables) and every later migration
        c = s.db.conn
        assert c.execute("SELECT name, runs, state FROM mon_station").fetchall() == [("old", 3, "stopped")]
        assert c.execute("SELECT energy, n, complete FROM mon_block").fetchall() == [(1440.0, 36, 1)]
        assert c.execute("SELECT e_max_v_per_m, t_max_utc FROM mon_running").fetchall() == [(2.1, 700.0)]
        assert c.execute("SELECT count(*) FROM mon_alarm").fetchone()[0] == 1
        assert c.execute("SELECT checked_utc FROM mon_storage").fetchone()[0] == 720.0
    assert _tables(old) == _tables(tmp_path / "fresh.db")
    with Store(old) as s:                   # opening again changes nothing
        assert s.schema_version == SCHEMA_VERSION  # 5 (monitoring tables) and every later migration
    assert _tables(old) == _tables(tmp_path / "fresh.db")


def test_a_version_4_file_without_monitoring_tables_gets_them(tmp_path):
    old = tmp_path / "plain.db"
    db = sqlite_utils.Database(old)
    for v in range(1, 5):
        MIGRATIONS[v](db)
    db["meta"].upsert({"key": "schema_version", "value": "4"}, pk="key")
    db.conn.commit()
    db.conn.close()
    Store(tmp_path / "fresh.db").close()
    Store(old).close()
    assert _tables(old) == _tables(tmp_path / "fresh.db")


def test_a_monitoring_table_lacking_a_column_gains_it(tmp_path):
    # an older mon_meter without the uncertainty column: the migration adds it, the row stays
    stmts = [s.replace("last_e_v_per_m REAL, u_expanded_db REAL,", "last_e_v_per_m REAL,") for s in OLD_MONITOR_SQL]
    assert stmts != OLD_MONITOR_SQL
    old = tmp_path / "older.db"
    _v4_file(old, stmts)
    assert "u_expanded_db" not in _tables(old)["mon_meter"]
    with Store(old) as s:
        assert s.db.conn.execute("SELECT port, u_expanded_db FROM mon_meter").fetchall() == [("/dev/ttyX", None)]
    assert "u_expanded_db" in _tables(old)["mon_meter"]
