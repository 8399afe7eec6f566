"""Commands out: how the link talks to the meter (a part of MeterLink, kept apart).

The host sends a command frame with its own sequence number and reads until the reply for that
number arrives (an ACK or FAULT naming it, or the answer of the type asked for), within a time
limit. The handshake is WHO -> IDENT (retried), STATUS_QUERY, SET_INTERVAL (clamped to the
device's range), START -> ACK; a device that restarts meanwhile is greeted again, at most five
times. On a new boot the device clock is mapped to UTC afresh. At the end the link says STOP.

MeterLink (meterlink/device/link.py) supplies the port, the state and the queue; this mixin only
holds the exchange. Replies are read through the frames-in half (meterlink/device/intake.py), so
data frames that arrive while waiting are checked and delivered as usual.
"""

from __future__ import annotations

import time

from meterlink.device.intake import DeviceRestarted
from meterlink.device.items import Connected
from meterlink.device.protocol import Ack, Empty, Fault, FrameType, Ident, PROTOCOL_MAJOR, SetInterval, Status, \
    encode_message
from meterlink.errors import LinkError
from meterlink.safetext import clean_text

HANDSHAKE_RESTARTS_MAX = 5   # a device restarting more often than this during one handshake is given up on


class WrongProtocol(Exception):
    """Internal: the device cannot be used (it speaks another protocol major version)."""


class CommandExchange:
    """The commands-out half of MeterLink: command and reply, the handshake, the closing STOP."""

    def _send(self, ftype: int, msg) -> int:
        """Write one command frame; returns the host sequence number it carries."""
        assert self._link is not None
        seq = self._host_seq
        self._host_seq = (self._host_seq + 1) % (1 << 32)
        self._link.write(encode_message(msg, seq, 0, ftype))
        return seq

    def _command(self, ftype: int, msg, want: type, timeout_s: float | None = None):
        """Send one command and wait for its reply; a FAULT for it is returned too. None on timeout."""
        seq = self._send(ftype, msg)
        deadline = time.monotonic() + (timeout_s or self.reply_timeout_s)
        while time.monotonic() < deadline and not self._stop.is_set():
            for frame, reply in self._pump(min(0.05, max(0.0, deadline - time.monotonic()))):
                if isinstance(reply, Fault) and reply.cmd_seq == seq:
                    return reply
                if isinstance(reply, want) and (not isinstance(reply, Ack) or reply.cmd_seq == seq):
                    return reply
        return None

    def _handshake(self) -> None:
        """WHO -> IDENT (retried), STATUS_QUERY, SET_INTERVAL, START -> ACK; restarts on BOOT."""
        for _ in range(HANDSHAKE_RESTARTS_MAX):
            try:
                self._handshake_once()
                return
            except DeviceRestarted:
                continue
        raise LinkError(f"device on {self.port!r} keeps restarting during the handshake")

    def _handshake_once(self) -> None:
        self._last_frame_mono = time.monotonic()
        who = self._identify()
        if who is None:         # stopped meanwhile
            return
        ident, new_boot = who
        status = self._command(FrameType.STATUS_QUERY, Empty(), Status)
        if self._stop.is_set():
            return
        interval = self._agree_interval(ident, status)
        reply = self._command(FrameType.START, Empty(), Ack)
        if self._stop.is_set():
            return
        if reply is None:
            raise LinkError(f"device on {self.port!r} did not acknowledge START")
        self.stats.handshakes += 1
        assert self.clock.mapping is not None
        self._event("handshake", "info", f"connected to {clean_text(ident.model)} serial {clean_text(ident.serial)} "
                    f"on {self.port} (boot {ident.boot_count}, interval {interval} ms)",
                    boot=ident.boot_count, interval_ms=interval, new_boot=new_boot)
        self._put(Connected(ident, status if isinstance(status, Status) else None, ident.boot_count, interval,
                            self.clock.mapping, self.port))

    def _identify(self) -> tuple[Ident, bool] | None:
        """WHO until IDENT (who_retries times); check the protocol version and map the device clock on a new
        boot. Returns (IDENT, whether it is a new boot), None if stopped meanwhile; LinkError if the device
        never answers, WrongProtocol if it cannot be used."""
        ident = None
        for _ in range(self.who_retries):
            if self._stop.is_set():
                return None
            ident = self._command(FrameType.WHO, Empty(), Ident)
            if isinstance(ident, Ident):
                break
        if not isinstance(ident, Ident):
            raise LinkError(f"no IDENT from the device on {self.port!r} after {self.who_retries} WHO")
        t_utc = time.time()
        if ident.proto_major != PROTOCOL_MAJOR:
            raise WrongProtocol(f"device speaks protocol {ident.proto_major}.{ident.proto_minor}, "
                                f"this host {PROTOCOL_MAJOR}")
        ident_tick = self._last_tick if self._last_tick is not None else 0
        new_boot = self._boot != ident.boot_count or self.clock.mapping is None
        if new_boot:
            self.clock.sync(ident.boot_count, ident_tick, t_utc)
        self._boot = ident.boot_count
        self.ident = ident
        return ident, new_boot

    def _agree_interval(self, ident: Ident, status) -> int:
        """SET_INTERVAL with the requested interval clamped to the device's range (an event if clamped);
        returns the interval in use (the device's own, from STATUS, if it refused the setting)."""
        interval = min(max(self.interval_ms, ident.min_interval_ms), ident.max_interval_ms)
        if interval != self.interval_ms:
            self._event("interval_clamped", "warning", f"interval {self.interval_ms} ms outside the device's "
                        f"{ident.min_interval_ms}..{ident.max_interval_ms} ms; using {interval} ms",
                        requested_ms=self.interval_ms, used_ms=interval)
        reply = self._command(FrameType.SET_INTERVAL, SetInterval(interval), Ack)
        if not isinstance(reply, Ack):
            self._event("handshake", "warning", f"SET_INTERVAL {interval} ms not accepted", interval_ms=interval)
            interval = status.interval_ms if isinstance(status, Status) else interval
        return interval

    def _say_stop(self) -> None:
        """Tell the device to stop streaming (best effort: a port already gone is no error here)."""
        if self._link is not None and self._link.is_open:
            try:
                self._send(FrameType.STOP, Empty())
            except LinkError:
                pass
