"""Fault injection: a monitoring station under restarts with a reused boot count, floods, a full disk
and SIGKILLs at random moments (including before the first commit), counted against the simulated
device's truth log (simulators/truth.py).

Every reading the device sent up to the last one stored is either stored exactly once or lies in
a range a stored event reports as lost (seq_gap with lost/prev_seq/seq, readings_dropped with its
ranges). Real processes (`meterlink monitor`), real signals, a real pty, a real SQLite file; the
full disk is the process's file-size limit (POSIX RLIMIT_FSIZE, lowered and raised on the running
process with prlimit(2)).
"""

from __future__ import annotations

import json
import os
import resource
import signal
import sqlite3
import subprocess
import sys
import time
from collections import Counter

import numpy as np
import pytest

from meterlink.simulators.pty_meter import SimulatedMeter
from meterlink.simulators.truth import read_truth

STATION = """
format = "meterlink-station/1"
[station]
name = "Corrie Fell fault station"
database = "station.db"
heartbeat_s = 1
[assessment]
standard = "icnirp-2020"
tier = "public"
band = ["80 MHz", "4 GHz"]
interval_s = 1
windows_s = [360]
[[meter]]
name = "mast"
port = "PORT"
certificate = "demo-probe"
[health]
drift_max_ppm = 1e9
max_gap_s = 30
"""
SPEED = 20.0


def _wait(pred, timeout_s):
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if pred():
            return True
        time.sleep(0.05)
    return pred()


def _no_sigxfsz():
    signal.signal(signal.SIGXFSZ, signal.SIG_IGN)  # a file-size limit then fails the write (EFBIG)


class Station:
    def __init__(self, tmp_path, port):
        self.dir = tmp_path
        cfg = tmp_path / "station.toml"
        cfg.write_text(STATION.replace("PORT", port))
        self.db = tmp_path / "station.db"
        self.cmd = [sys.executable, "-m", "meterlink", "monitor", "--config", str(cfg), "--time-scale", str(SPEED),
                    "--quiet"]
        self.proc = None

    def q(self, sql, *args, default=None):
        try:
            with sqlite3.connect(f"file:{self.db}?mode=ro", uri=True, timeout=10) as c:
                row = c.execute(sql, args).fetchone()
                return default if row is None else row[0]
        except sqlite3.Error:
            return default

    def readings(self):
        return self.q("select count(*) from readings", default=0)

    def start(self):
        with open(self.dir / "monitor.err", "a") as err:   # the child keeps its own copy of the descriptor
            self.proc = subprocess.Popen(self.cmd, stdout=subprocess.DEVNULL, stderr=err, preexec_fn=_no_sigxfsz)

    def running(self, timeout_s=30.0):
        """Wait until this run has stored readings (past start-up, signal handlers in place)."""
        n0 = self.readings()
        assert _wait(lambda: self.readings() > n0 or self.proc.poll() is not None, timeout_s)
        assert self.proc.poll() is None, (self.dir / "monitor.err").read_text()

    def kill(self):
        self.proc.send_signal(signal.SIGKILL)
        self.proc.wait(10)

    def stop(self):
        self.proc.send_signal(signal.SIGTERM)
        self.proc.wait(timeout=60)
        err = (self.dir / "monitor.err").read_text()
        assert self.proc.returncode == 0, err
        assert "Traceback" not in err


def run_faults(tmp_path, seed: int, rounds: int):
    rng = np.random.default_rng(seed)
    truth = tmp_path / "truth.jsonl"
    tried: Counter = Counter()
    with SimulatedMeter("demo", sensor="probe", seed=seed, speed=SPEED, truth_path=truth) as sim:
        st = Station(tmp_path, sim.port)
        try:
            _faults(st, sim, rng, rounds, tried)
        finally:
            if st.proc is not None and st.proc.poll() is None:
                st.proc.kill()
            if st.proc is not None:
                st.proc.wait()
    return truth, st.db, tried


def _faults(st, sim, rng, rounds, tried):
    if True:
        st.start()
        st.running()
        for _ in range(rounds):
            for fault in rng.permutation(["kill_startup", "kill_running", "restart_reused_boot", "flood", "disk_full"]):
                tried[fault] += 1
                if fault == "kill_startup":          # SIGKILL at a random moment of start-up
                    st.kill()
                    st.start()
                    try:
                        st.proc.wait(timeout=float(rng.uniform(0.05, 2.0)))
                    except subprocess.TimeoutExpired:
                        pass
                    st.kill()
                    st.start()
                    st.running()
                elif fault == "kill_running":        # SIGKILL at a random moment of a running station
                    time.sleep(float(rng.uniform(0.0, 1.0)))  # the fault's timing, not a synchronisation
                    st.kill()
                    st.start()
                    st.running()
                elif fault == "restart_reused_boot":  # a reflash: the same boot count, seq and tick from 0
                    sim.restart(boot_count=sim.fw.boot_count)
                    n = st.q("select count(*) from epochs", default=0)
                    assert _wait(lambda: st.q("select count(*) from epochs", default=0) > n, 30)
                    st.running()
                elif fault == "flood":                # 50 readings per interval for a while
                    with sim._lock:
                        sim.fw.quirks["flood"] = 50
                    time.sleep(float(rng.uniform(1.0, 2.0)))  # how long the flood lasts
                    with sim._lock:
                        sim.fw.quirks["flood"] = 1
                    st.running()
                else:                                 # the disk fills up, then has room again
                    biggest = max(os.path.getsize(p) for p in (st.db, st.dir / "station.db-wal") if p.exists())
                    lim = biggest + 16 * 1024
                    inf = resource.RLIM_INFINITY      # the soft limit only: raising it back needs no privilege
                    resource.prlimit(st.proc.pid, resource.RLIMIT_FSIZE, (lim, inf))
                    n = st.q("select count(*) from events where kind = 'storage_recovered'", default=0)
                    hit = _wait(lambda: st.q("select storing from mon_storage", default=1) == 0, 15)
                    time.sleep(float(rng.uniform(1.0, 3.0)))  # how long the disk stays full
                    resource.prlimit(st.proc.pid, resource.RLIMIT_FSIZE, (inf, inf))
                    if hit:
                        assert _wait(lambda: st.q("select count(*) from events where kind = 'storage_recovered'",
                                                  default=0) > n, 60)
                    st.running()
        st.stop()


def tally(truth_path, db):
    """(sent, stored, reported_lost, unaccounted, duplicates, tail) over the device's readings."""
    sent = [(t["boot"], t["seq"], t["tick_ms"], tuple(t["counts"])) for t in read_truth(truth_path)
            if t.get("event") == "reading" and t["fate"] == "sent"]
    with sqlite3.connect(db) as c:
        rows = [(b, q, t % (1 << 32), (x, y, z)) for b, q, t, x, y, z in
                c.execute("select boot, seq, tick_ms, raw_x, raw_y, raw_z from readings order by id")]
        gaps = [json.loads(d) for (d,) in c.execute("select detail from events where kind = 'seq_gap'")]
        drops = [json.loads(d) for (d,) in c.execute("select detail from events where kind = 'readings_dropped'")]
        problems = c.execute("pragma integrity_check").fetchone()[0]
        kinds = Counter(k for (k,) in c.execute("select kind from events"))
        down = sum(1 for g in gaps if g.get("while_down"))
        epochs = c.execute("select count(*) from epochs").fetchone()[0]
    from meterlink.storage import spans
    with sqlite3.connect(db) as c:
        span_problems = spans.check(c)
    counts = Counter(rows)
    dup = sum(n - 1 for n in counts.values() if n > 1)
    have = Counter(rows)
    last_key = rows[-1][:2]
    # the tail: readings the device sent after the last one stored (still in the port at the final stop)
    end = max(i for i, r in enumerate(sent) if r[:2] == last_key)
    stored = lost = unaccounted = 0
    missing = []
    for r in sent[:end + 1]:
        b, q = r[0], r[1]
        if have[r] > 0:
            have[r] -= 1
            stored += 1
        elif any(g.get("boot") == b and g["prev_seq"] < q < g["seq"] for g in gaps) or \
                any(rb == b and lo <= q <= hi for d in drops for rb, _, lo, hi in d["ranges"]):
            lost += 1
        else:
            unaccounted += 1
            missing.append(r[:2])
    return {"sent": end + 1, "stored": stored, "reported_lost": lost, "unaccounted": unaccounted,
            "duplicates": dup, "tail": len(sent) - end - 1, "integrity": problems, "spans": span_problems,
            "missing": missing[:10], "storage_failed": kinds["storage_failed"],
            "storage_recovered": kinds["storage_recovered"], "unclean_shutdown": kinds["unclean_shutdown"],
            "gaps_while_down": down, "seq_gaps": len(gaps), "readings_dropped": len(drops), "epochs": epochs}


def report(tried, t):
    lines = ["", "fault                 tried", *(f"{k:20s}  {v:5d}" for k, v in sorted(tried.items())),
             f"readings sent (to the last stored) {t['sent']}, stored {t['stored']}, reported lost "
             f"{t['reported_lost']}, unaccounted {t['unaccounted']}, stored twice {t['duplicates']}, "
             f"unread at the final stop {t['tail']}",
             f"events: storage_failed {t['storage_failed']}, storage_recovered {t['storage_recovered']}, "
             f"unclean_shutdown {t['unclean_shutdown']}, seq_gap {t['seq_gaps']} ({t['gaps_while_down']} across a "
             f"kill), readings_dropped {t['readings_dropped']}; epochs {t['epochs']}"]
    print("\n".join(lines))


def check(t, tried):
    assert t["integrity"] == "ok" and t["spans"] == []
    assert t["storage_failed"] >= 1 and t["storage_recovered"] == t["storage_failed"]  # the full disk was met
    assert t["epochs"] >= 1 + tried["restart_reused_boot"] + tried["kill_running"] + tried["kill_startup"]
    assert t["duplicates"] == 0
    assert t["unaccounted"] == 0, t["missing"]
    assert t["stored"] + t["reported_lost"] == t["sent"]


def test_fault_injection_short(tmp_path):
    truth, db, tried = run_faults(tmp_path, seed=140, rounds=1)
    t = tally(truth, db)
    report(tried, t)
    check(t, tried)


@pytest.mark.slow
def test_fault_injection_long(tmp_path):
    truth, db, tried = run_faults(tmp_path, seed=141, rounds=6)
    t = tally(truth, db)
    report(tried, t)
    check(t, tried)
