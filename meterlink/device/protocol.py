"""The meter's wire protocol, version 1 (docs/protocol.md), in one import: bytes <-> frames <-> messages.

Pure code, no I/O. It lives in three files, read in this order:

- ``framing``  constants, CRC-16, frame types and status bits, one frame to and from bytes;
- ``messages`` the typed payload of each frame type, ``parse_payload`` and ``encode_message``;
- ``reader``   ``FrameReader``: a byte stream in any chunking -> frames and counted junk, and runs of
               AXES frames decoded in numpy (``feed_batched``, the ingest hot path).

Everything is re-exported here, so callers write ``from meterlink.device.protocol import ...``.
"""

from __future__ import annotations

from meterlink.device.framing import (  # noqa: F401
    AXIS_OVER_X, AXIS_OVER_Y, AXIS_OVER_Z, AXIS_UNDER_X, AXIS_UNDER_Y, AXIS_UNDER_Z, CRC_LEN, HEADER_LEN, MAX_FRAME, MAX_PAYLOAD, MAX_TEXT, MIN_FRAME, PROTOCOL_MAJOR, PROTOCOL_MINOR,
    STATUS_BATTERY_LOW, STATUS_CLOCK_SET, STATUS_OVERRANGE, STATUS_SENSOR_FAULT, STATUS_STREAMING,
    STATUS_UNDERRANGE, SYNC, U32_MOD, FaultCode, Frame, FrameType, SensorKind, SettingKey, crc16,
    decode_frame, encode_frame, seq_delta,
)
from meterlink.device.messages import (  # noqa: F401
    Ack, Axes, Boot, ClockSet, Echo, Empty, Fault, Ident, SetInterval, Setting, SettingGet, SettingPut,
    Spectrum, Status, encode_message, parse_payload,
)
from meterlink.errors import ProtocolError  # noqa: F401
from meterlink.device.reader import (  # noqa: F401
    AXES_FRAME_LEN, AxesBatch, FrameReader, Junk, ReaderStats, crc16_rows,
)
