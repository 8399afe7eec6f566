"""Typed payloads of the wire protocol (docs/protocol.md): one small class per message with TYPE,
pack() and unpack(payload); unpack raises ProtocolError on anything malformed. Pure code, no I/O."""

from __future__ import annotations

import struct
from dataclasses import dataclass
from typing import ClassVar

from meterlink.device.framing import (MAX_PAYLOAD, MAX_TEXT, PROTOCOL_MAJOR, U32_MOD, Frame, FrameType, _new,
                                      encode_frame)
from meterlink.errors import ProtocolError



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

