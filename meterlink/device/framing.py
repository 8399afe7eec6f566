"""Frame layer of the meter's wire protocol, version 1 (docs/protocol.md): constants, CRC, frame types,
one frame to and from bytes. Pure code, no I/O.

A frame is

    sync(2) ver(1) type(1) len(1) seq(4) tick(4) payload(len) crc(2)

little-endian, with a CRC-16/IBM-3740 (poly 0x1021, init 0xFFFF) over ver..payload. The device
side needs only integers: readings are raw detector counts, levels are centi-dBuV.
"""

from __future__ import annotations

import binascii
import struct
from dataclasses import dataclass
from enum import IntEnum

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




def seq_delta(prev: int, new: int) -> int:
    """Forward distance from prev to new in u32 sequence space (0 = repeat, 1 = next)."""
    return (new - prev) % U32_MOD
