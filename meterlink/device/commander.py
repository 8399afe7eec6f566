"""A small synchronous request/response client over a transport Link (docs/protocol.md).

Each command is answered by exactly one frame; unsolicited frames (readings, STATUS) may come
before or after it. A reply is matched by cmd_type and cmd_seq (ACK, FAULT) or by type (IDENT,
STATUS, SETTING, PONG), never by position. Every frame received is kept with its host arrival
time so that a caller can study the stream afterwards. Deadlines use time.monotonic().
"""

from __future__ import annotations

import struct
import time
from dataclasses import dataclass

from meterlink.errors import LinkError, MeterlinkError, ProtocolError
from meterlink.device.protocol import (PROTOCOL_MAJOR, Ack, ClockSet, Echo, Fault, FaultCode, Frame, FrameReader,
                                FrameType, Ident, Junk, SetInterval, Setting, SettingGet, SettingKey,
                                SettingPut, Status,
                                encode_frame, parse_payload)
from meterlink.device.transport import Link

# the reply a command expects besides ACK/FAULT, matched by type
REPLY_TYPE = {FrameType.WHO: FrameType.IDENT, FrameType.STATUS_QUERY: FrameType.STATUS,
              FrameType.SETTING_GET: FrameType.SETTING, FrameType.SETTING_PUT: FrameType.SETTING,
              FrameType.PING: FrameType.PONG}
DEFAULT_REPLY_TIMEOUT_S = 0.5  # per attempt; the session rule retries WHO at 0.5 s
DEFAULT_ATTEMPTS = 3


class NoReply(LinkError):
    """A command got no matching reply within its attempts."""


class DeviceFault(MeterlinkError):
    """The device answered a command with FAULT."""

    def __init__(self, fault: Fault, what: str):
        self.fault = fault
        try:
            name = FaultCode(fault.code).name
        except ValueError:
            name = f"code {fault.code}"
        super().__init__(f"device refused {what}: {name} ({fault.text!r})")


@dataclass(frozen=True)
class Received:
    """One frame as received, with the host's monotonic arrival time in seconds."""

    frame: Frame
    host_s: float


class Commander:
    """Send commands over an open Link and wait for their replies; keeps every frame received."""

    def __init__(self, link: Link, *, reply_timeout_s: float = DEFAULT_REPLY_TIMEOUT_S,
                 attempts: int = DEFAULT_ATTEMPTS):
        self.link = link
        self.reply_timeout_s = float(reply_timeout_s)
        self.attempts = int(attempts)
        self.reader = FrameReader()
        self.frames: list[Received] = []
        self.seq = 0

    # ----------------------------------------------------------------- raw I/O
    def send(self, ftype: int, payload: bytes = b"", *, version: int = PROTOCOL_MAJOR) -> int:
        """Send one frame (TICK 0); returns the host seq it carried."""
        seq = self.seq
        self.link.write(encode_frame(int(ftype), seq, 0, payload, version))
        self.seq += 1
        return seq

    def send_raw(self, data: bytes) -> None:
        self.link.write(bytes(data))

    def pump(self, timeout_s: float = 0.01) -> int:
        """Read what has arrived (waiting up to timeout_s); returns the number of new frames."""
        data = self.link.read(4096, timeout_s)
        items = self.reader.feed(data) if data else self.reader.drop_pending()
        now = time.monotonic()
        n = 0
        for item in items:
            if not isinstance(item, Junk):
                self.frames.append(Received(item, now))
                n += 1
        return n

    def wait_for(self, pred, timeout_s: float, start: int = 0) -> Received | None:
        """First received frame (from index start on) for which pred(frame) holds, or None at the deadline."""
        deadline = time.monotonic() + timeout_s
        i = start
        while True:
            while i < len(self.frames):
                if pred(self.frames[i].frame):
                    return self.frames[i]
                i += 1
            left = deadline - time.monotonic()
            if left <= 0:
                return None
            self.pump(min(0.02, left))

    def drain(self, quiet_s: float, max_s: float | None = None) -> None:
        """Read until nothing has arrived for quiet_s (or max_s has passed: a streaming meter is never quiet)."""
        deadline = None if max_s is None else time.monotonic() + max_s
        while self.pump(quiet_s):
            if deadline is not None and time.monotonic() >= deadline:
                break

    # ----------------------------------------------------------------- requests
    def request(self, ftype: int, payload: bytes = b"", *, version: int = PROTOCOL_MAJOR,
                timeout_s: float | None = None, attempts: int | None = None) -> Received:
        """Send a command and return its reply (expected type, or ACK/FAULT naming it); NoReply if none.

        The command is sent again, with a new seq, after each attempt's timeout; a late reply to an
        earlier attempt is accepted too.
        """
        timeout_s = self.reply_timeout_s if timeout_s is None else timeout_s
        attempts = self.attempts if attempts is None else attempts
        want = REPLY_TYPE.get(ftype)
        seqs: set[int] = set()
        start = len(self.frames)

        def match(f: Frame) -> bool:
            if want is not None and f.type == want:
                return True
            if f.type in (FrameType.ACK, FrameType.FAULT) and len(f.payload) >= 5:
                off = 1 if f.type == FrameType.FAULT else 0
                ctype, cseq = struct.unpack_from("<BI", f.payload, off)
                return ctype == (ftype & 0xFF) and cseq in seqs
            return False

        for _ in range(max(1, attempts)):
            seqs.add(self.send(ftype, payload, version=version))
            got = self.wait_for(match, timeout_s, start)
            if got is not None:
                return got
        name = FrameType(ftype).name if ftype in FrameType._value2member_map_ else f"0x{ftype:02x}"
        raise NoReply(f"port {self.link.port!r}: no reply to {name} after {attempts} attempt(s) "
                      f"of {timeout_s:g} s")

    def call(self, ftype: int, msg=None, what: str | None = None):
        """request() and parse the reply; DeviceFault on FAULT, ProtocolError on a malformed reply."""
        rx = self.request(ftype, msg.pack() if msg is not None else b"")
        reply = parse_payload(rx.frame)
        if isinstance(reply, Fault):
            raise DeviceFault(reply, what or FrameType(ftype).name)
        return reply

    # ----------------------------------------------------------------- typed helpers
    def who(self) -> Ident:
        reply = self.call(FrameType.WHO)
        if not isinstance(reply, Ident):
            raise ProtocolError(f"WHO answered by {type(reply).__name__}, expected IDENT")
        return reply

    def status(self) -> Status:
        reply = self.call(FrameType.STATUS_QUERY)
        if not isinstance(reply, Status):
            raise ProtocolError(f"STATUS_QUERY answered by {type(reply).__name__}")
        return reply

    def command(self, ftype: int, msg=None) -> Received:
        """A command answered by ACK (START, STOP, SET_INTERVAL, CLOCK_SET): the ACK frame received."""
        rx = self.request(ftype, msg.pack() if msg is not None else b"")
        reply = parse_payload(rx.frame)
        if isinstance(reply, Fault):
            raise DeviceFault(reply, FrameType(ftype).name)
        if not isinstance(reply, Ack):
            raise ProtocolError(f"{FrameType(ftype).name} answered by {type(reply).__name__}, expected ACK")
        return rx

    def set_interval(self, interval_ms: int) -> Received:
        return self.command(FrameType.SET_INTERVAL, SetInterval(int(interval_ms)))

    def clock_set(self, utc_s: int, utc_ms: int) -> Received:
        return self.command(FrameType.CLOCK_SET, ClockSet(int(utc_s), int(utc_ms)))

    def get_setting(self, key: int) -> int | str:
        return self._setting(FrameType.SETTING_GET, SettingGet(key), key)

    def put_setting(self, key: int, value: int | str) -> int | str:
        """Write a setting; returns the value the device reports now in force."""
        return self._setting(FrameType.SETTING_PUT, SettingPut(key, value), key)

    def _setting(self, ftype: int, msg, key: int) -> int | str:
        name = SettingKey(key).name.lower() if key in SettingKey._value2member_map_ else str(key)
        reply = self.call(ftype, msg, f"{FrameType(ftype).name} {name}")
        if not isinstance(reply, Setting) or reply.key != key:
            raise ProtocolError(f"setting {key}: reply for another key or of another type")
        return reply.value

    def ping(self, data: bytes = b"") -> Received:
        """PING with data; the PONG frame received (compare its payload with data)."""
        return self.request(FrameType.PING, Echo(bytes(data)).pack())


__all__ = ["Commander", "Received", "NoReply", "DeviceFault", "REPLY_TYPE"]
