"""The simulated meter end to end: real bytes over a pty opened with pyserial."""

import os
import time

import pytest
import serial

from meterlink.device.protocol import (Boot, Empty, FaultCode, Frame, FrameReader, FrameType, Ident, SensorKind,
                                SetInterval, Setting, SettingGet, SettingKey, SettingPut, Spectrum, encode_frame,
                                encode_message, parse_payload)
from meterlink.simulators.pty_meter import SimulatedMeter
from meterlink.simulators.truth import read_truth


@pytest.fixture(autouse=True)
def no_leaked_fds():
    before = set(os.listdir("/proc/self/fd"))
    yield
    deadline = time.monotonic() + 1.0
    while time.monotonic() < deadline:
        leaked = set(os.listdir("/proc/self/fd")) - before
        if not leaked:
            return
        time.sleep(0.01)
    pytest.fail(f"leaked file descriptors: {sorted(leaked)}")


class Host:
    """A minimal host: pyserial plus the codec's FrameReader."""

    def __init__(self, port):
        self.ser = serial.Serial(port, timeout=0.02)
        self.reader = FrameReader()
        self.seq = 0
        self.frames: list[Frame] = []

    def send(self, ftype, msg=None):
        self.ser.write(encode_message(msg or Empty(), self.seq, 0, ftype))
        self.seq += 1
        return self.seq - 1

    def wait_for(self, pred, timeout=1.5):
        """Read until pred(frames) is true or the deadline passes; return the frames."""
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            for item in self.reader.feed(self.ser.read(4096)):
                if isinstance(item, Frame):
                    self.frames.append(item)
            if pred(self.frames):
                return self.frames
        raise AssertionError(f"condition not met; got {[FrameType(f.type).name for f in self.frames][-10:]}")

    def of(self, ftype):
        return [f for f in self.frames if f.type == ftype]

    def close(self):
        self.ser.close()


def test_who_ident_start_and_accelerated_stream(tmp_path):
    truth = tmp_path / "truth.jsonl"
    with SimulatedMeter("demo", speed=200, seed=3, truth_path=truth) as m:
        h = Host(m.port)
        h.send(FrameType.WHO)
        h.wait_for(lambda fs: any(f.type == FrameType.IDENT for f in fs))
        ident = parse_payload(h.of(FrameType.IDENT)[0])
        assert isinstance(ident, Ident) and ident.sensor_kind == SensorKind.E_PROBE and ident.proto_major == 1
        h.send(FrameType.SET_INTERVAL, SetInterval(500))
        h.send(FrameType.START)
        h.wait_for(lambda fs: sum(f.type == FrameType.AXES for f in fs) >= 20)
        axes = h.of(FrameType.AXES)
        seqs, ticks = [f.seq for f in axes], [f.tick_ms for f in axes]
        assert all(b > a for a, b in zip(seqs, seqs[1:]))
        assert all(b - a == 500 for a, b in zip(ticks, ticks[1:]))  # each reading carries its own tick
        h.close()
    recs = {(r["seq"], r["tick_ms"]): r for r in read_truth(truth) if r["event"] == "reading"}
    for f in axes:
        r = recs[(f.seq, f.tick_ms)]
        a = parse_payload(f)
        assert r["fate"] == "sent" and r["counts"] == [a.x, a.y, a.z]
        assert abs(r["e_total_v_per_m"] ** 2 - sum(v * v for v in r["e_axes_v_per_m"])) < 1e-9


def test_commands_faults_and_settings():
    with SimulatedMeter("demo", speed=1) as m:
        h = Host(m.port)
        s_bad = h.send(FrameType.SET_INTERVAL, SetInterval(10))  # below min_interval_ms
        h.send(FrameType.SETTING_GET, SettingGet(99))
        h.send(FrameType.SETTING_PUT, SettingPut(SettingKey.CLOCK_UTC, 5))
        h.send(FrameType.SETTING_PUT, SettingPut(SettingKey.ASSET_TAG, "LAB-7"))
        h.ser.write(encode_frame(0x3E, h.seq, 0)); h.seq += 1
        h.ser.write(encode_frame(FrameType.WHO, h.seq, 0, version=2)); h.seq += 1
        h.ser.write(encode_frame(FrameType.PING, h.seq, 0, b"abc"))
        h.wait_for(lambda fs: any(f.type == FrameType.PONG for f in fs))
        faults = [parse_payload(f) for f in h.of(FrameType.FAULT)]
        assert [(x.code, x.cmd_seq) for x in faults] == [
            (FaultCode.BAD_VALUE, s_bad), (FaultCode.UNKNOWN_KEY, 1), (FaultCode.READ_ONLY, 2),
            (FaultCode.UNKNOWN_TYPE, 4), (FaultCode.BAD_VERSION, 5)]
        assert parse_payload(h.of(FrameType.SETTING)[0]) == Setting(SettingKey.ASSET_TAG, "LAB-7")
        assert h.of(FrameType.PONG)[0].payload == b"abc"
        h.close()


def test_bad_crc_from_host_is_ignored_and_counted():
    with SimulatedMeter("demo", speed=1) as m:
        h = Host(m.port)
        bad = bytearray(encode_message(Empty(), 0, 0, FrameType.WHO))
        bad[-1] ^= 0xFF
        h.ser.write(bytes(bad))
        h.ser.write(encode_frame(FrameType.PING, 1, 0, b"x"))
        h.wait_for(lambda fs: any(f.type == FrameType.PONG for f in fs))
        assert not h.of(FrameType.IDENT)
        assert m.stats["bad_crcs_seen"] >= 1
        h.close()


def test_drop_corrupt_garbage_visible_on_the_wire(tmp_path):
    truth = tmp_path / "t.jsonl"
    faults = {"drop": 0.15, "corrupt": 0.15, "garbage": 0.3}
    with SimulatedMeter("demo", speed=500, seed=5, faults=faults, truth_path=truth) as m:
        h = Host(m.port)
        h.send(FrameType.SET_INTERVAL, SetInterval(200))
        h.send(FrameType.START)
        h.wait_for(lambda fs: sum(f.type == FrameType.AXES for f in fs) >= 60)
        st = m.stats
        h.close()
    seqs = [f.seq for f in h.of(FrameType.AXES)]
    assert any(b - a > 1 for a, b in zip(seqs, seqs[1:]))  # a gap from a dropped or damaged frame
    assert h.reader.stats.crc_errors >= 1 and h.reader.stats.garbage_bytes >= 1
    assert st["frames_dropped"] >= 1 and st["frames_corrupted"] >= 1
    fates = {r["seq"]: r["fate"] for r in read_truth(truth) if r["event"] == "reading"}
    assert all(fates[s] == "sent" for s in seqs)  # nothing marked lost arrived intact
    assert {"dropped", "corrupted"} <= set(fates.values())


def test_disconnect_vanishes_and_returns_at_same_path():
    with SimulatedMeter("demo", speed=50) as m:
        port = m.port
        assert os.readlink(port).startswith("/dev/")
        h = Host(port)
        h.send(FrameType.START)
        h.wait_for(lambda fs: any(f.type == FrameType.AXES for f in fs))
        m.disconnect(0.3)
        assert not os.path.exists(port)
        with pytest.raises(serial.SerialException):
            deadline = time.monotonic() + 1.0
            while time.monotonic() < deadline:
                h.ser.read(100)
        h.close()
        deadline = time.monotonic() + 2.0
        while not os.path.exists(port) and time.monotonic() < deadline:
            time.sleep(0.01)
        assert os.path.exists(port) and m.port == port
        h2 = Host(port)
        n0 = m.stats["frames_unplugged"]
        h2.wait_for(lambda fs: any(f.type == FrameType.AXES for f in fs))  # still streaming after replug
        assert n0 >= 1  # the device kept measuring while unplugged; those frames were lost
        h2.close()


def test_restart_sends_boot_with_seq_zero_and_stops_streaming():
    with SimulatedMeter("demo", speed=100, start_tick_ms=5_000_000) as m:
        h = Host(m.port)
        h.send(FrameType.START)
        h.wait_for(lambda fs: sum(f.type == FrameType.AXES for f in fs) >= 3)
        assert h.of(FrameType.AXES)[0].tick_ms > 5_000_000
        m.restart()
        h.wait_for(lambda fs: sum(f.type == FrameType.BOOT for f in fs) >= 2)  # the power-up BOOT, then ours
        boot = [f for f in h.frames if f.type == FrameType.BOOT][-1]
        assert boot.seq == 0 and boot.tick_ms < 1000 and parse_payload(boot) == Boot(2, 3)
        n = len(h.frames)
        t_end = m.device_tick_ms() + 3000
        while m.device_tick_ms() < t_end:
            h.frames.extend(f for f in h.reader.feed(h.ser.read(4096)) if isinstance(f, Frame))
        assert not any(f.type == FrameType.AXES for f in h.frames[n:])  # waits for the host
        h.close()


def test_dipole_mode_spectrum_frames_cycle_xyz():
    with SimulatedMeter("demo", sensor="dipole", speed=200) as m:
        h = Host(m.port)
        h.send(FrameType.WHO)
        h.send(FrameType.START)
        h.wait_for(lambda fs: sum(f.type == FrameType.SPECTRUM for f in fs) >= 6)
        assert parse_payload(h.of(FrameType.IDENT)[0]).sensor_kind == SensorKind.DIPOLE_RX
        sp = [parse_payload(f) for f in h.of(FrameType.SPECTRUM)][:6]
        assert [s.orientation for s in sp] == [0, 1, 2, 0, 1, 2]
        assert [s.sweep for s in sp] == [0, 0, 0, 1, 1, 1]
        assert all(0 < len(s.pairs) <= Spectrum.MAX_PAIRS for s in sp)
        assert {f for f, _ in sp[0].pairs} >= {94300, 618000}
        h.close()
