"""Station side of the sync: the monitor's background thread with a simulated meter on a pty, the
'meterlink sync' command, raw readings and retention waiting for their acknowledgement, bad settings."""

from __future__ import annotations

import sqlite3
import subprocess
import sys
import threading
import time

import numpy as np
import pytest

from test_central_support import (ROOT, Service, central_database, count, free_port, make_station_db,
                                  station_file, write_central_config)


@pytest.fixture(scope="module")
def central(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("central-sync")
    with central_database() as dsn:
        port = free_port()
        svc = Service(write_central_config(tmp / "central.toml", dsn, port), port, tmp / "service.log").start()
        try:
            yield {"dsn": dsn, "svc": svc, "tmp": tmp}
        finally:
            svc.stop()


def _register(dsn, name):
    from meterlink.network import central

    conn = central.connect(dsn)
    try:
        su = central.add_station(conn, name)
        return su, central.create_token(conn, su)[2]
    finally:
        conn.close()


def test_the_monitor_syncs_in_the_background_and_the_command_finishes_the_job(central, tmp_path):
    from meterlink.simulators.pty_meter import SimulatedMeter
    from meterlink.station.monitor import Monitor
    from meterlink.station.stationfile import load_station

    dsn, svc = central["dsn"], central["svc"]
    su, token = _register(dsn, "Brackenfold test station")
    db = tmp_path / "station.db"
    speed = 600.0
    with SimulatedMeter("station", meter=1, seed=11, speed=speed) as sim:
        cfg = station_file(tmp_path / "station.toml", db, "Brackenfold test station", svc.url, token, su, every_s=1)
        text = cfg.read_text().replace('port = "/dev/null"', f'port = "{sim.port}"').replace(
            'freq = 100e6', 'band = ["80 MHz", "4 GHz"]\ninterval_s = 10\nwindows_s = [360]')
        cfg.write_text(text + "\n[health]\ndrift_max_ppm = 1e9\nmax_gap_s = 35\n")
        st = load_station(cfg)
        lines: list[str] = []
        mon = Monitor(st, time_scale=speed, backoff_max_s=0.5, log=lines.append)
        th = threading.Thread(target=mon.run)
        th.start()
        try:
            deadline = time.monotonic() + 40
            while count(dsn, "SELECT count(*) FROM blocks WHERE station_uuid=%s", (su,)) < 3:
                assert time.monotonic() < deadline and th.is_alive(), lines[-5:]
                th.join(0.2)
        finally:
            mon.stop()
            th.join(30)
    assert any("sync:" in ln and "acknowledged" in ln for ln in lines), lines[-10:]
    # the rows written since the last background round go with the command
    p = subprocess.run([sys.executable, "-m", "meterlink", "sync", "--config", str(cfg)], capture_output=True,
                       text=True, cwd=ROOT, timeout=60)
    assert p.returncode == 0 and "0 row(s) waiting" in p.stdout, p.stdout + p.stderr
    with sqlite3.connect(db) as c:
        blocks = c.execute("SELECT meter, band, t_start_utc, energy, e_rms_v_per_m FROM mon_block "
                           "ORDER BY t_start_utc").fetchall()
        events = c.execute("SELECT id, t_utc, kind FROM events ORDER BY id").fetchall()
    import psycopg

    with psycopg.connect(dsn) as c:
        cb = c.execute("SELECT meter, band, t_start_utc, energy, e_rms_v_per_m FROM blocks WHERE station_uuid=%s "
                       "ORDER BY t_start_utc", (su,)).fetchall()
        ce = c.execute("SELECT local_id, t_utc, kind FROM events WHERE station_uuid=%s ORDER BY local_id",
                       (su,)).fetchall()
        st_row = c.execute("SELECT standard, tier FROM stations WHERE station_uuid=%s", (su,)).fetchone()
        meters = c.execute("SELECT meter, certificate_sha256 FROM meters WHERE station_uuid=%s", (su,)).fetchall()
        certs = c.execute("SELECT count(*) FROM certificates").fetchone()[0]
    assert [tuple(r) for r in cb] == blocks and [tuple(r) for r in ce] == events
    assert st_row == ("icnirp-2020", "public") and meters and meters[0][1] is not None and certs >= 1


def test_raw_readings_are_sent_and_retention_waits_for_their_acknowledgement(central, tmp_path):
    from meterlink.network.syncd import SyncSettings, sync_once
    from meterlink.station import retention
    from meterlink.storage.store import Store

    dsn, svc = central["dsn"], central["svc"]
    su, token = _register(dsn, "raw")
    db = tmp_path / "raw.db"
    make_station_db(db, "raw", n_blocks=2, n_events=0)
    n = 500
    with Store(db) as store:
        sid = store.begin_session("monitor", "/dev/null", interval_ms=1000)
        t = 1_780_000_000.0 + np.arange(n, dtype=float)
        store.add_reading_arrays(sid, np.zeros(n, int), np.arange(n), np.arange(n) * 1000, t,
                                 np.ones((n, 3), int), np.zeros(n, int), np.zeros(n, int))
        settings = SyncSettings(url=svc.url, token=token, station_uuid=su, send_raw=True, batch_rows=200)
        conn = store.db.conn
        assert retention.unsent_from(conn, sid) == np.inf           # not yet set to send raw readings
        with store.write():
            __import__("meterlink.network.outbox").network.outbox.enable(conn, True)
        assert retention.unsent_from(conn, sid) == t[0]               # nothing acknowledged: keep everything
        s = sync_once(store, settings, max_batches=4)                 # events, blocks, running, then readings
        assert retention.unsent_from(conn, sid) > t[0]
        s = sync_once(store, settings)
        assert s.pending["readings"] == 0 and retention.unsent_from(conn, sid) == np.inf
    assert count(dsn, "SELECT count(*) FROM readings WHERE station_uuid=%s", (su,)) == n
    assert count(dsn, "SELECT count(*) FROM readings WHERE station_uuid=%s AND t_utc=%s AND seq=%s",
                 (su, float(t[123]), 123)) == 1


@pytest.mark.parametrize("central_text, words", [
    ('url = "ftp://x"\ntoken = "t"\nstation_uuid = "00000000-0000-0000-0000-000000000001"', "central.url"),
    ('url = "http://127.0.0.1:1"\nstation_uuid = "00000000-0000-0000-0000-000000000001"', "central.token_file"),
    ('url = "http://127.0.0.1:1"\ntoken_file = "missing.token"\nstation_uuid = '
     '"00000000-0000-0000-0000-000000000001"', "cannot read"),
    ('url = "http://127.0.0.1:1"\ntoken = "t"\nstation_uuid = "abc"', "central.station_uuid"),
    ('url = "http://127.0.0.1:1"\ntoken = "t"\nstation_uuid = "00000000-0000-0000-0000-000000000001"\n'
     'every_s = 0', "central.every_s"),
    ('url = "http://127.0.0.1:1"\ntoken = "t"\nstation_uuid = "00000000-0000-0000-0000-000000000001"\n'
     'colour = 1', "unknown key"),
])
def test_bad_central_settings_in_a_station_file_are_refused_in_one_line(tmp_path, central_text, words):
    cert = ROOT / "calibration" / "demo-probe.toml"
    cfg = tmp_path / "s.toml"
    cfg.write_text(f'format = "meterlink-station/1"\n[station]\nname = "s"\ndatabase = "s.db"\n[assessment]\n'
                   f'standard = "icnirp-2020"\ntier = "public"\nfreq = 100e6\n[[meter]]\nname = "m"\n'
                   f'port = "/dev/null"\ncertificate = "{cert}"\n[central]\n{central_text}\n')
    p = subprocess.run([sys.executable, "-m", "meterlink", "sync", "--config", str(cfg)], capture_output=True,
                       text=True, cwd=ROOT, timeout=60)
    assert p.returncode == 2 and words in p.stderr and "Traceback" not in p.stderr, p.stderr
    assert len(p.stderr.strip().splitlines()) == 1
