"""Kill the monitor process with SIGKILL at random moments while it records, many times.

Afterwards: the database passes PRAGMA integrity_check, no reading is stored twice, the station
record and the meter's session are the same across all runs, and the only readings lost are those
the device sent within the last commit interval (0.5 s) plus the handling latency before each kill.
"""

from __future__ import annotations

import os
import signal
import sqlite3
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np

from meterlink.storage import spans
from meterlink.simulators.pty_meter import SimulatedMeter
from meterlink.simulators.truth import read_truth

ROOT = Path(__file__).resolve().parents[1]
KILLS = 20
LOSS_WINDOW_S = 2.0      # one commit interval (0.5 s) + calibration and handling latency, on a loaded machine

STATION = """
format = "meterlink-station/1"
[station]
name = "Kestle Down crash-test station"
database = "crash.db"
[assessment]
standard = "icnirp-2020"
tier = "public"
freq = "94.3 MHz"
interval_s = 0.1
[[meter]]
name = "probe-1"
port = "PORT"
certificate = "demo-probe"
[health]
max_gap_s = 5
"""


def _count(db: Path) -> int:
    if not db.exists():
        return 0
    try:
        c = sqlite3.connect(db, timeout=5)
        try:
            return c.execute("SELECT count(*) FROM readings").fetchone()[0]
        finally:
            c.close()
    except sqlite3.OperationalError:
        return 0


def test_sigkill_many_times(tmp_path):
    rng = np.random.default_rng(7)
    truth = tmp_path / "truth.jsonl"
    station = tmp_path / "station.toml"
    db = tmp_path / "crash.db"
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    kills = []        # host monotonic time of each kill
    with SimulatedMeter("station", meter=1, seed=3, speed=1.0, truth_path=truth) as sim:
        station.write_text(STATION.replace("PORT", sim.port))
        pause = threading.Event()
        for i in range(KILLS + 1):
            before = _count(db)
            p = subprocess.Popen([sys.executable, "-m", "meterlink", "monitor", "--config", str(station), "--quiet"],
                                 env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
            deadline = time.monotonic() + 20
            while _count(db) <= before and time.monotonic() < deadline:
                assert p.poll() is None, p.stderr.read().decode()
                pause.wait(0.05)
            assert _count(db) > before, "the monitor stored nothing"
            if i == KILLS:                        # last run: a clean stop
                p.send_signal(signal.SIGTERM)
                assert p.wait(20) == 0
                p.stderr.close()
                break
            pause.wait(float(rng.uniform(0.0, 1.2)))   # a random moment while it records
            kills.append(time.monotonic())
            p.kill()
            p.wait()
            p.stderr.close()
        t0 = sim._t0
    conn = sqlite3.connect(db)
    assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    assert spans.check(conn) == []  # killed mid-write or not, the span index agrees with the rows
    dup = conn.execute("SELECT count(*) FROM (SELECT boot, seq FROM readings GROUP BY boot, seq "
                       "HAVING count(*) > 1)").fetchone()[0]
    assert dup == 0
    assert conn.execute("SELECT count(*) FROM sessions").fetchone()[0] == 1
    assert conn.execute("SELECT runs, state FROM mon_station").fetchone() == (KILLS + 1, "stopped")
    assert conn.execute("SELECT count(*) FROM events WHERE kind='unclean_shutdown'").fetchone()[0] == KILLS
    stored = {(b, s) for b, s in conn.execute("SELECT boot, seq FROM readings")}
    sent = [r for r in read_truth(truth) if r.get("event") == "reading" and r.get("fate") == "sent"]
    # host time at which the device emitted each reading: the end of its integration time
    emitted = {(r["boot"], r["seq"]): t0 + r["t_s"] + 0.05 for r in sent}
    first_stored = sorted(emitted[k] for k in stored if k in emitted)
    for j, k in enumerate(kills):
        start = min((t for t in first_stored if t > (kills[j - 1] if j else 0)), default=k)
        window = [key for key, t in emitted.items() if start <= t <= k - LOSS_WINDOW_S]
        missing = [key for key in window if key not in stored]
        assert not missing, (j, len(missing), len(window))
    assert len(stored) > 50
