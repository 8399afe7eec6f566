"""Station health events and raw-data retention of the monitor, over accelerated pty simulators.

Health: battery below its threshold, device temperature outside the allowed range, a certificate
whose due date is near and one whose due date has passed (copies of the demo certificate with
earlier due dates), a probe held far from every transmitter (stuck at its noise floor, then back),
and the heartbeat written every station.heartbeat_s. Retention: raw readings older than the
retention are deleted in chunks while recording goes on, and the 6-minute blocks stay as they were.
"""

from __future__ import annotations

import datetime as dt
import json
import sqlite3
import threading
import time
from pathlib import Path

from meterlink.station.monitor import Monitor
from meterlink.station.publish import current_state
from meterlink.station.stationfile import parse_station
from meterlink.simulators.pty_meter import SimulatedMeter

ROOT = Path(__file__).resolve().parents[1]


def _events(conn, kind):
    return [(m, t, json.loads(d or "{}")) for m, t, d in conn.execute(
        "SELECT json_extract(detail, '$.meter'), t_utc, detail FROM events WHERE kind=? ORDER BY t_utc", (kind,))]


def _wait(conn, th, cond, timeout_s):
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if cond():
            return True
        th.join(0.1)
        assert th.is_alive(), "monitor ended by itself"
    return False


def _cert_copy(tmp_path, name, due: dt.date):
    body = (ROOT / "calibration" / "demo-probe.toml").read_text(encoding="utf-8")
    assert "due = 2027-06-15" in body
    p = tmp_path / f"{name}.toml"
    p.write_text(body.replace("due = 2027-06-15", f"due = {due.isoformat()}"), encoding="utf-8")
    return p


HEALTH = """
format = "meterlink-station/1"
[station]
name = "Kestle Down health station"
database = "health.db"
heartbeat_s = 2
[assessment]
standard = "icnirp-2020"
tier = "public"
band = ["80 MHz", "4 GHz"]
interval_s = 1
windows_s = [360]
[[meter]]
name = "far"
port = "PORT0"
certificate = "CERT0"
[[meter]]
name = "near"
port = "PORT1"
certificate = "CERT1"
[health]
battery_low_pct = 100
temp_min_c = 40
temp_max_c = 60
stuck_s = 60
cert_warn_days = 30
max_gap_s = 30
drift_max_ppm = 1e9
"""


def test_health_events(tmp_path):
    today = dt.date.today()
    soon = _cert_copy(tmp_path, "due-soon", today + dt.timedelta(days=12))
    past = _cert_copy(tmp_path, "expired", today - dt.timedelta(days=12))
    speed = 200.0
    # the demo meter runs on battery (4150 mV full, 3300 mV empty, 25 mV/h): below 100 % after ~10 min
    with SimulatedMeter("demo", meter=0, seed=1, speed=speed) as far, \
            SimulatedMeter("demo", meter=0, seed=2, speed=speed) as near:
        far.move_to((400e3, 400e3, 1.5))         # 400 km from the site: nothing above the noise floor
        near.move_to((20.0, -20.0, 1.5))
        text = (HEALTH.replace("PORT0", far.port).replace("PORT1", near.port)
                .replace("CERT0", str(soon)).replace("CERT1", str(past)))
        (tmp_path / "station.toml").write_text(text)
        st = parse_station(text, tmp_path / "station.toml")
        mon = Monitor(st, time_scale=speed, backoff_max_s=0.5)
        th = threading.Thread(target=mon.run)
        th.start()
        conn = sqlite3.connect(st.database, timeout=10)
        beats = []

        def seen(*kinds):
            hb = conn.execute("SELECT heartbeat_utc FROM mon_station").fetchone()[0]
            if not beats or beats[-1] != hb:
                beats.append(hb)
            return all(_events(conn, k) for k in kinds)
        try:
            assert _wait(conn, th, lambda: seen("stuck_noise_floor", "battery_low", "temperature_out_of_range",
                                                "certificate_due_soon", "certificate_expired"), 40)
            far.move_to((30.0, -10.0, 1.5))      # back near the transmitters
            assert _wait(conn, th, lambda: seen("stuck_noise_floor_end") and len(beats) >= 4, 30)
            state = current_state(conn, time.time())
            assert not state["stale"] and state["heartbeat_s"] == 2.0
            assert current_state(conn, time.time() + 7.0)["stale"]     # 3 heartbeats missed
        finally:
            mon.stop()
            th.join(30)
        assert not th.is_alive()
    assert [m for m, _, _ in _events(conn, "stuck_noise_floor")] == ["far"]
    (_, t_on, _), = [e for e in _events(conn, "stuck_noise_floor") if e[0] == "far"]
    (_, t_off, _), = _events(conn, "stuck_noise_floor_end")
    assert t_off > t_on
    first = conn.execute("SELECT min(t_utc) FROM readings r JOIN mon_meter m ON m.session_id=r.session_id "
                         "WHERE m.meter='far'").fetchone()[0]
    assert t_on - first >= 60 - 1.0                    # only after stuck_s of noise-floor readings
    for m, _, d in _events(conn, "battery_low"):
        assert d["battery_pct"] < 100
    assert {m for m, _, _ in _events(conn, "battery_low")} == {"far", "near"}
    # a full battery at the start raised nothing: the first status of each meter said 100 %
    assert conn.execute("SELECT min(t_utc) FROM status WHERE battery_pct = 100").fetchone()[0] < \
        min(t for _, t, _ in _events(conn, "battery_low"))
    for _, _, d in _events(conn, "temperature_out_of_range"):
        assert not 40 <= d["temperature_degc"] <= 60
    (m, _, d), = _events(conn, "certificate_due_soon")
    assert m == "far" and d["due_date"] == (today + dt.timedelta(days=12)).isoformat()
    (m, _, d), = _events(conn, "certificate_expired")
    assert m == "near" and d["due_date"] == (today - dt.timedelta(days=12)).isoformat()
    assert not _events(conn, "internal_error")
    # the heartbeat row is rewritten every heartbeat_s (host seconds), not at every 0.5 s commit
    steps = [b - a for a, b in zip(beats[1:], beats[2:])]
    assert steps and min(steps) >= 2.0 - 0.05, beats


RETAIN = """
format = "meterlink-station/1"
[station]
name = "Brannock Tor retention station"
database = "retain.db"
[assessment]
standard = "icnirp-2020"
tier = "public"
band = ["80 MHz", "4 GHz"]
interval_s = 10
windows_s = [360, 1800]
[[meter]]
name = "north"
port = "PORT"
certificate = "demo-probe"
[health]
drift_max_ppm = 1e9
max_gap_s = 35
[retention]
raw_days = 0.03
status_days = 0.02
check_every_s = 1
chunk_rows = 150
"""


def _raw_thinned(conn):
    return [e for e in _events(conn, "retention") if e[2]["table"] == "readings"]


def test_retention_thins_raw_keeps_blocks_and_recording_goes_on(tmp_path):
    speed = 2000.0
    with SimulatedMeter("station", meter=0, seed=4, speed=speed) as sim:
        st = parse_station(RETAIN.replace("PORT", sim.port), tmp_path / "station.toml")
        mon = Monitor(st, time_scale=speed, backoff_max_s=0.5)
        th = threading.Thread(target=mon.run)
        th.start()
        conn = sqlite3.connect(st.database, timeout=10)
        try:
            # blocks as first written (retention starts 5 s of host time after the start)
            assert _wait(conn, th, lambda: conn.execute("SELECT count(*) FROM mon_block").fetchone()[0] >= 8, 20)
            before = {r[1:4]: r for r in conn.execute("SELECT * FROM mon_block ORDER BY t_start_utc")}
            assert _wait(conn, th, lambda: len(_raw_thinned(conn)) >= 2, 30)
            n_at = conn.execute("SELECT count(*), max(t_utc) FROM readings").fetchone()
            assert _wait(conn, th, lambda: conn.execute("SELECT count(*) FROM readings WHERE t_utc > ?",
                                                        (n_at[1],)).fetchone()[0] >= 100, 20)
        finally:
            mon.stop()
            th.join(30)
        assert not th.is_alive()
    ev = _raw_thinned(conn)
    last_before = max(d["before_utc"] for _, _, d in ev)
    removed = sum(d["removed"] for _, _, d in ev)
    # thinned: nothing older than the retention bound is left, and the bound honours raw_days
    assert conn.execute("SELECT count(*) FROM readings WHERE t_utc < ?", (last_before,)).fetchone()[0] == 0
    for _, t, d in ev:
        assert d["before_utc"] <= t - 0.03 * 86400 + 1e-6
    assert removed > 150                                 # more than one chunk
    # recording went on meanwhile: from the bound to the end the readings follow each other at the
    # interval (a frame the simulated line corrupts may be missing, never a stretch of them)
    t = [x for x, in conn.execute("SELECT t_utc FROM readings ORDER BY t_utc")]
    assert t[0] >= last_before and t[-1] > max(tt for _, tt, _ in ev)
    assert max(b - a for a, b in zip(t, t[1:])) <= 3 * 10.0 + 1.0
    assert len(t) >= 0.95 * (t[-1] - t[0]) / 10.0
    assert not _events(conn, "gap") and not _events(conn, "internal_error")
    # status rows (about 1.2 MB a meter a day) are thinned to their own, shorter, limit
    st_ev = [d for _, _, d in _events(conn, "retention") if d["table"] == "status"]
    assert st_ev and sum(d["removed"] for d in st_ev) > 0
    st_before = max(d["before_utc"] for d in st_ev)
    assert all(d["before_utc"] <= t - 0.02 * 86400 + 1e-6 for _, t, d in _events(conn, "retention")
               if d["table"] == "status")
    assert conn.execute("SELECT count(*) FROM status WHERE t_utc < ?", (st_before,)).fetchone()[0] == 0
    assert conn.execute("SELECT count(*) FROM status WHERE t_utc >= ?", (st_before,)).fetchone()[0] > 0
    # the derived record is complete over the thinned period and unchanged
    after = {r[1:4]: r for r in conn.execute("SELECT * FROM mon_block ORDER BY t_start_utc")}
    starts = [r[3] for r in after.values()]
    assert len(before) >= 8 and starts == [starts[0] + 360.0 * i for i in range(len(starts))]   # no block missing
    assert starts[0] < last_before - 360.0 and all(r[10] for r in list(after.values())[1:])
    for k, row in before.items():
        assert after[k] == row
