"""docs/schema.md lists every table and column that meterlink writes, so the document cannot fall behind.

The database side is read from SQLite itself (sqlite_master, PRAGMA table_info) on two real files:
a fresh file opened by the Store (all numbered migrations, the monitoring tables of version 5 among
them) and the database of a monitoring station after a short accelerated run.
"""

from __future__ import annotations

import re
import sqlite3
import threading
import time
from pathlib import Path

import pytest

from meterlink.station.monitor import Monitor
from meterlink.station.stationfile import parse_station
from meterlink.storage.store import Store
from meterlink.simulators.pty_meter import SimulatedMeter

DOC = Path(__file__).resolve().parent.parent / "docs" / "schema.md"
STATION = """
format = "meterlink-station/1"
[station]
name = "Keld Scar schema station"
database = "station.db"
[assessment]
standard = "icnirp-2020"
tier = "public"
band = ["80 MHz", "4 GHz"]
interval_s = 10
windows_s = [360]
[[meter]]
name = "roof"
port = "PORT"
certificate = "demo-probe"
[health]
drift_max_ppm = 1e9
max_gap_s = 35
"""


def documented(text: str) -> dict[str, set[str]]:
    """table -> columns, from each '## name' / '### name' section whose name is lower-case (a table) and the
    first cell of its markdown table rows ('| a, b | type | meaning |' documents columns a and b)."""
    out: dict[str, set[str]] = {}
    table = None
    for line in text.splitlines():
        m = re.match(r"#{1,6} +`?([A-Za-z_][A-Za-z0-9_ ]*?)`?(?: \(.*\))?$", line)
        if line.startswith("#"):
            table = m.group(1) if m and re.fullmatch(r"[a-z_][a-z0-9_]*", m.group(1)) else None
            if table is not None:
                out.setdefault(table, set())
            continue
        if table and line.startswith("|"):
            first = line.strip("|").split("|")[0].strip()
            if first in ("column", "") or set(first) <= set("-: "):
                continue
            out[table].update(c.strip().strip("`") for c in first.split(","))
    return out


def actual(path) -> dict[str, set[str]]:
    conn = sqlite3.connect(path)
    try:
        names = [r[0] for r in conn.execute("SELECT name FROM sqlite_master WHERE type='table' "
                                             "AND name NOT LIKE 'sqlite_%'")]
        return {n: {r[1] for r in conn.execute(f"PRAGMA table_info('{n}')")} for n in names}
    finally:
        conn.close()


@pytest.fixture(scope="module")
def station_db(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("schema-station")
    speed = 2000.0
    with SimulatedMeter("station", meter=1, seed=3, speed=speed) as sim:
        st = parse_station(STATION.replace("PORT", sim.port), tmp / "station.toml")
        mon = Monitor(st, time_scale=speed, backoff_max_s=0.5)
        th = threading.Thread(target=mon.run)
        th.start()
        deadline = time.monotonic() + 30
        try:
            while True:     # the tables are there once the first block has been written
                assert time.monotonic() < deadline and th.is_alive()
                try:
                    with sqlite3.connect(st.database, timeout=10) as conn:
                        if conn.execute("SELECT count(*) FROM mon_block").fetchone()[0] > 0:
                            break
                except sqlite3.OperationalError:    # not created yet
                    pass
                th.join(0.1)
        finally:
            mon.stop()
            th.join(30)
    return st.database


@pytest.fixture(scope="module")
def fresh_db(tmp_path_factory):
    path = tmp_path_factory.mktemp("schema-fresh") / "fresh.db"
    Store(path).close()
    return path


def test_every_table_and_column_of_a_fresh_file_and_a_station_file_is_documented(fresh_db, station_db):
    doc = documented(DOC.read_text(encoding="utf-8"))
    tables = actual(fresh_db)
    station = actual(station_db)
    assert set(tables) == set(station)        # since version 5 the monitor adds no table of its own
    assert {"mon_station", "mon_meter", "mon_block", "mon_running", "mon_alarm", "mon_storage"} <= set(tables)
    assert tables == station
    missing = {t: sorted(cols - doc.get(t, set())) for t, cols in station.items() if cols - doc.get(t, set())}
    assert not missing, f"docs/schema.md lacks these tables/columns: {missing}"
    # and the document lists nothing that no file has (a renamed or dropped column)
    stale = {t: sorted(cols - station.get(t, set())) for t, cols in doc.items() if cols - station.get(t, set())}
    assert not stale, f"docs/schema.md lists tables/columns no database has: {stale}"


def test_the_header_states_the_current_schema_version(fresh_db):
    conn = sqlite3.connect(fresh_db)
    version = conn.execute("SELECT value FROM meta WHERE key='schema_version'").fetchone()[0]
    conn.close()
    head = DOC.read_text(encoding="utf-8").splitlines()[0]
    assert head == f"# meterlink database schema, version {version}"


def test_the_check_sees_a_column_left_out():
    # the parser is what the check stands on: a row taken out of the document must go missing
    text = DOC.read_text(encoding="utf-8")
    full = documented(text)
    assert {"energy", "covered_s", "n_overrange"} <= full["mon_block"]
    assert {"battery_mv", "temperature_degc"} <= full["status"]
    cut = documented(text.replace("| energy | REAL |", "| (removed) | REAL |"))
    assert full["mon_block"] - cut["mon_block"] == {"energy"}
