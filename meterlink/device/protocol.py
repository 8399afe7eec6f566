"""Wire codec for the meter link, protocol version 1 (see docs/protocol.md): bytes <-> frames.

Pure code, no I/O. A frame is

    sync(2) ver(1) type(1) len(1) seq(4) tick(4) payload(len) crc(2)

little-endian, with a CRC-16/IBM-3740 (poly 0x1021, init 0xFFFF) over ver..payload. The device
side needs only integers: readings are raw detector counts, levels are centi-dBuV.
"""

from __future__ import annotations

import binascii
import struct
from dataclasses import dataclass, field
from enum import IntEnum
from typing import ClassVar

import numpy as np

from meterlink.errors import ProtocolError

SYNC = b"\xa7\x3c"
PROTOCOL_MAJOR = 1
PROTOCOL_MINOR = 0
HEADER_LEN = 13  # sync .. tick
CRC_LEN = 2
MAX_PAYLOAD = 240
MAX_FRAME = HEADER_LEN + MAX_PAYLOAD + CRC_LEN  # 255
MIN_FRAME = HEADER_LEN + CRC_LEN
MAX_TEXT = 32
U32_MOD = 1 << 32

_HEAD = struct.Struct("<2sBBBII")


def crc16(data: bytes, crc: int = 0xFFFF) -> int:
    """CRC-16/IBM-3740 (also called CCITT-FALSE): poly 0x1021, init 0xFFFF; check('123456789') = 0x29B1."""
    return binascii.crc_hqx(data, crc)


class FrameType(IntEnum):
    """Frame types: 0x01-0x3F host to device, 0x40-0x7F device to host."""

    WHO = 0x01
    START = 0x02
    STOP = 0x03
    SET_INTERVAL = 0x04
    STATUS_QUERY = 0x05
    SETTING_GET = 0x06
    SETTING_PUT = 0x07
    CLOCK_SET = 0x08
    PING = 0x09
    BOOT = 0x40
    IDENT = 0x41
    ACK = 0x42
    STATUS = 0x43
    FAULT = 0x44
    AXES = 0x45
    SPECTRUM = 0x46
    SETTING = 0x47
    PONG = 0x48


class SensorKind(IntEnum):
    E_PROBE = 1  # isotropic three-axis E-field probe
    H_PROBE = 2  # isotropic three-axis H-field probe
    DIPOLE_RX = 3  # calibrated dipole feeding a receiver, levels by frequency


class FaultCode(IntEnum):
    BAD_FRAME = 1
    UNKNOWN_TYPE = 2
    BAD_LENGTH = 3
    BAD_VALUE = 4
    NOT_NOW = 5
    BAD_VERSION = 6
    SENSOR = 7
    UNKNOWN_KEY = 8
    READ_ONLY = 9


class SettingKey(IntEnum):
    INTERVAL_MS = 1  # u32
    DEVICE_AVERAGING = 2  # u32, ADC conversions averaged per reading (1..64)
    PROBE_SERIAL = 3  # text
    CERT_REF = 4  # text
    ASSET_TAG = 5  # text
    CLOCK_UTC = 6  # u32 seconds since 1970, 0 = not set; read only (set with CLOCK_SET)


STATUS_OVERRANGE = 1 << 0
STATUS_UNDERRANGE = 1 << 1
STATUS_BATTERY_LOW = 1 << 2
STATUS_SENSOR_FAULT = 1 << 3
STATUS_STREAMING = 1 << 4
STATUS_CLOCK_SET = 1 << 5

AXIS_OVER_X, AXIS_OVER_Y, AXIS_OVER_Z = 1 << 0, 1 << 1, 1 << 2
AXIS_UNDER_X, AXIS_UNDER_Y, AXIS_UNDER_Z = 1 << 3, 1 << 4, 1 << 5


@dataclass(frozen=True)
class Frame:
    """One decoded frame: header fields and the still-packed payload."""

    type: int
    seq: int
    tick_ms: int
    payload: bytes = b""
    version: int = PROTOCOL_MAJOR


_new = object.__new__


def _frame(ftype: int, seq: int, tick_ms: int, payload: bytes, version: int) -> Frame:
    """A Frame built without the frozen-dataclass __init__ (3x faster on the hot path; same object)."""
    f = _new(Frame)
    d = f.__dict__
    d["type"] = ftype
    d["seq"] = seq
    d["tick_ms"] = tick_ms
    d["payload"] = payload
    d["version"] = version
    return f


def encode_frame(ftype: int, seq: int, tick_ms: int, payload: bytes = b"", version: int = PROTOCOL_MAJOR) -> bytes:
    """Frame bytes for one message; ProtocolError if a field does not fit."""
    if len(payload) > MAX_PAYLOAD:
        raise ProtocolError(f"payload of {len(payload)} bytes exceeds {MAX_PAYLOAD}")
    if not (0 <= ftype <= 0xFF and 0 <= version <= 0xFF):
        raise ProtocolError("frame type and version are single bytes")
    body = _HEAD.pack(SYNC, version, ftype, len(payload), seq % U32_MOD, tick_ms % U32_MOD) + payload
    return body + struct.pack("<H", crc16(body[2:]))


def decode_frame(buf: bytes) -> Frame:
    """Decode exactly one whole frame; ProtocolError on any defect."""
    if len(buf) < MIN_FRAME:
        raise ProtocolError(f"frame of {len(buf)} bytes is shorter than {MIN_FRAME}")
    sync, ver, ftype, n, seq, tick = _HEAD.unpack_from(buf)
    if sync != SYNC:
        raise ProtocolError("bad sync bytes")
    if n > MAX_PAYLOAD or len(buf) != HEADER_LEN + n + CRC_LEN:
        raise ProtocolError(f"length field {n} does not match a frame of {len(buf)} bytes")
    (crc,) = struct.unpack_from("<H", buf, HEADER_LEN + n)
    if crc16(buf[2 : HEADER_LEN + n]) != crc:
        raise ProtocolError("CRC mismatch")
    return Frame(ftype, seq, tick, bytes(buf[HEADER_LEN : HEADER_LEN + n]), ver)


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
# Typed payloads. Each has TYPE, pack() and unpack(payload); unpack raises ProtocolError.


def _text(raw: bytes, off: int, what: str) -> tuple[str, int]:
    if off >= len(raw):
        raise ProtocolError(f"{what}: text field missing")
    n = raw[off]
    if n > MAX_TEXT or off + 1 + n > len(raw):
        raise ProtocolError(f"{what}: text field of {n} bytes does not fit")
    # untrusted bytes: decode leniently; callers escape before display
    return raw[off + 1 : off + 1 + n].decode("ascii", errors="replace"), off + 1 + n


def _pack_text(s: str) -> bytes:
    b = s.encode("ascii", errors="replace")[:MAX_TEXT]
    return bytes([len(b)]) + b


def _exact(raw: bytes, n: int, what: str) -> None:
    if len(raw) != n:
        raise ProtocolError(f"{what}: payload of {len(raw)} bytes, expected {n}")


@dataclass(frozen=True)
class Empty:
    """Payload-less commands (WHO, START, STOP, STATUS_QUERY)."""

    TYPE: ClassVar[int] = 0

    def pack(self) -> bytes:
        return b""


@dataclass(frozen=True)
class Ident:
    """Device identification, the reply to WHO."""

    TYPE: ClassVar[int] = FrameType.IDENT
    _S: ClassVar[struct.Struct] = struct.Struct("<BBBBBBHII")
    proto_major: int
    proto_minor: int
    fw_major: int
    fw_minor: int
    fw_patch: int
    sensor_kind: int
    boot_count: int
    min_interval_ms: int
    max_interval_ms: int
    model: str
    serial: str
    probe_serial: str
    cert_ref: str

    def pack(self) -> bytes:
        head = self._S.pack(self.proto_major, self.proto_minor, self.fw_major, self.fw_minor, self.fw_patch,
                            self.sensor_kind, self.boot_count, self.min_interval_ms, self.max_interval_ms)
        return head + b"".join(_pack_text(s) for s in (self.model, self.serial, self.probe_serial, self.cert_ref))

    @classmethod
    def unpack(cls, raw: bytes) -> "Ident":
        if len(raw) < cls._S.size:
            raise ProtocolError("IDENT: payload too short")
        vals = cls._S.unpack_from(raw)
        off = cls._S.size
        texts = []
        for what in ("model", "serial", "probe serial", "certificate reference"):
            s, off = _text(raw, off, f"IDENT {what}")
            texts.append(s)
        if off != len(raw):
            raise ProtocolError("IDENT: trailing bytes")
        return cls(*vals, *texts)


@dataclass(frozen=True)
class Boot:
    """Sent once at power-up or reset, before anything else."""

    TYPE: ClassVar[int] = FrameType.BOOT
    boot_count: int
    reset_cause: int  # 0 power-on, 1 watchdog, 2 brown-out, 3 software, 255 unknown

    def pack(self) -> bytes:
        return struct.pack("<HB", self.boot_count, self.reset_cause)

    @classmethod
    def unpack(cls, raw: bytes) -> "Boot":
        _exact(raw, 3, "BOOT")
        return cls(*struct.unpack("<HB", raw))


@dataclass(frozen=True)
class Ack:
    """A command was accepted."""

    TYPE: ClassVar[int] = FrameType.ACK
    cmd_type: int
    cmd_seq: int

    def pack(self) -> bytes:
        return struct.pack("<BI", self.cmd_type, self.cmd_seq)

    @classmethod
    def unpack(cls, raw: bytes) -> "Ack":
        _exact(raw, 5, "ACK")
        return cls(*struct.unpack("<BI", raw))


@dataclass(frozen=True)
class Fault:
    """An error report: a refused command or a device fault. cmd_seq 0xFFFFFFFF = not tied to one."""

    TYPE: ClassVar[int] = FrameType.FAULT
    code: int
    cmd_type: int
    cmd_seq: int
    text: str = ""

    def pack(self) -> bytes:
        return struct.pack("<BBI", self.code, self.cmd_type, self.cmd_seq) + _pack_text(self.text)

    @classmethod
    def unpack(cls, raw: bytes) -> "Fault":
        if len(raw) < 7:
            raise ProtocolError("FAULT: payload too short")
        code, ctype, cseq = struct.unpack_from("<BBI", raw)
        text, off = _text(raw, 6, "FAULT text")
        if off != len(raw):
            raise ProtocolError("FAULT: trailing bytes")
        return cls(code, ctype, cseq, text)


@dataclass(frozen=True)
class Status:
    """Battery, temperature, range flags and the sampling state."""

    TYPE: ClassVar[int] = FrameType.STATUS
    _S: ClassVar[struct.Struct] = struct.Struct("<HBhHIH")
    battery_mv: int
    battery_pct: int  # 0..100, 255 unknown
    temp_centi_c: int
    flags: int
    interval_ms: int
    boot_count: int

    def pack(self) -> bytes:
        return self._S.pack(self.battery_mv, self.battery_pct, self.temp_centi_c, self.flags,
                            self.interval_ms, self.boot_count)

    @classmethod
    def unpack(cls, raw: bytes) -> "Status":
        _exact(raw, cls._S.size, "STATUS")
        return cls(*cls._S.unpack(raw))


@dataclass(frozen=True)
class Axes:
    """One reading of a three-axis probe: raw signed detector counts per axis."""

    TYPE: ClassVar[int] = FrameType.AXES
    _S: ClassVar[struct.Struct] = struct.Struct("<BBiii")
    flags: int  # AXIS_OVER_* / AXIS_UNDER_* bits
    range_index: int
    x: int
    y: int
    z: int

    def pack(self) -> bytes:
        return self._S.pack(self.flags, self.range_index, self.x, self.y, self.z)

    @classmethod
    def unpack(cls, raw: bytes) -> "Axes":
        _exact(raw, cls._S.size, "AXES")
        return _axes(*cls._S.unpack(raw))


def _axes(flags: int, range_index: int, x: int, y: int, z: int) -> Axes:
    """An Axes built without the frozen-dataclass __init__ (the per-reading hot path; same object)."""
    a = _new(Axes)
    d = a.__dict__
    d["flags"] = flags
    d["range_index"] = range_index
    d["x"] = x
    d["y"] = y
    d["z"] = z
    return a


_AXES_S = Axes._S


@dataclass(frozen=True)
class Spectrum:
    """Levels by frequency from a dipole receiver: pairs of (kHz, centi-dBuV) for one orientation."""

    TYPE: ClassVar[int] = FrameType.SPECTRUM
    MAX_PAIRS: ClassVar[int] = (MAX_PAYLOAD - 4) // 6  # 39
    orientation: int  # 0 X, 1 Y, 2 Z, 3 other/unknown
    sweep: int  # u16 sweep counter: the orientations of one sweep share it
    pairs: tuple[tuple[int, int], ...]  # (freq_khz u32, level_centi_dbuv i16)

    def pack(self) -> bytes:
        if len(self.pairs) > self.MAX_PAIRS:
            raise ProtocolError(f"SPECTRUM: {len(self.pairs)} pairs exceed {self.MAX_PAIRS}")
        head = struct.pack("<BHB", self.orientation, self.sweep, len(self.pairs))
        return head + b"".join(struct.pack("<Ih", f, lv) for f, lv in self.pairs)

    @classmethod
    def unpack(cls, raw: bytes) -> "Spectrum":
        if len(raw) < 4:
            raise ProtocolError("SPECTRUM: payload too short")
        orient, sweep, n = struct.unpack_from("<BHB", raw)
        if n > cls.MAX_PAIRS:
            raise ProtocolError(f"SPECTRUM: {n} pairs exceed {cls.MAX_PAIRS}")
        if len(raw) != 4 + 6 * n:
            raise ProtocolError(f"SPECTRUM: {n} pairs do not match {len(raw)} bytes")
        pairs = tuple(struct.iter_unpack("<Ih", raw[4:]))
        return cls(orient, sweep, pairs)


@dataclass(frozen=True)
class SetInterval:
    """Ask for one reading every interval_ms."""

    TYPE: ClassVar[int] = FrameType.SET_INTERVAL
    interval_ms: int

    def pack(self) -> bytes:
        return struct.pack("<I", self.interval_ms)

    @classmethod
    def unpack(cls, raw: bytes) -> "SetInterval":
        _exact(raw, 4, "SET_INTERVAL")
        return cls(*struct.unpack("<I", raw))


def _pack_value(value: int | str) -> bytes:
    if isinstance(value, str):
        return b"\x02" + _pack_text(value)
    return b"\x01" + struct.pack("<I", value % U32_MOD)


def _unpack_value(raw: bytes, off: int, what: str) -> int | str:
    if off >= len(raw):
        raise ProtocolError(f"{what}: value missing")
    vtype = raw[off]
    if vtype == 1:
        if len(raw) != off + 5:
            raise ProtocolError(f"{what}: number value must be 4 bytes")
        return struct.unpack_from("<I", raw, off + 1)[0]
    if vtype == 2:
        s, end = _text(raw, off + 1, what)
        if end != len(raw):
            raise ProtocolError(f"{what}: trailing bytes")
        return s
    raise ProtocolError(f"{what}: unknown value type {vtype}")


@dataclass(frozen=True)
class SettingGet:
    TYPE: ClassVar[int] = FrameType.SETTING_GET
    key: int

    def pack(self) -> bytes:
        return bytes([self.key])

    @classmethod
    def unpack(cls, raw: bytes) -> "SettingGet":
        _exact(raw, 1, "SETTING_GET")
        return cls(raw[0])


@dataclass(frozen=True)
class SettingPut:
    TYPE: ClassVar[int] = FrameType.SETTING_PUT
    key: int
    value: int | str

    def pack(self) -> bytes:
        return bytes([self.key]) + _pack_value(self.value)

    @classmethod
    def unpack(cls, raw: bytes) -> "SettingPut":
        if not raw:
            raise ProtocolError("SETTING_PUT: payload empty")
        return cls(raw[0], _unpack_value(raw, 1, "SETTING_PUT"))


@dataclass(frozen=True)
class Setting:
    """The device's reply to SETTING_GET or SETTING_PUT: the value now in force."""

    TYPE: ClassVar[int] = FrameType.SETTING
    key: int
    value: int | str

    def pack(self) -> bytes:
        return bytes([self.key]) + _pack_value(self.value)

    @classmethod
    def unpack(cls, raw: bytes) -> "Setting":
        if not raw:
            raise ProtocolError("SETTING: payload empty")
        return cls(raw[0], _unpack_value(raw, 1, "SETTING"))


@dataclass(frozen=True)
class ClockSet:
    """Set the device's calendar clock to UTC (seconds since 1970 and milliseconds)."""

    TYPE: ClassVar[int] = FrameType.CLOCK_SET
    utc_s: int
    utc_ms: int

    def pack(self) -> bytes:
        return struct.pack("<IH", self.utc_s, self.utc_ms)

    @classmethod
    def unpack(cls, raw: bytes) -> "ClockSet":
        _exact(raw, 6, "CLOCK_SET")
        s, ms = struct.unpack("<IH", raw)
        if ms > 999:
            raise ProtocolError("CLOCK_SET: milliseconds above 999")
        return cls(s, ms)


@dataclass(frozen=True)
class Echo:
    """PING and PONG carry up to MAX_PAYLOAD opaque bytes, echoed back."""

    TYPE: ClassVar[int] = FrameType.PONG
    data: bytes = b""

    def pack(self) -> bytes:
        return self.data

    @classmethod
    def unpack(cls, raw: bytes) -> "Echo":
        return cls(bytes(raw))


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


def _axes_run(buf: bytearray, pos: int) -> AxesBatch | None:
    """The run of clean AXES frames starting at pos (None if the frame there is not one)."""
    avail = (len(buf) - pos) // AXES_FRAME_LEN
    if avail == 0 or buf[pos : pos + 2] != SYNC or buf[pos + 2 : pos + 5] != _AXES_HEAD:
        return None
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


_EMPTY_TYPES = {FrameType.WHO, FrameType.START, FrameType.STOP, FrameType.STATUS_QUERY}
_PAYLOAD_CLASSES: dict[int, type] = {
    FrameType.IDENT: Ident, FrameType.BOOT: Boot, FrameType.ACK: Ack, FrameType.FAULT: Fault,
    FrameType.STATUS: Status, FrameType.AXES: Axes, FrameType.SPECTRUM: Spectrum,
    FrameType.SET_INTERVAL: SetInterval, FrameType.SETTING_GET: SettingGet,
    FrameType.SETTING_PUT: SettingPut, FrameType.SETTING: Setting, FrameType.CLOCK_SET: ClockSet,
    FrameType.PING: Echo, FrameType.PONG: Echo,
}


def parse_payload(frame: Frame):
    """Typed message for a frame's payload; ProtocolError for an unknown type or bad payload."""
    ftype, raw = frame.type, frame.payload
    if ftype == 0x45 and frame.version == PROTOCOL_MAJOR and len(raw) == 14:  # AXES, by far the commonest
        return _axes(*_AXES_S.unpack(raw))
    if frame.version != PROTOCOL_MAJOR:
        raise ProtocolError(f"protocol version {frame.version} not supported (this host speaks {PROTOCOL_MAJOR})")
    if frame.type in _EMPTY_TYPES:
        if frame.payload:
            raise ProtocolError(f"{FrameType(frame.type).name}: expected no payload")
        return Empty()
    cls = _PAYLOAD_CLASSES.get(frame.type)
    if cls is None:
        raise ProtocolError(f"unknown frame type 0x{frame.type:02x}")
    return cls.unpack(frame.payload)


def encode_message(msg, seq: int, tick_ms: int, ftype: int | None = None) -> bytes:
    """Frame bytes for a typed message (ftype needed for Empty and for PING vs PONG)."""
    t = ftype if ftype is not None else msg.TYPE
    if not t:
        raise ProtocolError("an Empty message needs an explicit frame type")
    return encode_frame(t, seq, tick_ms, msg.pack())


def seq_delta(prev: int, new: int) -> int:
    """Forward distance from prev to new in u32 sequence space (0 = repeat, 1 = next)."""
    return (new - prev) % U32_MOD
