"""Readings never vanish without a word: real pty simulators, real SQLite files, real processes.

Each test counts what the simulated device sent (its truth log, simulators/truth.py) against what
the database holds: every reading stored exactly once, or its loss recorded in an event.
"""

import threading
import time
from collections import Counter

from meterlink.storage import spans
from meterlink.storage.recorder import Recorder
from meterlink.storage.store import Store
from meterlink.simulators.pty_meter import SimulatedMeter
from meterlink.simulators.truth import read_truth

SPEED = 50.0


def wait_for(pred, timeout_s=20.0) -> bool:
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if pred():
            return True
        time.sleep(0.02)
    return pred()


def sent(truth_path):
    """The readings the device put on the wire, in the order it sent them: (boot, seq, tick_ms, counts)."""
    return [(t["boot"], t["seq"], t["tick_ms"], tuple(t["counts"])) for t in read_truth(truth_path)
            if t.get("event") == "reading" and t["fate"] == "sent"]


def stored_by_epoch(store, sid):
    """{epoch: [(boot, seq, tick_ms as sent, counts), ...] in arrival order}."""
    out: dict[int, list] = {}
    for b, q, t, x, y, z, e in store.db.execute("select boot, seq, tick_ms, raw_x, raw_y, raw_z, epoch from readings "
                                                "where session_id = ? order by id", [sid]):
        out.setdefault(e, []).append((b, q, t % (1 << 32), (x, y, z)))  # stored unwrapped; the wire tick wraps
    return out


def assert_prefix_stored_once(device, got):
    """Every reading the device sent up to the last one stored is stored, exactly once; returns the unread tail."""
    assert got, "nothing stored"
    assert Counter(got) == Counter(device[:len(got)]), "stored readings differ from what the device sent"
    return len(device) - len(got)


class RecorderThread:
    def __init__(self, store, port, **kw):
        self.rec = Recorder(store, port, interval_ms=1000, host_timeout_s=120.0, **kw)
        self.error = None
        self.thread = threading.Thread(target=self._run, name="test-recorder")
        self.thread.start()

    def _run(self):
        try:
            self.summary = self.rec.run()
        except Exception as exc:  # noqa: BLE001 - reported by the test
            self.error = exc

    def stop(self):
        self.rec.stop()
        self.thread.join(30)
        assert not self.thread.is_alive()
        assert self.error is None, self.error
        return self.summary


def test_a_reflashed_meter_reusing_its_boot_count_loses_nothing(tmp_path):
    """The device restarts and comes back with the SAME boot count (a reflash): before schema 4 its
    readings, (session, boot, seq) already taken, were dropped as "already stored"."""
    truth = tmp_path / "truth.jsonl"
    with Store(tmp_path / "m.db") as store, \
            SimulatedMeter("demo", sensor="probe", seed=1, speed=SPEED, truth_path=truth) as sim:
        rt = RecorderThread(store, sim.port)
        assert wait_for(lambda: rt.rec.session_id and store.count("readings", rt.rec.session_id) >= 30)
        sid = rt.rec.session_id
        boot = sim.fw.boot_count
        sim.restart(boot_count=boot)          # same boot count, seq and tick from 0 again
        assert wait_for(lambda: len(stored_by_epoch(store, sid)) == 2
                        and len(stored_by_epoch(store, sid)[max(stored_by_epoch(store, sid))]) >= 30)
        summary = rt.stop()
        device = sent(truth)
        by_epoch = stored_by_epoch(store, sid)
        assert len(by_epoch) == 2 and {b for rows in by_epoch.values() for b, *_ in rows} == {boot}
        # the second epoch repeats the first one's (boot, seq) pairs: all stored all the same
        first, second = (by_epoch[e] for e in sorted(by_epoch))
        assert len({q for _, q, _, _ in second} & {q for _, q, _, _ in first}) >= 25
        got = first + second
        tail = assert_prefix_stored_once(device, got)
        assert tail <= 3
        assert not store.events(sid, kind="duplicate_reading")
        assert "device_restart" in summary.events_by_kind
        assert spans.check(store.db.conn) == []
        assert store.db.execute("select count(*) from epochs where session_id = ?", [sid]).fetchone()[0] == 2


def test_a_replacement_unit_behind_the_same_port_identical_counters_loses_nothing(tmp_path):
    """A second device (same model, same seed, same boot count and sequence numbers) takes the place
    of the first at the same port path: a new epoch, and every one of its readings stored."""
    port = tmp_path / "ttyMETER"
    t1, t2 = tmp_path / "truth1.jsonl", tmp_path / "truth2.jsonl"
    with Store(tmp_path / "m.db") as store:
        sim1 = SimulatedMeter("demo", sensor="probe", seed=4, speed=SPEED, truth_path=t1, port_path=port).start()
        rt = RecorderThread(store, str(port), backoff_max_s=0.5)
        try:
            assert wait_for(lambda: rt.rec.session_id and store.count("readings", rt.rec.session_id) >= 30)
        finally:
            sim1.stop()
        sid = rt.rec.session_id
        with SimulatedMeter("demo", sensor="probe", seed=4, speed=SPEED, truth_path=t2, port_path=port):
            assert wait_for(lambda: len(stored_by_epoch(store, sid)) == 2
                            and len(stored_by_epoch(store, sid)[max(stored_by_epoch(store, sid))]) >= 30)
            rt.stop()
        by_epoch = stored_by_epoch(store, sid)
        assert len(by_epoch) == 2
        first, second = (by_epoch[e] for e in sorted(by_epoch))
        assert_prefix_stored_once(sent(t1), first)     # the tail unread when the port vanished is all it lost
        assert assert_prefix_stored_once(sent(t2), second) <= 3
        # the two units share boot count and sequence numbers: (session, boot, seq) alone would have
        # taken every one of the second unit's readings for one already stored
        assert len({(b, q) for b, q, *_ in first} & {(b, q) for b, q, *_ in second}) >= 25
        assert not store.events(sid, kind="duplicate_reading")
        assert spans.check(store.db.conn) == []


STATION = """
format = "meterlink-station/1"
[station]
name = "Harrow Gill loss station"
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
[[alarm]]
name = "high"
unit = "v_per_m"
threshold = 1000
command = ["PYTHON", "-c", "import sys; open(sys.argv[1], 'a').write(' '.join(sys.argv[2:4]) + chr(10))", "HOOKLOG"]
[health]
drift_max_ppm = 1e9
max_gap_s = 30
"""


def _monitor(tmp_path, port, speed):
    import sys

    from meterlink.station.monitor import Monitor
    from meterlink.station.stationfile import parse_station

    text = (STATION.replace("PORT", port).replace("PYTHON", sys.executable)
            .replace("HOOKLOG", str(tmp_path / "hook.log")))
    (tmp_path / "station.toml").write_text(text)
    st = parse_station(text, tmp_path / "station.toml")
    mon = Monitor(st, time_scale=speed, backoff_max_s=0.5)
    th = threading.Thread(target=mon.run, name="test-monitor")
    th.start()
    return st, mon, th


def _set_page_limit(mon, pages):
    """Reproduce a full disk on the monitor's own connection: SQLite's PRAGMA max_page_count
    (sqlite.org/pragma.html#pragma_max_page_count) makes any write needing a new page fail with SQLITE_FULL."""
    with mon.store._lock:
        if pages is None:
            pages = mon.conn.execute("PRAGMA page_count").fetchone()[0]
        mon.conn.execute(f"PRAGMA max_page_count = {int(pages)}")


def test_monitor_keeps_the_batch_when_the_disk_is_full_and_says_it_is_not_storing(tmp_path, capsys):
    """Issue 14: a failed commit used to empty the buffer first (6,250 readings lost in one run). Now
    the batch stays in memory, the commit is retried with back-off, a storage_failed event and the
    alarm hooks say so, `meterlink status` says the station is not storing, and once the disk has
    room again every reading the device sent is stored exactly once."""
    import sqlite3

    from meterlink import cli

    speed = 20.0
    truth = tmp_path / "truth.jsonl"
    with SimulatedMeter("demo", sensor="probe", seed=7, speed=speed, truth_path=truth) as sim:
        st, mon, th = _monitor(tmp_path, sim.port, speed)
        conn = sqlite3.connect(st.database, timeout=10)
        sid = mon.meters[0].session_id
        try:
            assert wait_for(lambda: store_count(conn, sid) >= 40)
            _set_page_limit(mon, None)
            assert wait_for(lambda: conn.execute("select storing from mon_storage").fetchone()[0] == 0, 10)
            n_full = store_count(conn, sid)
            # while it is full: nothing new stored, readings piling up in memory, status says so
            assert wait_for(lambda: mon.meters[0].writer.pending_readings >= 40, 10)
            assert store_count(conn, sid) == n_full
            capsys.readouterr()
            assert cli.main(["status", "--db", str(st.database)]) == 0
            out = capsys.readouterr().out
            assert "NOT STORING" in out and "full" in out
            _set_page_limit(mon, 1073741823)    # room again
            assert wait_for(lambda: conn.execute("select count(*) from events where kind = 'storage_recovered'"
                                                 ).fetchone()[0] == 1, 30)
            assert wait_for(lambda: store_count(conn, sid) >= n_full + 60)
        finally:
            mon.stop()
            th.join(30)
        assert not th.is_alive()
    got = [(b, q, t % (1 << 32), (x, y, z)) for b, q, t, x, y, z in conn.execute(
        "select boot, seq, tick_ms, raw_x, raw_y, raw_z from readings where session_id = ? order by id", [sid])]
    tail = assert_prefix_stored_once(sent(truth), got)
    assert tail <= 3
    (err,) = [m for (m,) in conn.execute("select message from events where kind = 'storage_failed'")]
    assert "full" in err
    assert conn.execute("select storing from mon_storage").fetchone()[0] == 1
    assert not conn.execute("select count(*) from events where kind in ('internal_error', 'readings_dropped')"
                            ).fetchone()[0]
    assert conn.execute("select state from mon_station").fetchone()[0] == "stopped"
    hooks = (tmp_path / "hook.log").read_text().split("\n")
    assert "start not_storing" in hooks and "end not_storing" in hooks


def store_count(conn, sid):
    return conn.execute("select count(*) from readings where session_id = ?", [sid]).fetchone()[0]


def _record_cmd(port, db, *extra):
    import sys

    return [sys.executable, "-m", "meterlink", "record", "--port", str(port), "--db", str(db), "--json", *extra]


def _file_size_limit(limit_bytes):
    """preexec_fn: a process whose files cannot grow past limit_bytes, as on a full disk (RLIMIT_FSIZE,
    POSIX setrlimit(2)); SIGXFSZ ignored so that the write fails with EFBIG instead of killing it."""
    import resource
    import signal

    def apply():
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
        resource.setrlimit(resource.RLIMIT_FSIZE, (limit_bytes, limit_bytes))
    return apply


def test_record_on_a_full_disk_ends_cleanly_with_the_session_closed(tmp_path):
    """Issue 14: `record` on a full disk ended in a traceback and left the session open."""
    import os
    import subprocess

    db = tmp_path / "full.db"
    Store(db).close()                       # an existing file; the recording's writes will not fit
    limit = os.path.getsize(db) + 96 * 1024
    truth = tmp_path / "truth.jsonl"
    with SimulatedMeter("demo", sensor="probe", seed=2, speed=200.0, truth_path=truth) as sim:
        proc = subprocess.run(_record_cmd(sim.port, db, "--duration", "100000"), capture_output=True, text=True,
                              timeout=120, preexec_fn=_file_size_limit(limit))
    assert proc.returncode == 2, proc.stderr
    assert "Traceback" not in proc.stderr and proc.stderr.count("\n") == 1, proc.stderr
    assert "cannot be written" in proc.stderr and "recording stopped" in proc.stderr
    with Store(db) as store:
        (s,) = store.sessions()
        assert s["ended_utc"] is not None                     # closed, not left open
        n = store.count("readings", s["id"])
        assert n > 0 and f"keeps the {n} reading(s) stored" in proc.stderr
        got = stored_by_epoch(store, s["id"])
        (rows,) = got.values()
        assert Counter(rows) == Counter(sent(truth)[:len(rows)])   # what was stored is intact, once each
        assert spans.check(store.db.conn) == [] and store.verify() == []


def test_record_ends_cleanly_on_sigterm(tmp_path):
    """Issue 14: `record` ignored SIGTERM (last second lost, session open)."""
    import signal
    import sqlite3
    import subprocess

    db = tmp_path / "term.db"
    truth = tmp_path / "truth.jsonl"
    with SimulatedMeter("demo", sensor="probe", seed=5, speed=10.0, truth_path=truth) as sim:
        proc = subprocess.Popen(_record_cmd(sim.port, db), stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        try:
            def count():
                try:
                    with sqlite3.connect(f"file:{db}?mode=ro", uri=True) as c:
                        return c.execute("select count(*) from readings").fetchone()[0]
                except sqlite3.Error:
                    return 0
            assert wait_for(lambda: count() >= 20, 30)
            proc.send_signal(signal.SIGTERM)
            out, err = proc.communicate(timeout=30)
        finally:
            if proc.poll() is None:
                proc.kill()
    assert proc.returncode == 0, err
    assert "Traceback" not in err
    import json
    summary = json.loads(out)
    with Store(db) as store:
        (s,) = store.sessions()
        assert s["ended_utc"] is not None
        (rows,) = stored_by_epoch(store, s["id"]).values()
        assert summary["readings"] == len(rows) >= 20
        tail = assert_prefix_stored_once(sent(truth), rows)
        assert tail <= 5      # only what was still in the port when the host stopped reading


def test_record_on_a_port_where_no_meter_answers(tmp_path):
    """Issue 14: `record` on a silent port stored an empty session and exited 0 after 40 s."""
    import os
    import subprocess

    master, slave = os.openpty()            # a real serial device (pty) with nothing behind it
    try:
        port = os.ttyname(slave)
        db = tmp_path / "nobody.db"
        t0 = time.monotonic()
        proc = subprocess.run(_record_cmd(port, db, "--duration", "60"), capture_output=True, text=True, timeout=60)
        elapsed = time.monotonic() - t0
    finally:
        os.close(master)
        os.close(slave)
    assert proc.returncode == 2 and proc.stdout == ""
    assert proc.stderr.count("\n") == 1 and "no meter answered on" in proc.stderr, proc.stderr
    assert "Traceback" not in proc.stderr
    assert not list(tmp_path.iterdir())     # no database file (nor -wal/-shm) left behind
    assert elapsed < 20
    # an existing database is kept, and gets no empty session
    db = tmp_path / "kept.db"
    Store(db).close()
    master, slave = os.openpty()
    try:
        proc = subprocess.run(_record_cmd(os.ttyname(slave), db), capture_output=True, text=True, timeout=60)
    finally:
        os.close(master)
        os.close(slave)
    assert proc.returncode == 2 and "no meter answered" in proc.stderr
    with Store(db) as store:
        assert store.sessions() == []


def account(device_sent, stored_rows, gaps):
    """(stored, reported_lost, unaccounted) of the readings a device sent up to the last one stored:
    each is stored exactly once, or lies inside a seq_gap event's (prev_seq, seq) range of its boot."""
    assert len(set(stored_rows)) == len(stored_rows), "a reading stored twice"
    have = set(stored_rows)
    last = {}
    for b, q, *_ in stored_rows:
        last[b] = max(last.get(b, -1), q)
    stored = lost = unaccounted = 0
    for r in device_sent:
        b, q = r[0], r[1]
        if q > last.get(b, -1):
            continue                  # after the last stored one: still in the port when recording stopped
        if r in have:
            stored += 1
        elif any(g["boot"] == b and g["prev_seq"] < q < g["seq"] for g in gaps):
            lost += 1
        else:
            unaccounted += 1
    return stored, lost, unaccounted


def test_a_flooding_device_is_held_back_never_dropped_silently(tmp_path):
    """Issue 14: with the link queue full, readings were dropped with only an in-memory count. Now the
    reader waits for the consumer (back-pressure, the queue stays bounded); what the device cannot
    hand over meanwhile is lost in the port and reported as seq_gap events with exact counts."""
    truth = tmp_path / "truth.jsonl"
    n = [0]

    def slow_consumer(item):          # a consumer that stalls now and then, as on a slow disk
        n[0] += 1
        if n[0] % 400 == 0:
            time.sleep(0.3)

    with Store(tmp_path / "m.db") as store, \
            SimulatedMeter("demo", sensor="probe", seed=8, speed=10.0, truth_path=truth, quirks={"flood": 100}) as sim:
        rt = RecorderThread(store, sim.port, queue_max=100, on_item=slow_consumer)
        assert wait_for(lambda: rt.rec.link.stats.backpressure_waits >= 3 and rt.rec.session_id
                        and store.count("readings", rt.rec.session_id) >= 2000, 60)
        rt.stop()
        sid = rt.rec.session_id
        link = rt.rec.link
        assert link.queue.maxsize == 100 and link.stats.queue_overflow == 0
        (rows,) = stored_by_epoch(store, sid).values()
        gaps = [e["detail"] for e in store.events(sid, kind="seq_gap")]
        stored, lost, unaccounted = account(sent(truth), rows, gaps)
        print(f"\nflood: sent {stored + lost + unaccounted} (to the last stored), stored {stored}, "
              f"reported lost {lost}, unaccounted {unaccounted}; reader paused {link.stats.backpressure_waits} "
              f"time(s), {link.stats.backpressure_s:.2f} s")
        assert unaccounted == 0 and stored == len(rows)
        (bp,) = store.events(sid, kind="backpressure")
        assert 3 <= bp["detail"]["waits"] <= link.stats.backpressure_waits   # the event itself may wait once more
        assert spans.check(store.db.conn) == []


def test_kills_during_start_up_never_lose_the_unclean_shutdown_event(tmp_path):
    """Issue 14: a monitor killed before its first commit lost the unclean_shutdown event (of the run
    before it). Now that event and monitor_started are stored in the very transaction that marks the
    run as running. Real processes, SIGKILL at seeded random moments of start-up."""
    import signal
    import sqlite3
    import subprocess
    import sys

    import numpy as np

    rng = np.random.default_rng(14)
    with SimulatedMeter("demo", sensor="probe", seed=9, speed=20.0) as sim:
        text = (STATION.replace("PORT", sim.port).replace("PYTHON", sys.executable)
                .replace("HOOKLOG", str(tmp_path / "hook.log")))
        cfg = tmp_path / "station.toml"
        cfg.write_text(text)
        db = tmp_path / "station.db"
        cmd = [sys.executable, "-m", "meterlink", "monitor", "--config", str(cfg), "--time-scale", "20", "--quiet"]

        def station():
            try:
                with sqlite3.connect(f"file:{db}?mode=ro", uri=True) as c:
                    return c.execute("select runs, state from mon_station").fetchone() or (0, None)
            except sqlite3.Error:
                return (0, None)

        killed_running = 0
        for delay in rng.uniform(0.2, 2.5, 6):
            before = station()[0]
            proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
            try:
                proc.wait(timeout=float(delay))   # the fault: a kill at this moment of start-up
            except subprocess.TimeoutExpired:
                pass
            proc.send_signal(signal.SIGKILL)
            proc.wait(timeout=10)
            runs, state = station()
            if runs > before:
                assert state == "running"
                killed_running += 1
        def readings():
            try:
                with sqlite3.connect(f"file:{db}?mode=ro", uri=True) as c:
                    return c.execute("select count(*) from readings").fetchone()[0]
            except sqlite3.Error:
                return 0
        n0 = readings()
        proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
        try:  # readings committed by this run: it is past start-up and has its SIGTERM handler
            assert wait_for(lambda: station()[0] >= killed_running + 1 and readings() > n0, 30)
            proc.send_signal(signal.SIGTERM)
            _, err = proc.communicate(timeout=30)
        finally:
            if proc.poll() is None:
                proc.kill()
        assert proc.returncode == 0, err
    assert killed_running >= 2, "no kill landed after the station record: widen the delays"
    with sqlite3.connect(db) as c:
        runs, state = c.execute("select runs, state from mon_station").fetchone()
        kinds = Counter(k for (k,) in c.execute("select kind from events where session_id is null"))
    assert state == "stopped" and runs == killed_running + 1
    assert kinds["unclean_shutdown"] == killed_running       # one per killed run, none lost
    assert kinds["monitor_started"] == runs
