"""Hostile device input through the real link: a device played byte by byte on a pty pair.

The host side is the real SerialLink -> MeterLink -> Recorder -> Store; the far end of the pty
is a small device written here (answers the handshake, then sends what the test says). Checks:
nothing crashes the host (no internal_error), rows already stored stay unchanged, the database
passes integrity_check, SQL and markup in device strings are stored as inert text, and every
hostile input is counted in LinkStats or recorded as an event or a row.
"""

import os
import threading
import time

import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from meterlink.physics import calibrate

from meterlink.storage import spans
from meterlink.physics.certificate import load_certificate
from meterlink.device.protocol import (Ack, Axes, Boot, Fault, FrameReader, FrameType, Ident, Spectrum, Status,
                                encode_frame, encode_message)
from meterlink.storage.recorder import Recorder
from meterlink.storage.store import Store

MARK = 10_000_000  # marker readings use seq from here; hostile frames stay below
NASTY = ["<script>alert(1)</script>", "x'); DROP TABLE readings;--", "\x1b[2J\x07\x00bell",
         "Robert\"); DELETE FROM events; --", "%s%n{0}${x}", "\xff\xfe\x80 high bytes"]


class PtyDevice:
    """A byte-level meter on the master side of a pty: replies to the handshake, sends on demand."""

    def __init__(self, model="HX-1", serial="SN-0001", probe_serial="P-1", cert_ref="C-1"):
        self.master, slave = os.openpty()
        self.port = os.ttyname(slave)
        self._slave = slave  # kept open so the pty survives the host's open/close
        self.ident = Ident(1, 0, 1, 2, 3, 1, 1, 10, 60000, model, serial, probe_serial, cert_ref)
        self.seq, self.tick = 1, 1000
        self._lock = threading.Lock()
        self._stop = threading.Event()
        self._reader = FrameReader()
        self._thread = threading.Thread(target=self._run, daemon=True)
        self._thread.start()

    def send(self, data: bytes) -> None:
        with self._lock:
            view = memoryview(data)
            while view:
                n = os.write(self.master, view)
                view = view[n:]

    def frame(self, msg, seq=None, tick=None, ftype=None) -> bytes:
        with self._lock:
            if seq is None:
                seq, self.seq = self.seq, self.seq + 1
            if tick is None:
                self.tick += 100
                tick = self.tick
        return encode_message(msg, seq, tick, ftype)

    def _run(self) -> None:
        import select
        while not self._stop.is_set():
            r, _, _ = select.select([self.master], [], [], 0.02)
            if not r:
                continue
            try:
                data = os.read(self.master, 4096)
            except OSError:
                return
            for fr in self._reader.feed(data):
                if not hasattr(fr, "seq"):
                    continue
                if fr.type == FrameType.WHO:
                    self.send(self.frame(self.ident))
                elif fr.type == FrameType.STATUS_QUERY:
                    self.send(self.frame(Status(3900, 80, 2100, 0x10, 1000, 1)))
                elif fr.type in (FrameType.SET_INTERVAL, FrameType.START, FrameType.STOP):
                    self.send(self.frame(Ack(fr.type, fr.seq)))

    def close(self) -> None:
        self._stop.set()
        self._thread.join(2)
        os.close(self.master)
        os.close(self._slave)


class Rig:
    """Device + Recorder on a thread + Store, with helpers to wait for stored readings."""

    def __init__(self, tmp_path, **ident):
        self.dev = PtyDevice(**ident)
        self.store = Store(tmp_path / "hostile.db")
        self.rec = Recorder(self.store, self.dev.port, interval_ms=100, host_timeout_s=120, min_silence_s=60)
        self.thread = threading.Thread(target=self.rec.run, name="hostile-recorder")
        self.thread.start()
        self.mark = MARK
        assert self.wait(lambda: self.rec.link.stats.handshakes >= 1), "no handshake"

    def wait(self, pred, timeout_s=10.0) -> bool:
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            if pred():
                return True
            time.sleep(0.01)
        return False

    def marker(self) -> int:
        """Send one valid reading with a fresh seq until one is stored; returns its seq.

        A hostile frame may make the host believe the device restarted (seq near 0 with the tick
        going back, or BOOT): it then handshakes again and rightly ignores data until synced, so
        the marker is re-sent a few times rather than once.
        """
        sid = self.rec.session_id
        for _ in range(5):
            self.mark += 1
            seq = self.mark
            self.dev.send(self.dev.frame(Axes(0, 0, seq, 2, 3), seq=seq))
            if self.wait(lambda: self.store.db.execute(
                    "select count(*) from readings where session_id=? and seq=?", [sid, seq]).fetchone()[0] == 1,
                    timeout_s=3.0):
                return seq
        raise AssertionError(f"marker not stored; events {[e['kind'] for e in self.store.events(sid)][-10:]}")

    def rows(self):
        return self.store.db.execute("select id, boot, seq, tick_ms, t_utc, raw_x, raw_y, raw_z, flags, range_index "
                                     "from readings order by id").fetchall()

    def close(self):
        self.rec.stop()
        self.thread.join(20)
        assert not self.thread.is_alive()
        events = self.store.events(self.rec.session_id)
        self.dev.close()
        assert self.store.db.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        assert spans.check(self.store.db.conn) == []  # the readings' index agrees with the rows
        assert not [e for e in events if e["kind"] == "internal_error"], events
        self.store.close()
        return events


def counted(link) -> int:
    s = link.stats
    return (s.garbage_bytes + s.crc_errors + s.length_errors + s.malformed + s.gaps + s.duplicates
            + s.restarts + s.faults + s.readings + s.spectra + s.statuses)


u32 = st.integers(0, 2**32 - 1)
i32 = st.integers(-2**31, 2**31 - 1)
hostile_seq = st.integers(0, MARK - 1)


@st.composite
def hostile_chunk(draw):
    kind = draw(st.sampled_from(["random", "oversized", "axes", "spectrum", "status", "fault", "boot",
                                 "badpayload", "tickjump", "seqjump"]))
    seq, tick = draw(hostile_seq), draw(u32)
    if kind == "random":
        return draw(st.binary(min_size=1, max_size=600))
    if kind == "oversized":  # a sync pair and a length field above the maximum, then junk
        return b"\xa7\x3c\x01\x45" + bytes([draw(st.integers(241, 255))]) + draw(st.binary(max_size=300))
    if kind == "axes":
        return encode_message(Axes(draw(st.integers(0, 255)), draw(st.integers(0, 255)), draw(i32), draw(i32),
                                   draw(i32)), seq, tick)
    if kind == "spectrum":
        pairs = draw(st.lists(st.tuples(st.sampled_from([0, 1, 4_000_000_000, 2**32 - 1]) | u32,
                                        st.integers(-2**15, 2**15 - 1)), max_size=39))
        return encode_message(Spectrum(draw(st.integers(0, 255)), draw(st.integers(0, 65535)), tuple(pairs)),
                              seq, tick)
    if kind == "status":
        return encode_message(Status(draw(st.integers(0, 65535)), draw(st.integers(0, 255)),
                                     draw(st.integers(-2**15, 2**15 - 1)), draw(st.integers(0, 65535)), draw(u32),
                                     draw(st.integers(0, 65535))), seq, tick)
    if kind == "fault":
        return encode_message(Fault(draw(st.integers(0, 255)), draw(st.integers(0, 255)), draw(u32),
                                    draw(st.sampled_from(NASTY) | st.text(max_size=32))), seq, tick)
    if kind == "boot":
        return encode_message(Boot(draw(st.integers(0, 65535)), draw(st.integers(0, 255))), seq, tick)
    if kind == "badpayload":  # valid CRC around a payload that fits no message
        return encode_frame(draw(st.integers(0, 255)), seq, tick, draw(st.binary(max_size=240)),
                            version=draw(st.sampled_from([1, 1, 0, 2, 255])))
    if kind == "tickjump":
        return encode_message(Axes(0, 0, 1, 2, 3), seq, (tick + 2**31) % 2**32)
    return encode_message(Axes(0, 0, 4, 5, 6), draw(st.integers(MARK // 2, MARK - 1)), tick)


def test_hostile_streams_never_crash_or_corrupt(tmp_path):
    rig = Rig(tmp_path)
    try:
        rig.marker()

        @settings(max_examples=20, deadline=None, suppress_health_check=list(HealthCheck))
        @given(st.lists(hostile_chunk(), min_size=1, max_size=6))
        def feed(chunks):
            before = rig.rows()
            n0 = counted(rig.rec.link) + len(rig.store.events(rig.rec.session_id))
            for c in chunks:
                rig.dev.send(c)
            rig.dev.send(b"\x00" * 256)  # flush a frame held back by a stray sync pair and length field
            rig.marker()
            after = rig.rows()
            assert after[:len(before)] == before  # rows already stored are unchanged
            n1 = counted(rig.rec.link) + len(rig.store.events(rig.rec.session_id))
            assert n1 > n0 + 1  # the hostile input left a count or an event (beyond the marker itself)

        feed()
        assert rig.thread.is_alive() and not rig.rec.link.finished.is_set()
    finally:
        events = rig.close()
    kinds = {e["kind"] for e in events}
    assert {"garbage", "seq_gap"} & kinds


def test_extreme_values_stored_exactly(tmp_path):
    rig = Rig(tmp_path)
    try:
        rig.marker()
        vals = [(-2**31, 2**31 - 1, 0), (-1, -2, -3), (2**31 - 1, 2**31 - 1, 2**31 - 1)]
        seqs = []
        for i, (x, y, z) in enumerate(vals):
            s = 5_000_000 + i * 1_000_000  # enormous sequence jumps
            seqs.append(s)
            rig.dev.send(rig.dev.frame(Axes(0xFF, 0xFF, x, y, z), seq=s, tick=(2**32 - 1) if i == 1 else None))
        rig.dev.send(rig.dev.frame(Spectrum(3, 65535, ((0, -32768), (4_000_000_000, 32767))), seq=9_000_000))
        rig.marker()
        got = {r[2]: (r[5], r[6], r[7], r[8], r[9]) for r in rig.rows()}
        for s, v in zip(seqs, vals):
            assert got[s] == (*v, 0xFF, 0xFF)
        lines = rig.store.db.execute("select freq_hz, level_dbuv from spectrum_lines order by id").fetchall()
        assert lines == [(0.0, -327.68), (4e12, 327.67)]  # 0 kHz and 4 THz kept as sent, for later checks
    finally:
        events = rig.close()
    # after the first marker (seq 10,000,001) the jumps run backward, then forward again: all reported
    assert sum(e["kind"] in ("seq_gap", "seq_backward") for e in events) >= 4


def test_calibration_of_absurd_counts_flags_instead_of_failing():
    # Bounds behaviour as documented at the top of meterlink/physics/calibrate.py (project documentation).
    cert = load_certificate("demo-probe")
    raw = np.array([[-2**31, -2**31, -2**31], [2**31 - 1, 2**31 - 1, 2**31 - 1], [0, 0, 0]], dtype=np.int64)
    for f in (0.0, 4e12, None):
        res = calibrate.calibrate_axes(cert, raw, f)
        assert res.e_v_per_m.shape == (3,)
        assert res.e_v_per_m[0] == 0.0 and res.flags[0] & calibrate.BELOW_RANGE
        assert np.isnan(res.e_v_per_m[1]) and res.flags[1] & calibrate.ABOVE_RANGE
        assert res.flags[0] & (calibrate.FREQ_OUT | calibrate.FREQ_ASSUMED)


def test_device_strings_with_markup_and_sql_are_inert(tmp_path):
    for i, s in enumerate(NASTY):
        d = tmp_path / f"n{i}"
        d.mkdir()
        rig = Rig(d, model=s[:32], serial=s[::-1][:32], probe_serial=s[:32], cert_ref="'; --")
        try:
            rig.marker()
            rig.dev.send(rig.dev.frame(Fault(4, 0x99, 0xFFFFFFFF, s[:32])))
            rig.marker()
            tables = {r[0] for r in rig.store.db.execute("select name from sqlite_master where type='table'")}
            assert {"readings", "events", "devices", "sessions"} <= tables
            dev = rig.store.db.execute("select model, serial, cert_ref from devices").fetchall()
            want = s.encode("ascii", "replace").decode("ascii")[:32]  # the wire is ASCII; others replaced
            assert dev == [(want[:32], s[::-1].encode("ascii", "replace").decode("ascii")[:32], "'; --")]
            msgs = [e for e in rig.store.events(rig.rec.session_id) if e["kind"] in ("fault", "handshake")]
            assert any(e["kind"] == "fault" and e["detail"]["text"] == want for e in msgs)
            for e in msgs:  # printed messages carry no raw control characters
                assert not any(ord(c) < 32 for c in e["message"]), e["message"]
        finally:
            rig.close()
