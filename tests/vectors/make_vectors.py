"""Write tests/vectors/frames.json, the framing vectors shared by the Python and C tests.

Run once from the repo root (`PYTHONPATH=. .venv/bin/python tests/vectors/make_vectors.py`) and commit the output;
the tests check that both codecs reproduce it, so a change to the wire format shows up as a diff.
The first eight vectors are the worked examples of docs/protocol.md.
"""

from __future__ import annotations

import json
from pathlib import Path

from meterlink.device import framing
from meterlink.device import protocol as p

T = p.FrameType
OUT = Path(__file__).with_name("frames.json")


def valid(name: str, ftype: int, seq: int, tick: int, payload: bytes, note: str) -> dict:
    raw = p.encode_frame(ftype, seq, tick, payload)
    return {"name": name, "type": int(ftype), "seq": seq, "tick_ms": tick, "payload_hex": payload.hex(),
            "frame_hex": raw.hex(), "crc_hex": f"{p.crc16(raw[2:-2]):04x}", "note": note}


def invalid(name: str, raw: bytes, reject: str, note: str) -> dict:
    head = raw[:p.HEADER_LEN] + bytes(max(0, p.HEADER_LEN - len(raw)))
    _, _, ftype, n, seq, tick = framing._HEAD.unpack(head)
    return {"name": name, "type": ftype, "seq": seq, "tick_ms": tick, "payload_hex": raw[13:13 + n].hex(),
            "frame_hex": raw.hex(), "crc_hex": raw[-2:][::-1].hex(), "note": note, "reject": reject}


def main() -> None:
    ident = p.Ident(1, 0, 2, 3, 1, 1, 5, 100, 3_600_000, "SIMPROBE-3A", "SN0042", "EP-7731", "CAL-0099")
    v = [
        valid("doc_who", T.WHO, 0, 0, b"", "docs/protocol.md worked example"),
        valid("doc_ident", T.IDENT, 1, 1500, ident.pack(), "docs/protocol.md worked example"),
        valid("doc_set_interval", T.SET_INTERVAL, 1, 0, p.SetInterval(1000).pack(), "docs/protocol.md worked example"),
        valid("doc_ack", T.ACK, 2, 1520, p.Ack(4, 1).pack(), "docs/protocol.md worked example"),
        valid("doc_axes", T.AXES, 7, 123456, p.Axes(0, 0, 1200, -80, 3456).pack(), "docs/protocol.md worked example"),
        valid("doc_spectrum", T.SPECTRUM, 40, 60000, p.Spectrum(1, 12, ((98500, 6123), (936200, 4407))).pack(),
              "docs/protocol.md worked example"),
        valid("doc_status", T.STATUS, 9, 130000, p.Status(3910, 78, 2450, p.STATUS_STREAMING, 1000, 5).pack(),
              "docs/protocol.md worked example"),
        valid("doc_fault", T.FAULT, 11, 131000, p.Fault(2, 0x3E, 4, "type").pack(), "docs/protocol.md worked example"),
        valid("start", T.START, 2, 0, b"", "host command, no payload"),
        valid("stop", T.STOP, 3, 0, b"", "host command, no payload"),
        valid("status_query", T.STATUS_QUERY, 4, 0, b"", "host command, no payload"),
        valid("setting_get_averaging", T.SETTING_GET, 5, 0, p.SettingGet(2).pack(), "key 2 device_averaging"),
        valid("setting_put_u32", T.SETTING_PUT, 6, 0, p.SettingPut(2, 16).pack(), "value type 1, u32 16"),
        valid("setting_put_text", T.SETTING_PUT, 7, 0, p.SettingPut(5, "ASSET-0001").pack(), "value type 2, text"),
        valid("setting_put_empty_text", T.SETTING_PUT, 8, 0, p.SettingPut(4, "").pack(), "empty text clears cert_ref"),
        valid("clock_set", T.CLOCK_SET, 9, 0, p.ClockSet(1_700_000_000, 999).pack(), "utc_ms at its maximum 999"),
        valid("ping_empty", T.PING, 10, 0, b"", "LEN 0 ping"),
        valid("ping_max", T.PING, 11, 0, bytes(range(240)), "LEN 240, a 255-byte frame, the maximum"),
        valid("ping_sync_inside", T.PING, 12, 0, b"\xa7\x3c\xa7\x3c\x01", "sync pairs inside a payload"),
        valid("boot", T.BOOT, 0, 3, p.Boot(6, 1).pack(), "after a watchdog reset"),
        valid("setting_u32", T.SETTING, 13, 2000, p.Setting(1, 1000).pack(), "interval_ms now in force"),
        valid("setting_text_max", T.SETTING, 14, 2100, p.Setting(3, "P" * 32).pack(), "32-byte text, the maximum"),
        valid("pong_max", T.PONG, 15, 2200, bytes(range(255, 15, -1)), "LEN 240 pong"),
        valid("seq_max_tick_max", T.STATUS, 0xFFFFFFFF, 0xFFFFFFFF,
              p.Status(0, 255, -32768, 0xFFFF, 0xFFFFFFFF, 0xFFFF).pack(), "seq and tick at 2**32-1, the step before a wrap"),
        valid("seq_zero_after_wrap", T.AXES, 0, 0, p.Axes(0x3F, 7, -2**31, 2**31 - 1, -1).pack(),
              "seq and tick 0; all range flags, extreme counts"),
        valid("tick_half_range", T.ACK, 100, 0x80000000, p.Ack(2, 0xFFFFFFFF).pack(), "tick 2**31, the unwrap threshold"),
        valid("fault_sensor", T.FAULT, 16, 0x7FFFFFFF, p.Fault(7, 0, 0xFFFFFFFF, "").pack(), "unsolicited SENSOR fault"),
        valid("spectrum_39", T.SPECTRUM, 17, 5000,
              p.Spectrum(2, 0xFFFF, tuple((1000 * (k + 1), 100 * k - 1900) for k in range(39))).pack(),
              "39 pairs, LEN 238"),
        valid("spectrum_none", T.SPECTRUM, 18, 5100, p.Spectrum(3, 0, ()).pack(), "no emitter above the noise floor"),
        valid("ident_empty_texts", T.IDENT, 1, 10, p.Ident(1, 0, 0, 0, 1, 3, 0, 1, 0xFFFFFFFF, "", "", "", "").pack(),
              "dipole receiver, all texts empty"),
    ]
    ack = bytes.fromhex(v[3]["frame_hex"])
    bad_crc = bytearray(ack)
    bad_crc[-1] ^= 0x01
    bad_payload = bytearray(ack)
    bad_payload[14] ^= 0x80
    over = bytearray(p.encode_frame(T.PONG, 1, 1, bytes(240)))
    over[4] = 241
    bad_sync = bytearray(ack)
    bad_sync[1] = 0x3D
    v += [
        invalid("bad_crc_byte", bytes(bad_crc), "crc", "doc_ack with its CRC high byte flipped"),
        invalid("bad_payload_byte", bytes(bad_payload), "crc", "doc_ack with one payload bit flipped"),
        invalid("len_241", bytes(over), "length", "LEN 241 > 240"),
        invalid("bad_sync", bytes(bad_sync), "sync", "second sync byte 3D: no frame start"),
        invalid("truncated", ack[:-3], "short", "doc_ack cut 3 bytes short"),
    ]
    OUT.write_text(json.dumps(v, indent=1) + "\n")
    print(f"wrote {len(v)} vectors to {OUT}")


if __name__ == "__main__":
    main()
