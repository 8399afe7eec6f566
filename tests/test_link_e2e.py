"""End to end over a real pty: SimulatedMeter -> pyserial -> MeterLink -> Recorder -> SQLite.

The simulator's truth log lists every reading the device produced and its fate (sent, dropped,
corrupted, unplugged); the database must agree with it.
"""

import time

import pytest

from meterlink.device.link import MeterLink, Reading
from meterlink.storage.recorder import Recorder
from meterlink.storage.store import Store
from meterlink.simulators.pty_meter import SimulatedMeter
from meterlink.simulators.truth import read_truth

SPEED = 100.0


def truth_readings(path):
    return [r for r in read_truth(path) if r.get("event") == "reading"]


def stored(store, sid):
    r = store.readings(sid)
    return [(int(b), int(q), int(t), tuple(int(c) for c in raw))
            for b, q, t, raw in zip(r.boot, r.seq, r.tick_ms, r.raw)]


def test_no_faults_every_sent_reading_arrives_once_in_order(tmp_path):
    truth_path = tmp_path / "truth.jsonl"
    with Store(tmp_path / "m.db") as store:
        with SimulatedMeter("demo", sensor="probe", seed=0, speed=SPEED, truth_path=truth_path) as sim:
            rec = Recorder(store, sim.port, interval_ms=1000, duration_s=150.0, host_timeout_s=20.0)
            summary = rec.run()
        got = stored(store, summary.session_id)
        kinds = summary.events_by_kind
        assert summary.stop_reason == "duration reached"
        sent = [t for t in truth_readings(truth_path) if t["fate"] == "sent"]
        assert len(got) >= 150
        # order by storage time equals device order, and no seq repeats
        assert [g[1] for g in got] == sorted({g[1] for g in got})
        last = got[-1][1]
        expected = [(t["boot"], t["seq"], t["tick_ms"], tuple(t["counts"])) for t in sent if t["seq"] <= last]
        assert got == expected  # every reading the device sent up to the last stored one, exactly once
        assert "seq_gap" not in kinds and "crc_error" not in kinds and "port_lost" not in kinds
        assert kinds.get("handshake") == 1
        s = store.session(summary.session_id)
        assert s["device_model"] and s["clock_utc0_s"] is not None and s["ended_utc"] is not None
        # accelerated device clock: the ratio is reported, honestly, near the simulator's speed
        assert s["clock_rate_ratio"] == pytest.approx(SPEED, rel=0.2)
        assert store.events(summary.session_id, kind="clock_drift")


def test_faults_nothing_corrupt_stored_gaps_reported_and_recording_resumes(tmp_path):
    truth_path = tmp_path / "truth.jsonl"
    # device seconds: the port vanishes at 30 s for 20 s, the device resets at 120 s
    faults = {"drop": 0.05, "corrupt": 0.1, "garbage": 0.1,
              "schedule": [{"kind": "disconnect", "at_s": 30, "down_s": 20}, {"kind": "restart", "at_s": 120}]}
    with Store(tmp_path / "m.db") as store:
        with SimulatedMeter("demo", sensor="probe", seed=3, speed=SPEED, faults=faults, truth_path=truth_path) as sim:
            rec = Recorder(store, sim.port, interval_ms=1000, duration_s=150.0, host_timeout_s=25.0)
            summary = rec.run()
            sim_stats = sim.stats
        sid = summary.session_id
        truth = {(t["boot"], t["seq"]): t for t in truth_readings(truth_path)}
        got = stored(store, sid)
        assert summary.stop_reason == "duration reached"
        # every stored reading is one the device sent intact, with its counts and tick
        for boot, seq, tick, counts in got:
            t = truth[(boot, seq)]
            assert t["fate"] == "sent", (boot, seq, t["fate"])
            assert (tick, counts) == (t["tick_ms"], tuple(t["counts"]))
        assert sim_stats["frames_corrupted"] > 0 and sim_stats["frames_dropped"] > 0, (sim_stats, summary)
        events = store.events(sid)
        kinds = {e["kind"] for e in events}
        assert {"crc_error", "garbage", "seq_gap", "port_lost", "reconnected", "device_restart"} <= kinds
        # every missing reading inside the stored stream of a boot lies inside a reported gap
        gaps = [e["detail"] for e in events if e["kind"] == "seq_gap"]
        outage = max(gaps, key=lambda g: g["lost"])  # the gap across the disconnect
        assert outage["lost"] >= 10
        got_keys = {(b, q) for b, q, _, _ in got}
        boots = sorted({b for b, _, _, _ in got})
        assert len(boots) == 2  # recording carried on after the restart
        for boot in boots:
            seqs = [q for b, q, _, _ in got if b == boot]
            for (b, q), t in truth.items():
                if b == boot and min(seqs) < q < max(seqs) and (b, q) not in got_keys:
                    if t["fate"] == "sent":  # only bytes queued in a port that vanished may be lost so
                        assert outage["prev_seq"] < q < outage["seq"] and b == outage["boot"], (b, q)
                    assert any(g["boot"] == b and g["prev_seq"] < q < g["seq"] for g in gaps), (b, q, t["fate"])
        # readings were stored after the port came back
        lost_at = min(e["t_utc"] for e in events if e["kind"] == "port_lost")
        back = [e for e in events if e["kind"] == "reconnected" and e["t_utc"] > lost_at]
        assert back
        n_after = store.db.execute("select count(*) from readings where session_id = ? and boot = ? and seq > ?",
                                   [sid, outage["boot"], outage["prev_seq"]]).fetchone()[0]
        assert n_after > 0


def test_link_stop_is_clean_and_port_closed(tmp_path):
    with SimulatedMeter("demo", sensor="probe", seed=1, speed=SPEED) as sim:
        link = MeterLink(sim.port, 1000).start()
        deadline = time.monotonic() + 5.0
        n = 0
        while n < 10 and time.monotonic() < deadline:
            n += isinstance(link.get(0.1), Reading)
        link.stop()
        assert n >= 10
        assert link.finished.is_set() and link._link is None
