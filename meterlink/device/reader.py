"""Stream deframing: bytes in any chunking -> frames, junk reports, and runs of AXES frames decoded in
numpy (the ingest hot path). Device bytes are untrusted: everything skipped is counted. Pure code, no I/O."""

from __future__ import annotations

import binascii
from dataclasses import dataclass, field

import numpy as np

from meterlink.device.framing import (_HEAD, CRC_LEN, HEADER_LEN, MAX_PAYLOAD, PROTOCOL_MAJOR, SYNC, Frame,
                                      FrameType, _frame, _new)
from meterlink.device.messages import _AXES_S, Axes, _axes

@dataclass
class ReaderStats:
    """Counters of what a FrameReader saw; device input is untrusted, so all of it is counted."""

    frames: int = 0
    garbage_bytes: int = 0
    crc_errors: int = 0
    length_errors: int = 0


@dataclass(frozen=True)
class Junk:
    """Bytes the reader skipped: kind is 'garbage', 'crc' or 'length'."""

    kind: str
    n_bytes: int


@dataclass
class FrameReader:
    """Stream deframer: feed it bytes in any chunking, get frames and junk reports back.

    Resynchronises by searching for the sync pair; a frame whose CRC fails is skipped by one
    byte so that a real frame hidden inside it is still found.
    """

    stats: ReaderStats = field(default_factory=ReaderStats)
    _buf: bytearray = field(default_factory=bytearray)

    def feed(self, data: bytes) -> list[Frame | Junk]:
        """Consume data; return frames and junk reports in stream order."""
        self._buf += data
        out: list[Frame | Junk] = []
        self._scan(out, 0, -1)
        return out

    def feed_batched(self, data: bytes) -> list["Frame | Junk | AxesBatch"]:
        """As feed(), but each run of clean AXES frames comes back as one AxesBatch (checked in numpy).

        Anything else (other types, garbage, damaged or partial frames) goes through the same
        scalar deframer as feed(), so frames, junk reports and their order are the same.
        """
        buf = self._buf
        buf += data
        out: list = []
        pos = 0
        while True:
            batch = _axes_run(buf, pos)
            if batch is not None:
                out.append(batch)
                self.stats.frames += len(batch)
                pos += len(batch) * AXES_FRAME_LEN
            pos, more = self._scan(out, pos, 1)
            if not more:
                break
        if pos:
            del buf[:pos]
        return out

    def _scan(self, out: list, pos: int, max_frames: int) -> tuple[int, bool]:
        """Deframe from pos (all of the buffer, or until max_frames frames); returns (pos, stopped early)."""
        buf = self._buf
        n_buf = len(buf)
        crc_hqx = binascii.crc_hqx
        unpack_head = _HEAD.unpack_from
        n_frames = 0
        new = _new
        early = False
        mv = memoryview(buf)  # slices without copies; released before the buffer is trimmed
        try:
            while True:
                if n_frames == max_frames:
                    early = True
                    break
                start = buf.find(SYNC, pos)
                if start < 0:
                    # keep a trailing first sync byte: it may start the next frame
                    keep = n_buf - 1 if n_buf > pos and buf[-1] == SYNC[0] else n_buf
                    if keep > pos:
                        self._junk(out, "garbage", keep - pos)
                    pos = keep
                    break
                if start > pos:
                    self._junk(out, "garbage", start - pos)
                    pos = start
                if n_buf - pos < HEADER_LEN:
                    break
                _, ver, ftype, n, seq, tick = unpack_head(buf, pos)
                if n > MAX_PAYLOAD:
                    self._junk(out, "length", 1)
                    pos += 1
                    continue
                end = pos + HEADER_LEN + n + CRC_LEN
                if end > n_buf:
                    break
                if crc_hqx(mv[pos + 2 : end - 2], 0xFFFF) != buf[end - 2] | (buf[end - 1] << 8):
                    self._junk(out, "crc", 1)
                    pos += 1
                    continue
                f = new(Frame)  # as _frame(), inlined: this loop runs once per frame
                d = f.__dict__
                d["type"] = ftype
                d["seq"] = seq
                d["tick_ms"] = tick
                d["payload"] = bytes(mv[pos + HEADER_LEN : end - 2])
                d["version"] = ver
                out.append(f)
                n_frames += 1
                pos = end
        finally:
            mv.release()
        if max_frames < 0 and pos:
            del buf[:pos]
            pos = 0
        self.stats.frames += n_frames
        return pos, early

    def _junk(self, out: list, kind: str, n: int) -> None:
        if kind == "garbage":
            self.stats.garbage_bytes += n
        elif kind == "crc":
            self.stats.crc_errors += 1
        else:
            self.stats.length_errors += 1
        # merge runs of skipped bytes of one kind into one report
        if out and isinstance(out[-1], Junk) and out[-1].kind == kind:
            out[-1] = Junk(kind, out[-1].n_bytes + n)
        else:
            out.append(Junk(kind, n))

    def drop_pending(self) -> list[Frame | Junk]:
        """Give up on a partial frame held back (call when the line has gone quiet).

        A stray sync pair with a large length field would otherwise hold the frames after it
        until 255 bytes had arrived; dropping one byte and rescanning releases them at once.
        """
        if not self._buf:
            return []
        out: list[Frame | Junk] = []
        self._junk(out, "length", 1)
        del self._buf[:1]
        return out + self.feed(b"")

    @property
    def pending(self) -> int:
        """Bytes held back waiting for the rest of a frame."""
        return len(self._buf)



# ---------------------------------------------------------------------------------------------
# Runs of AXES frames decoded in numpy (FrameReader.feed_batched): the ingest hot path.

AXES_FRAME_LEN = HEADER_LEN + 14 + CRC_LEN  # 29
_AXES_DT = np.dtype([("sync", "<u2"), ("ver", "u1"), ("type", "u1"), ("len", "u1"), ("seq", "<u4"),
                     ("tick", "<u4"), ("flags", "u1"), ("range", "u1"), ("xyz", "<i4", (3,)), ("crc", "<u2")])
_SYNC_U16 = SYNC[0] | (SYNC[1] << 8)
_AXES_HEAD = bytes([PROTOCOL_MAJOR, FrameType.AXES, 14])


def _crc_table() -> np.ndarray:
    """Byte-wise table of the CRC-16 with poly 0x1021 (MSB first), as in binascii.crc_hqx."""
    t = np.zeros(256, np.uint32)
    for i in range(256):
        c = i << 8
        for _ in range(8):
            c = ((c << 1) ^ 0x1021) if c & 0x8000 else (c << 1)
        t[i] = c & 0xFFFF
    return t


_CRC_T = _crc_table()


_CRC_T16: np.ndarray | None = None


def _crc_table16() -> np.ndarray:
    """Two-byte table: the register after 16 bits shifted through it. The register is 16 bits wide,
    so one lookup per byte pair does the work of two byte steps (built on first use, 256 KiB)."""
    global _CRC_T16
    if _CRC_T16 is None:
        r = np.arange(65536, dtype=np.uint32)
        for _ in range(16):
            r = np.where(r & 0x8000, (r << 1) ^ 0x1021, r << 1) & 0xFFFF
        _CRC_T16 = r.astype(np.uint32)
    return _CRC_T16


def crc16_rows(rows: np.ndarray, crc: int = 0xFFFF) -> np.ndarray:
    """CRC-16/IBM-3740 of each row of a (N, L) uint8 array: one table step per byte pair."""
    rows = np.asarray(rows, np.uint8)
    c = np.full(rows.shape[0], crc, np.uint32)
    j = rows.shape[1] % 2
    if j:  # an odd leading byte takes the one-byte step
        c = ((c << 8) & 0xFFFF) ^ _CRC_T[(c >> 8) ^ rows[:, 0]]
    if rows.shape[1] > j:
        words = np.ascontiguousarray(rows[:, j:]).view(">u2").astype(np.uint32)  # byte pairs, first byte high
        t16 = _crc_table16()
        for k in range(words.shape[1]):
            c = t16[c ^ words[:, k]]
    return c


@dataclass(frozen=True)
class AxesBatch:
    """Consecutive clean AXES frames as arrays (protocol version 1): raw counts are (N, 3) [x, y, z]."""

    seq: np.ndarray
    tick_ms: np.ndarray
    flags: np.ndarray
    range_index: np.ndarray
    raw: np.ndarray

    def __len__(self) -> int:
        return int(self.seq.size)

    def frames(self) -> list[Frame]:
        """The same frames feed() gives for these bytes."""
        return [_frame(0x45, s, t, _AXES_S.pack(f, r, *xyz), PROTOCOL_MAJOR) for s, t, f, r, xyz in
                zip(self.seq.tolist(), self.tick_ms.tolist(), self.flags.tolist(), self.range_index.tolist(),
                    self.raw.tolist())]

    def axes(self) -> list[Axes]:
        """The same messages parse_payload gives for these frames."""
        return [_axes(f, r, *xyz) for f, r, xyz in zip(self.flags.tolist(), self.range_index.tolist(),
                                                       self.raw.tolist())]


# Up to this many frames (what a port read every few seconds holds at 10 readings/s), the CRCs are taken
# frame by frame in C (binascii, as framing.crc16) instead of in numpy: a numpy pass has a fixed cost
# per byte pair (13 array steps) that dominates short runs; the same CRC either way.
_SMALL_RUN = 128


def _axes_run_small(buf: bytearray, pos: int, avail: int) -> AxesBatch | None:
    data = bytes(buf[pos : pos + avail * AXES_FRAME_LEN])
    rec = np.frombuffer(data, _AXES_DT)
    good = ((rec["sync"] == _SYNC_U16) & (rec["ver"] == PROTOCOL_MAJOR) & (rec["type"] == FrameType.AXES)
            & (rec["len"] == 14))
    n = avail if good.all() else int(np.argmin(good))
    crc_hqx, view = binascii.crc_hqx, memoryview(data)
    end = AXES_FRAME_LEN - CRC_LEN
    for i, want in enumerate(rec["crc"][:n].tolist()):
        o = i * AXES_FRAME_LEN
        if crc_hqx(view[o + 2 : o + end], 0xFFFF) != want:
            n = i
            break
    if not n:
        return None
    r = rec[:n]
    return AxesBatch(r["seq"].astype(np.int64), r["tick"].astype(np.int64), r["flags"].astype(np.int64),
                     r["range"].astype(np.int64), r["xyz"].astype(np.int64))


def _axes_run(buf: bytearray, pos: int) -> AxesBatch | None:
    """The run of clean AXES frames starting at pos (None if the frame there is not one)."""
    avail = (len(buf) - pos) // AXES_FRAME_LEN
    if avail == 0 or buf[pos : pos + 2] != SYNC or buf[pos + 2 : pos + 5] != _AXES_HEAD:
        return None
    if avail <= _SMALL_RUN:
        return _axes_run_small(buf, pos, avail)
    parts, k, step = [], 0, 16  # growing windows: the work spent past a damaged frame stays small
    while k < avail:
        m = min(step, avail - k)
        a = np.frombuffer(bytes(buf[pos + k * AXES_FRAME_LEN : pos + (k + m) * AXES_FRAME_LEN]), np.uint8)
        rows = a.reshape(m, AXES_FRAME_LEN)
        rec = a.view(_AXES_DT)
        good = ((rec["sync"] == _SYNC_U16) & (rec["ver"] == PROTOCOL_MAJOR) & (rec["type"] == FrameType.AXES)
                & (rec["len"] == 14) & (crc16_rows(rows[:, 2:AXES_FRAME_LEN - 2]) == rec["crc"]))
        n_ok = m if good.all() else int(np.argmin(good))
        if n_ok:
            parts.append(rec[:n_ok])
        k += n_ok
        if n_ok < m:
            break
        step *= 4
    if not k:
        return None
    r = parts[0] if len(parts) == 1 else np.concatenate(parts)
    return AxesBatch(r["seq"].astype(np.int64), r["tick"].astype(np.int64), r["flags"].astype(np.int64),
                     r["range"].astype(np.int64), r["xyz"].astype(np.int64))


