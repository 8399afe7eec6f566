"""Frame parsing throughput against the physical limit of a 921600-baud line and a plain bytes.split.

A 921600-baud 8N1 line carries 10 bit-times per byte: 92,160 bytes/s. The stream is a mix of
AXES readings and STATUS frames cut into 4096-byte reads as the link's reader thread sees them;
FrameReader.feed (deframe, CRC) and parse_payload (typed message) run over all of it. The second
baseline splits the same bytes at the sync pair with bytes.split: no CRC, no typing, the floor
of any Python deframer.
"""

from __future__ import annotations

import time

import _common
from meterlink.device.protocol import SYNC, Axes, FrameReader, Status, encode_message, parse_payload

LINE_BYTES_PER_S = 921600 / 10  # 8N1: start + 8 data + stop bits per byte


def make_wire(n: int) -> bytes:
    parts = []
    for i in range(n):
        if i % 50 == 49:
            parts.append(encode_message(Status(3900, 87, 2150, 0x10, 1000, 4), i, i * 100))
        else:
            parts.append(encode_message(Axes(0, 1, 100_000 + i % 7919, -5 + i % 13, 2**31 - 1 - i), i, i * 100))
    return b"".join(parts)


def parse_all(wire: bytes, chunk: int = 4096) -> int:
    reader = FrameReader()
    n = 0
    for k in range(0, len(wire), chunk):
        for fr in reader.feed(wire[k:k + chunk]):
            parse_payload(fr)
            n += 1
    return n


def best_of(fn, *args, repeat: int = 3) -> tuple[float, object]:
    best, out = float("inf"), None
    for _ in range(repeat):
        t = time.perf_counter()
        out = fn(*args)
        best = min(best, time.perf_counter() - t)
    return best, out


def main(argv=None) -> dict:
    args = _common.parser(__doc__).parse_args(argv)
    n = 50_000 if args.quick else 300_000
    wire = make_wire(n)
    t_ours, got = best_of(parse_all, wire)
    assert got == n, (got, n)
    t_split, parts = best_of(lambda w: w.split(SYNC), wire)
    rate = len(wire) / t_ours
    return _common.report(
        "parse", f"FrameReader.feed + parse_payload: {n:,} frames ({len(wire) / 1e6:.1f} MB) in {t_ours:.3f} s = "
        f"{rate / 1e6:.2f} MB/s ({n / t_ours:,.0f} frames/s)",
        f"921600-baud 8N1 line {LINE_BYTES_PER_S:,.0f} B/s; bytes.split(SYNC) {len(wire) / t_split / 1e6:.0f} MB/s",
        rate / LINE_BYTES_PER_S, f"{rate / LINE_BYTES_PER_S:,.0f}x the line rate; {t_ours / t_split:,.0f}x the "
        "time of bytes.split", ">= 100x the 921600-baud line rate", rate / LINE_BYTES_PER_S >= 100, args.json,
        split_ratio=t_ours / t_split, bytes_per_s=rate, frames=n)


if __name__ == "__main__":
    main()
