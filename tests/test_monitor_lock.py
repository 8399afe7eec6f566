"""One monitor per station: a second `meterlink monitor` for the same station is refused (exit 2,
one line naming the holder's pid), the first keeps recording, and a killed holder never leaves a
stale lock behind (the kernel drops a flock with its process). Real processes on a pty simulator."""

from __future__ import annotations

import os
import signal
import sqlite3
import subprocess
import sys
import threading
import time
from pathlib import Path

from meterlink.station.lock import StationLock, StationLockedError, lock_path
from meterlink.simulators.pty_meter import SimulatedMeter

ROOT = Path(__file__).resolve().parents[1]

STATION = """
format = "meterlink-station/1"
[station]
name = "Kestle Down lock-test station"
database = "lock.db"
[assessment]
standard = "icnirp-2020"
tier = "public"
freq = "94.3 MHz"
interval_s = 0.1
[[meter]]
name = "probe-1"
port = "PORT"
certificate = "demo-probe"
"""


def _count(db: Path) -> int:
    try:
        c = sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=5)
        try:
            return c.execute("SELECT count(*) FROM readings").fetchone()[0]
        finally:
            c.close()
    except sqlite3.OperationalError:
        return 0


def _start(station: Path) -> subprocess.Popen:
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    return subprocess.Popen([sys.executable, "-m", "meterlink", "monitor", "--config", str(station), "--quiet"],
                            env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)


def _wait_more(p: subprocess.Popen, db: Path, than: int, timeout_s: float = 20.0) -> int:
    deadline, pause = time.monotonic() + timeout_s, threading.Event()
    while time.monotonic() < deadline:
        n = _count(db)
        if n > than:
            return n
        assert p.poll() is None, p.stderr.read()
        pause.wait(0.05)
    raise AssertionError(f"no readings beyond {than} within {timeout_s} s")


def test_second_monitor_is_refused_and_first_goes_on(tmp_path):
    station, db = tmp_path / "station.toml", tmp_path / "lock.db"
    with SimulatedMeter("station", meter=1, seed=5, speed=1.0) as sim:
        station.write_text(STATION.replace("PORT", sim.port))
        first = _start(station)
        try:
            n1 = _wait_more(first, db, 0)
            second = _start(station)
            try:
                assert second.wait(30) == 2
                err = second.stderr.read().strip()
            finally:
                second.stderr.close()
            assert len(err.splitlines()) == 1 and "Traceback" not in err
            assert f"already monitored by pid {first.pid}" in err and "lock.db.lock" in err
            _wait_more(first, db, n1)            # the first one still records
            # SIGKILL the holder: the next monitor starts at once (no stale lock)
            first.kill()
            first.wait()
            third = _start(station)
            try:
                _wait_more(third, db, _count(db))
                third.send_signal(signal.SIGTERM)
                assert third.wait(30) == 0
            finally:
                if third.poll() is None:
                    third.kill()
                    third.wait()
                third.stderr.close()
        finally:
            if first.poll() is None:
                first.kill()
                first.wait()
            first.stderr.close()
    conn = sqlite3.connect(db)
    try:
        # the refused run never touched the station record: 2 runs (first, third), one refused
        assert conn.execute("SELECT runs, state FROM mon_station").fetchone() == (2, "stopped")
        assert conn.execute("SELECT count(*) FROM events WHERE kind='monitor_started'").fetchone()[0] == 2
    finally:
        conn.close()


def test_lock_in_process(tmp_path):
    db = tmp_path / "x.db"
    with StationLock(db, "a"):
        try:
            StationLock(db, "a").acquire()
        except StationLockedError as exc:
            assert str(os.getpid()) in str(exc) and str(lock_path(db)) in str(exc)
        else:
            raise AssertionError("second lock taken")
    StationLock(db).acquire().release()          # free again after release


def test_failed_open_gives_the_lock_back(tmp_path):
    from meterlink.errors import CertificateError
    from meterlink.station.monitor import Monitor
    from meterlink.station.stationfile import parse_station

    st = parse_station(STATION.replace("PORT", "/dev/null").replace('"demo-probe"', '"missing-cert.toml"'),
                       tmp_path / "station.toml")
    for _ in range(2):       # the second attempt meets the same error, not a lock left by the first
        try:
            Monitor(st)
        except CertificateError as exc:
            assert "missing-cert.toml" in str(exc)
        else:
            raise AssertionError("a missing certificate was accepted")
    StationLock(st.database).acquire().release()
