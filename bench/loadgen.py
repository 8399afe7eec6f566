"""A load generator: many meters on ptys from one process, cheap enough for thousands of readings/s.

Each meter answers the handshake as the simulated meter does (WHO -> IDENT, STATUS_QUERY -> STATUS,
SET_INTERVAL/START/STOP -> ACK), then streams AXES frames at its interval from its own device clock
and a STATUS every 10 s, built with the Python codec (meterlink.device.protocol) and written to the
pty master. Readings are pre-drawn counts (seeded), not a field model: the point is the host's cost.
Every reading written is kept as the truth (boot, seq, tick, counts) and saved per meter as .npz
at the end. Prints {"ports": [...], "truth": [...]} once serving, runs until stdin closes or
SIGTERM, then prints {"sent": [...], "unsent_bytes": [...]}. bench/loadfarm.py runs several.
"""

from __future__ import annotations

import argparse
import errno
import json
import os
import resource
import selectors
import signal
import sys
import threading
import time
import tty
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from meterlink.device.protocol import (PROTOCOL_MAJOR, PROTOCOL_MINOR, Ack, Axes, FrameReader,  # noqa: E402
                                       FrameType, Ident, Status, encode_message)

STATUS_PERIOD_MS = 10_000
CHUNK = 4096          # counts drawn ahead per meter


class Meter:
    """Device side of one pty: frame reader for commands, counters, streaming state, truth."""

    def __init__(self, index: int, rng: np.random.Generator, t0: float):
        self.index = index
        self.master, self.slave = os.openpty()
        tty.setraw(self.slave)
        os.set_blocking(self.master, False)
        self.port = os.ttyname(self.slave)
        self.reader = FrameReader()
        self.rng = rng
        self.t0 = t0 - rng.uniform(0, 1000.0)     # each device has been up a different while
        self.boot = 1 + index % 7
        self.seq = 0
        self.interval_ms = 1000
        self.streaming = False
        self.next_ms = 0
        self.next_status_ms = 0
        self.out = bytearray()
        self.truth: list[tuple[int, int, int, int, int]] = []
        self.counts = np.empty((0, 3), np.int64)
        self.k = 0

    def now_ms(self) -> int:
        return int((time.monotonic() - self.t0) * 1000)

    def send(self, msg, tick: int, ftype=None) -> None:
        self.out += encode_message(msg, self.seq, tick % (1 << 32), ftype)
        self.seq = (self.seq + 1) % (1 << 32)

    def status(self, tick: int) -> Status:
        return Status(3900, 80, 2300, 0, self.interval_ms, self.boot)

    def command(self, frame) -> None:
        tick = self.now_ms()
        ft = frame.type
        if ft == FrameType.WHO:
            self.send(Ident(PROTOCOL_MAJOR, PROTOCOL_MINOR, 1, 0, 0, 1, self.boot, 50, 3_600_000,
                            "LG-1 load generator", f"LG-{self.index:05d}", "", ""), tick)
        elif ft == FrameType.STATUS_QUERY:
            self.send(self.status(tick), tick)
        elif ft == FrameType.SET_INTERVAL:
            self.interval_ms = int.from_bytes(frame.payload[:4], "little")
            self.send(Ack(ft, frame.seq), tick)
        elif ft == FrameType.START:
            if not self.streaming:
                self.streaming = True
                self.next_ms = tick + self.interval_ms
                self.next_status_ms = tick + STATUS_PERIOD_MS
            self.send(Ack(ft, frame.seq), tick)
        elif ft == FrameType.STOP:
            self.streaming = False
            self.send(Ack(ft, frame.seq), tick)

    def produce(self) -> None:
        """Every reading (and STATUS) due by the device clock now."""
        if not self.streaming:
            return
        now = self.now_ms()
        while self.next_ms <= now:
            if self.k >= len(self.counts):
                base = self.rng.integers(3000, 30000, size=(1, 3))
                self.counts = base + self.rng.integers(-200, 200, size=(CHUNK, 3))
                self.k = 0
            x, y, z = (int(v) for v in self.counts[self.k])
            self.k += 1
            tick = self.next_ms
            self.truth.append((self.boot, self.seq, tick % (1 << 32), x, y, z))
            self.send(Axes(0, 0, x, y, z), tick)
            self.next_ms += self.interval_ms
            if tick >= self.next_status_ms:
                self.send(self.status(tick), tick)
                self.next_status_ms += STATUS_PERIOD_MS

    def flush(self) -> None:
        while self.out:
            try:
                n = os.write(self.master, self.out)
            except OSError as exc:
                if exc.errno in (errno.EAGAIN, errno.EIO):
                    return          # host not reading just now: kept, written later
                raise
            del self.out[:n]

    def read(self) -> None:
        try:
            data = os.read(self.master, 4096)
        except OSError as exc:
            if exc.errno in (errno.EAGAIN, errno.EIO):
                return
            raise
        for item in self.reader.feed(data):
            if hasattr(item, "payload"):
                self.command(item)


def raise_fd_limit(need: int) -> int:
    """Raise the soft open-file limit to at least need (up to the hard limit); returns the soft limit."""
    soft, hard = resource.getrlimit(resource.RLIMIT_NOFILE)
    if soft < need:
        soft = min(need, hard)
        resource.setrlimit(resource.RLIMIT_NOFILE, (soft, hard))
    return soft


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=100)
    ap.add_argument("--first", type=int, default=0, help="index of the first meter (names and seeds)")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--truth-dir", required=True)
    ap.add_argument("--tick-s", type=float, default=0.02, help="how often the loop produces and writes")
    args = ap.parse_args(argv)
    raise_fd_limit(2 * args.n + 64)
    t0 = time.monotonic()
    meters = [Meter(args.first + i, np.random.default_rng([args.seed, args.first + i]), t0) for i in range(args.n)]
    sel = selectors.DefaultSelector()
    for m in meters:
        sel.register(m.master, selectors.EVENT_READ, m)
    truth = [str(Path(args.truth_dir) / f"truth{m.index}.npz") for m in meters]
    done = threading.Event()
    signal.signal(signal.SIGTERM, lambda *_: done.set())
    threading.Thread(target=lambda: (sys.stdin.read(), done.set()), daemon=True).start()
    print(json.dumps({"ports": [m.port for m in meters], "truth": truth}), flush=True)
    next_tick = time.monotonic()
    while not done.is_set():
        for key, _ in sel.select(max(0.0, next_tick - time.monotonic())):
            key.data.read()
            key.data.flush()
        if time.monotonic() >= next_tick:
            for m in meters:
                m.produce()
                m.flush()
            next_tick += args.tick_s
            if next_tick < time.monotonic():
                next_tick = time.monotonic() + args.tick_s
    # a last chance for STOP replies and bytes the host has not taken yet
    end = time.monotonic() + 0.5
    while time.monotonic() < end:
        for key, _ in sel.select(0.05):
            key.data.read()
            key.data.flush()
    sent, unsent = [], []
    for m, path in zip(meters, truth):
        a = np.array(m.truth, np.int64).reshape(-1, 6)
        np.savez(path, boot=a[:, 0], seq=a[:, 1], tick_ms=a[:, 2], raw=a[:, 3:6])
        sent.append(len(m.truth))
        unsent.append(len(m.out))
    print(json.dumps({"sent": sent, "unsent_bytes": unsent}), flush=True)
    for m in meters:
        os.close(m.master)
        os.close(m.slave)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
