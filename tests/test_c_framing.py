"""The reference C framing in firmware/ agrees with meterlink.device.protocol, byte for byte.

Compiles firmware/mlframe.c + firmware/vectors_test.c with the system C compiler as strict C99 and
drives the program over stdin (see the comment at the top of vectors_test.c for its line commands).
The expected values are the shared vectors (tests/vectors/frames.json, whose first eight entries are
the worked examples of docs/protocol.md) and the Python codec on the same random frames.
"""

from __future__ import annotations

import json
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest

from meterlink.device import protocol as p

ROOT = Path(__file__).resolve().parents[1]
FIRMWARE = ROOT / "firmware"
CC = shutil.which("cc") or shutil.which("gcc")
SEED = 20_240_617
T = p.FrameType

pytestmark = pytest.mark.skipif(CC is None, reason="no C compiler (cc or gcc) on PATH: C framing not checked")


@pytest.fixture(scope="module")
def vt(tmp_path_factory) -> Path:
    exe = tmp_path_factory.mktemp("firmware") / "vectors_test"
    cmd = [CC, "-std=c99", "-Wall", "-Wextra", "-Werror", "-pedantic", "-O1", "-o", str(exe),
           str(FIRMWARE / "mlframe.c"), str(FIRMWARE / "vectors_test.c")]
    res = subprocess.run(cmd, capture_output=True, text=True, timeout=60)
    assert res.returncode == 0, f"C build failed:\n{res.stderr}"
    return exe


def run(exe: Path, lines: list[str]) -> list[str]:
    res = subprocess.run([str(exe)], input="\n".join(lines) + "\n", capture_output=True, text=True, timeout=60)
    out = res.stdout.splitlines()
    assert res.returncode == 0, "\n".join(x for x in out if not x.startswith("ok"))
    # first line: the built-in check value (Greg Cook's CRC catalogue, CRC-16/IBM-3740: 0x29B1)
    assert out[0] == "ok crc_check_value" and out[-1].endswith(" 0 failed")
    return out[1:-1]


def hx(b: bytes) -> str:
    return b.hex() or "-"


def rand_text(rng: np.random.Generator) -> str:
    # ASCII without NUL: the C side takes NUL-terminated strings
    return "".join(chr(c) for c in rng.integers(1, 128, int(rng.integers(0, 33))))


def u(rng: np.random.Generator, bits: int) -> int:
    return int(rng.integers(0, 1 << bits, dtype=np.uint64))


def s(rng: np.random.Generator, bits: int) -> int:
    return int(rng.integers(-(1 << (bits - 1)), 1 << (bits - 1), dtype=np.int64))


def test_every_shared_vector_agrees_in_c(vt):
    vectors = json.loads((ROOT / "tests" / "vectors" / "frames.json").read_text())
    lines = [f"X {v['frame_hex']} {v['reject']} {v['name']}" if "reject" in v else
             f"V {v['type']} {v['seq']} {v['tick_ms']} {hx(bytes.fromhex(v['payload_hex']))} {v['frame_hex']} "
             f"{v['crc_hex']} {v['name']}" for v in vectors]
    out = run(vt, lines)
    assert out == [f"ok {v['name']}" for v in vectors]


def test_c_encoded_random_frames_decode_in_python(vt):
    rng = np.random.default_rng(SEED)
    cases = [(u(rng, 8), u(rng, 32), u(rng, 32), rng.bytes(int(rng.integers(0, 241)))) for _ in range(3000)]
    cases += [(0x41, 0, 0xFFFFFFFF, b""), (0x09, 0xFFFFFFFF, 0, bytes(240))]
    out = run(vt, [f"E {t} {sq} {tk} {hx(pl)}" for t, sq, tk, pl in cases])
    assert len(out) == len(cases)
    for (t, sq, tk, pl), line in zip(cases, out):
        raw = bytes.fromhex(line)
        assert raw == p.encode_frame(t, sq, tk, pl)
        assert p.decode_frame(raw) == p.Frame(t, sq, tk, pl)
    # LEN 241 is refused by mlf_encode (it returns 0: an empty line)
    assert run(vt, [f"E 9 0 0 {bytes(241).hex()}"]) == ["-"]


def random_device_message(rng: np.random.Generator):
    """A random typed device message and the vectors_test 'T' line that builds the same in C."""
    k = int(rng.integers(0, 8))
    if k == 0:
        m = p.Ident(*(u(rng, 8) for _ in range(6)), u(rng, 16), u(rng, 32), u(rng, 32),
                    *(rand_text(rng) for _ in range(4)))
        head = " ".join(str(x) for x in (m.proto_major, m.proto_minor, m.fw_major, m.fw_minor, m.fw_patch,
                                          m.sensor_kind, m.boot_count, m.min_interval_ms, m.max_interval_ms))
        texts = " ".join(hx(t.encode()) for t in (m.model, m.serial, m.probe_serial, m.cert_ref))
        return m, f"ident {{}} {head} {texts}"
    if k == 1:
        m = p.Boot(u(rng, 16), u(rng, 8))
        return m, f"boot {{}} {m.boot_count} {m.reset_cause}"
    if k == 2:
        m = p.Ack(u(rng, 8), u(rng, 32))
        return m, f"ack {{}} {m.cmd_type} {m.cmd_seq}"
    if k == 3:
        m = p.Status(u(rng, 16), u(rng, 8), s(rng, 16), u(rng, 16), u(rng, 32), u(rng, 16))
        return m, (f"status {{}} {m.battery_mv} {m.battery_pct} {m.temp_centi_c} {m.flags} {m.interval_ms} "
                   f"{m.boot_count}")
    if k == 4:
        m = p.Fault(u(rng, 8), u(rng, 8), u(rng, 32), rand_text(rng))
        return m, f"fault {{}} {m.code} {m.cmd_type} {m.cmd_seq} {hx(m.text.encode())}"
    if k == 5:
        m = p.Axes(u(rng, 8), u(rng, 8), s(rng, 32), s(rng, 32), s(rng, 32))
        return m, f"axes {{}} {m.flags} {m.range_index} {m.x} {m.y} {m.z}"
    if k == 6:
        pairs = tuple((u(rng, 32), s(rng, 16)) for _ in range(int(rng.integers(0, 40))))
        m = p.Spectrum(u(rng, 8), u(rng, 16), pairs)
        flat = " ".join(f"{f} {lv}" for f, lv in pairs)
        return m, f"spectrum {{}} {m.orientation} {m.sweep} {len(pairs)} {flat}"
    if rng.random() < 0.5:
        m = p.Setting(u(rng, 8), u(rng, 32))
        return m, f"setu32 {{}} {m.key} {m.value}"
    m = p.Setting(u(rng, 8), rand_text(rng))
    return m, f"settext {{}} {m.key} {hx(m.value.encode())}"


def test_c_typed_encoders_match_python_messages(vt):
    rng = np.random.default_rng(SEED + 1)
    cases = []
    for _ in range(1500):
        m, line = random_device_message(rng)
        cases.append((m, u(rng, 32), u(rng, 32), line))
    pong = p.Echo(rng.bytes(240))
    cases.append((pong, 5, 6, f"pong {{}} {pong.data.hex()}"))
    out = run(vt, ["T " + line.format(f"{sq} {tk}") for _, sq, tk, line in cases])
    for (m, sq, tk, _), got in zip(cases, out):
        raw = bytes.fromhex(got)
        assert raw == p.encode_message(m, sq, tk), m
        assert p.parse_payload(p.decode_frame(raw)) == m
    # SPECTRUM with 40 pairs does not fit a frame: refused in C as in Python
    assert run(vt, ["T spectrum 1 2 0 0 40 " + " ".join(["1 1"] * 40)]) == ["-"]


def stream_with_garbage(rng: np.random.Generator, n_frames: int) -> tuple[bytes, list[p.Frame]]:
    """Python-encoded frames with garbage between them: random bytes, stray sync pairs, damaged frames."""
    parts, frames = [], []
    for _ in range(n_frames):
        r = rng.random()
        if r < 0.25:
            parts.append(rng.bytes(int(rng.integers(1, 40))))
        elif r < 0.35:
            parts.append(p.SYNC + bytes([1, u(rng, 8), u(rng, 8)]) + rng.bytes(int(rng.integers(0, 20))))
        elif r < 0.45:
            bad = bytearray(p.encode_frame(u(rng, 8), u(rng, 32), u(rng, 32), rng.bytes(int(rng.integers(0, 60)))))
            bad[int(rng.integers(2, len(bad)))] ^= int(rng.integers(1, 256))
            parts.append(bytes(bad))
        raw = p.encode_frame(u(rng, 8), u(rng, 32), u(rng, 32), rng.bytes(int(rng.integers(0, 241))))
        parts.append(raw)
        frames.append(p.decode_frame(raw))
    return b"".join(parts) + bytes(p.MAX_FRAME), frames


def test_python_encoded_frames_decode_in_c_through_garbage(vt):
    rng = np.random.default_rng(SEED + 2)
    stream, sent = stream_with_garbage(rng, 2500)
    cuts = sorted(int(c) for c in rng.integers(0, len(stream), 300))
    chunks = [stream[a:b] for a, b in zip([0] + cuts, cuts + [len(stream)]) if b > a]
    out = run(vt, [f"S {c.hex()}" for c in chunks] + ["N"])
    got = [line.split() for line in out if line.startswith("F ")]
    c_frames = [p.Frame(int(t), int(sq), int(tk), bytes.fromhex(pl) if pl != "-" else b"", int(ver))
                for _, ver, t, sq, tk, pl in got]
    reader = p.FrameReader()
    py_frames = [x for x in reader.feed(stream) if isinstance(x, p.Frame)]
    # C and Python find the same frames and count the same junk (docs/protocol.md, Resynchronisation)
    assert c_frames == py_frames
    st = reader.stats
    assert out[-1] == f"N {st.frames} {st.garbage_bytes} {st.crc_errors} {st.length_errors}"
    # every frame sent is found (a CRC collision in the junk could hide one: 2**-16 odds, fixed seed)
    assert c_frames == sent
    assert st.crc_errors > 0 and st.length_errors > 0 and st.garbage_bytes > 0


def test_c_decoder_resynchronises_inside_a_damaged_frame(vt):
    inner = p.encode_frame(T.BOOT, 0, 3, p.Boot(1, 0).pack())
    outer = bytearray(p.encode_frame(T.PONG, 9, 9, b"\xa7\x3c\xa7" + inner + b"\xa7"))
    outer[-2] ^= 0x40
    oversize = p.SYNC + bytes([1, 0x41, 250]) + bytes(8)  # LEN 250 > 240
    stream = b"\xa7\xa7" + oversize + bytes(outer) + b"\x00\xa7" + inner + bytes(p.MAX_FRAME)
    lines = []
    for b in stream:  # one byte per call, as from a UART
        lines.append(f"S {b:02x}")
    out = run(vt, lines + ["N"])
    boot = p.decode_frame(inner)
    want = f"F 1 {T.BOOT} 0 3 {boot.payload.hex()}"
    assert out[:-1] == [want, want]
    reader = p.FrameReader()
    reader.feed(stream)
    st = reader.stats
    assert out[-1] == f"N 2 {st.garbage_bytes} {st.crc_errors} {st.length_errors}"
    assert st.length_errors == 1 and st.crc_errors >= 1


def random_host_command(rng: np.random.Generator) -> tuple[int, bytes]:
    """A host command frame type and payload: well formed, mutated, or random."""
    t = int(rng.choice([T.WHO, T.START, T.STOP, T.STATUS_QUERY, T.SET_INTERVAL, T.SETTING_GET,
                        T.SETTING_PUT, T.CLOCK_SET, T.PING, 0x3E, 0x45]))
    good = {T.SET_INTERVAL: p.SetInterval(u(rng, 32)).pack(), T.SETTING_GET: bytes([u(rng, 8)]),
            T.SETTING_PUT: p.SettingPut(u(rng, 8), u(rng, 32) if rng.random() < 0.5 else rand_text(rng)).pack(),
            T.CLOCK_SET: p.ClockSet(u(rng, 32), int(rng.integers(0, 1000))).pack(),
            T.PING: rng.bytes(int(rng.integers(0, 241)))}.get(t, b"")
    r = rng.random()
    if r < 0.15:
        return t, rng.bytes(int(rng.integers(0, 12)))
    if r < 0.3 and good:
        bad = bytearray(good)
        bad[int(rng.integers(0, len(bad)))] = u(rng, 8)
        return t, bytes(bad)
    if r < 0.35:
        return t, good + b"\x00"
    return t, good


def test_c_host_command_parser_agrees_with_python(vt):
    rng = np.random.default_rng(SEED + 3)
    cases = [(*random_host_command(rng), u(rng, 32)) for _ in range(2000)]
    cases.append((T.WHO, b"", 7))
    # edge cases that random mutation seldom reaches (docs/protocol.md, Values and Text)
    edges = [(T.SETTING_PUT, bytes([1, vt_]) + bytes(4)) for vt_ in (0, 3, 255)]
    edges += [(T.SETTING_PUT, b"\x03\x02\x21" + b"A" * 33), (T.SETTING_PUT, b"\x03\x02\x05abc"),
              (T.SETTING_PUT, b"\x03\x02\x00"), (T.SETTING_PUT, b"\x03\x02\x20" + b"B" * 32),
              (T.SETTING_PUT, b"\x01\x01\x00\x00\x00"), (T.SETTING_PUT, b"\x01"),
              (T.CLOCK_SET, b"\x00\x00\x00\x00\xe8\x03"), (T.CLOCK_SET, b"\x00\x00\x00\x00\xe7\x03"),
              (T.WHO, b"\x00"), (T.SET_INTERVAL, b"\x01\x02\x03"), (T.PING, bytes(240))]
    cases += [(t, pl, 1000 + i) for i, (t, pl) in enumerate(edges)]
    frames = [p.encode_frame(t, sq, 0, pl) for t, pl, sq in cases] + [p.encode_frame(T.WHO, 1, 0, version=2)]
    out = run(vt, [f"P {f.hex()}" for f in frames])
    fault_names = {int(c): c.name for c in p.FaultCode}
    n_ok = 0
    for raw, line in zip(frames, out):
        f = p.decode_frame(raw)
        fields = line.split()
        assert fields[0] == "C" and int(fields[2]) == f.type and int(fields[3]) == f.seq
        fault = int(fields[1])
        try:
            msg = p.parse_payload(f)
        except p.ProtocolError:
            assert fault != 0, (raw.hex(), line)
            assert fault_names[fault] in {"BAD_FRAME", "UNKNOWN_TYPE", "BAD_LENGTH", "BAD_VALUE", "BAD_VERSION"}
            if f.version != 1:
                assert fault_names[fault] == "BAD_VERSION"
            continue
        if f.type >= 0x40:  # a device frame sent to the device: Python parses it, the device refuses it
            assert fault_names[fault] == "UNKNOWN_TYPE"
            continue
        assert fault == 0, (raw.hex(), line)
        n_ok += 1
        rest = fields[4:]
        if f.type == T.SET_INTERVAL:
            assert [int(x) for x in rest] == [msg.interval_ms]
        elif f.type == T.SETTING_GET:
            assert [int(x) for x in rest] == [msg.key]
        elif f.type == T.SETTING_PUT:
            key, vtype, val, txt = rest
            assert int(key) == msg.key
            if isinstance(msg.value, str):
                assert int(vtype) == 2 and (bytes.fromhex(txt) if txt != "-" else b"").decode("ascii", "replace") == msg.value
            else:
                assert int(vtype) == 1 and int(val) == msg.value
        elif f.type == T.CLOCK_SET:
            assert [int(x) for x in rest] == [msg.utc_s, msg.utc_ms]
        elif f.type == T.PING:
            assert (bytes.fromhex(rest[0]) if rest[0] != "-" else b"") == msg.data
    assert n_ok > 1000  # most cases are well formed: the comparison above did run


def test_guide_snippets_compile_and_give_the_documented_bytes(tmp_path):
    # firmware/GUIDE.md's C snippets, with stub hardware, must build strictly and produce the "ACK of
    # that command" worked example of docs/protocol.md and the catalogue CRC check value.
    import re

    blocks = re.findall(r"```c\n(.*?)```", (FIRMWARE / "GUIDE.md").read_text(), re.S)
    assert len(blocks) >= 3
    src = ('#include "mlframe.h"\nstatic int streaming;\n' + "\n".join(blocks) + """
uint32_t millis(void) { return 0; }
static uint8_t sent[4096]; static size_t n_sent;
void uart_write(const uint8_t *p, size_t n) { memcpy(sent + n_sent, p, n); n_sent += n; }
int main(void) {
    uint8_t f[MLF_MAX_FRAME], start[] = {0xa7,0x3c,0x01,0x02,0x00,0,0,0,0,0,0,0,0,0x00,0x00};
    size_t i, n = mlf_encode_ack(f, sizeof f, 2, 1520, MLF_SET_INTERVAL, 1);
    const uint8_t ack[] = {0xa7,0x3c,0x01,0x42,0x05,0x02,0,0,0,0xf0,0x05,0,0,0x04,0x01,0,0,0,0x99,0x0a};
    uint16_t crc = mlf_crc16(start + 2, 11);
    start[13] = (uint8_t)(crc & 0xFF); start[14] = (uint8_t)(crc >> 8);  /* a START from the host */
    link_init(); send_boot(1, 0);
    for (i = 0; i < sizeof start; i++) uart_rx_isr(start[i]);
    link_poll();
    /* BOOT (18 bytes) then the ACK of START (20 bytes), and streaming on */
    return !(n == 20 && memcmp(f, ack, 20) == 0 && mlf_crc16((const uint8_t *)"123456789", 9) == 0x29B1
             && streaming == 1 && n_sent == 38 && sent[18 + 3] == MLF_ACK && sent[18 + 13] == MLF_START);
}
""")
    (tmp_path / "guide.c").write_text("#include <string.h>\n" + src)
    exe = tmp_path / "guide"
    res = subprocess.run([CC, "-std=c99", "-Wall", "-Wextra", "-Werror", "-pedantic", f"-I{FIRMWARE}", "-o", str(exe),
                          str(tmp_path / "guide.c"), str(FIRMWARE / "mlframe.c")], capture_output=True, text=True,
                         timeout=60)
    assert res.returncode == 0, res.stderr
    assert subprocess.run([str(exe)], timeout=10).returncode == 0
