"""One monitor process (`meterlink monitor`) recording n load-generator meters at 10 readings/s each.

Shared by bench/bench_many_meters.py and tests/test_monitor_many.py: starts the load farm
(bench/loadfarm.py), writes a station file, runs the monitor as its own process, samples its CPU
and the readings stored over measured intervals, stops it with SIGTERM and checks every meter's
stored readings against the truth of what its generator sent.
"""

from __future__ import annotations

import os
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

from farm import proc_cpu_s, proc_rss_mb
from loadfarm import LoadFarm, truth_losses
from loadgen import raise_fd_limit

ROOT = Path(__file__).resolve().parents[1]

HEAD = """format = "meterlink-station/1"
[station]
name = "Load station (synthetic)"
database = "{db}"
[assessment]
standard = "icnirp-2020"
tier = "public"
band = ["80 MHz", "4 GHz"]
convention = "power"
interval_s = {interval_s}
[health]
drift_max_ppm = 1e9
"""
METER = """[[meter]]
name = "m{i:04d}"
port = "{port}"
certificate = "demo-probe"
"""


def _wait_cpu(proc: subprocess.Popen, timeout_s: float) -> tuple[int, float | None]:
    """Wait for a child (killed after timeout_s): its exit code and its whole CPU time (os.wait4)."""
    deadline = time.monotonic() + timeout_s
    while True:
        pid, status, ru = os.wait4(proc.pid, os.WNOHANG)
        if pid:
            proc.returncode = os.waitstatus_to_exitcode(status)
            return proc.returncode, ru.ru_utime + ru.ru_stime
        if time.monotonic() > deadline:
            proc.kill()
            _, status, ru = os.wait4(proc.pid, 0)
            proc.returncode = os.waitstatus_to_exitcode(status)
            return proc.returncode, None
        time.sleep(0.1)


def stored(db: Path) -> int:
    """Readings stored so far (from the span index: no scan of the readings)."""
    try:
        with sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=10) as c:
            return int(c.execute("SELECT coalesce(sum(n), 0) FROM reading_spans").fetchone()[0])
    except sqlite3.Error:
        return 0


def streaming(db: Path) -> int:
    try:
        with sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=10) as c:
            return int(c.execute("SELECT count(*) FROM mon_meter WHERE link_state='streaming'").fetchone()[0])
    except sqlite3.Error:
        return 0


def run_station(tmp, n: int, intervals: int = 3, interval_s: float = 20.0, settle_s: float = 15.0,
                procs: int = 2, reading_interval_s: float = 0.1, seed: int = 0) -> dict:
    """Run the station; returns per-interval CPU and readings, the loss checks and the monitor's exit."""
    tmp = Path(tmp)
    soft = raise_fd_limit(5 * n + 256)       # the monitor inherits it: five per pyserial port, plus its own
    db = tmp / "station.db"
    out: dict = {"n": n, "fd_soft_limit": soft, "samples": []}
    with LoadFarm(n, tmp, procs=procs, seed=seed) as farm:
        cfg = tmp / "station.toml"
        cfg.write_text(HEAD.format(db=db, interval_s=reading_interval_s)
                       + "".join(METER.format(i=i, port=p) for i, p in enumerate(farm.ports)))
        log = open(tmp / "monitor.log", "w")
        mon = subprocess.Popen([sys.executable, "-m", "meterlink", "monitor", "--config", str(cfg)], cwd=ROOT,
                               stdout=log, stderr=subprocess.STDOUT, env={**os.environ, "PYTHONUNBUFFERED": "1"})
        try:
            deadline = time.monotonic() + 60 + n * 0.1
            while streaming(db) < n:          # every meter handshaken (mon_meter rows are rewritten per commit)
                if mon.poll() is not None or time.monotonic() > deadline:
                    raise RuntimeError(f"monitor not streaming from all {n} meters "
                                       f"({streaming(db)} after {time.monotonic() - deadline:.0f} s)")
                time.sleep(0.5)
            c_stream, n_stream = proc_cpu_s(mon.pid), stored(db)   # every meter streaming from here on
            time.sleep(settle_s)              # settling: first blocks, caches (a measured wait, not a sync)
            for _ in range(intervals):
                c0, n0, w0, f0 = proc_cpu_s(mon.pid), stored(db), time.monotonic(), farm.cpu_s()
                time.sleep(interval_s)
                c1, n1, w1, f1 = proc_cpu_s(mon.pid), stored(db), time.monotonic(), farm.cpu_s()
                out["samples"].append({"cpu_s": c1 - c0, "readings": n1 - n0, "wall_s": w1 - w0, "farm_cpu_s": f1 - f0,
                                       "offered": n * (w1 - w0) / reading_interval_s})
            out["rss_mib"], out["hwm_mib"] = proc_rss_mb(mon.pid)
        finally:
            mon.send_signal(signal.SIGTERM)
            out["monitor_rc"], cpu_end = _wait_cpu(mon, 120)
            log.close()
    out["sent"], out["unsent_bytes"] = farm.sent, farm.unsent_bytes
    with sqlite3.connect(db) as c:
        sessions = dict(c.execute("SELECT meter, session_id FROM mon_meter"))
        out["checks"] = [truth_losses(c, sessions[f"m{i:04d}"], farm.truth[i]) for i in range(n)]
        out["events"] = dict(c.execute("SELECT kind, count(*) FROM events GROUP BY kind"))
        out["integrity"] = c.execute("PRAGMA quick_check").fetchone()[0]
    if "c_stream" in locals() and cpu_end is not None:
        # the whole run from the moment every meter streamed to the monitor's exit (its last commit
        # included): CPU per reading stored, which a monitor falling behind cannot flatter
        n_end = stored(db)
        out["whole_run"] = {"cpu_s": cpu_end - c_stream, "readings": n_end - n_stream}
    out["loss"] = sum(ch["missing"] + ch["extra"] + ch["duplicates"] for ch in out["checks"])
    return out
