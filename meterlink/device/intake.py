"""Frames in: how the link reads, checks and delivers what the meter sends (a part of MeterLink, kept apart).

Each read of the port is deframed (bytes that are no frame, or fail their CRC, are counted and
reported as events; a port silent for too long is a LinkError, so the link reconnects). Every frame is parsed (a malformed payload becomes an event, never a reading), its sequence number
checked against the last (repeats, gaps with exact counts, a step backwards), a device restart
recognised (BOOT, or the sequence falling back to near 0 while the device clock goes back), FAULT
frames turned into events, and data frames timed by the device clock and queued. Runs of clean,
consecutive AXES frames are delivered as one ReadingBatch. MeterLink (meterlink/device/link.py)
supplies the state and the queue; this mixin only holds the logic. The port is read by the link's
own thread or by the shared reader thread (meterlink/device/mux.py), which calls _pump_data.
"""

from __future__ import annotations

import time
from typing import Any

import numpy as np

from meterlink.device.clock import HALF_TICK
from meterlink.device.items import Reading, ReadingBatch, SpectrumReading, StatusReport
from meterlink.device.protocol import (Axes, AxesBatch, Boot, Fault, FaultCode, Frame, Ident, Junk, Spectrum, Status,
                                       parse_payload, seq_delta)
from meterlink.errors import LinkError, ProtocolError
from meterlink.safetext import clean_text

RESTART_SEQ_MAX = 64  # seq this close to 0 with the tick going back = the device restarted


class DeviceRestarted(Exception):
    """Internal: the device restarted (raised after the bytes read have all been handled); handshake again."""


class FrameIntake:
    """The frames-in half of MeterLink: reading, sequence and restart checks, faults, delivery of data."""

    def _pump(self, timeout_s: float = 0.05) -> list[tuple[Frame, Any]]:
        """Read once, handle everything that arrived; return (frame, message) pairs handled."""
        assert self._link is not None
        data = self._link.read(16384 if self.batched else 4096, timeout_s)
        now = time.monotonic()
        self._last_read_n = len(data)
        if not data:
            self._check_silence(now)
            return []
        return self._pump_data(data, now)

    def _check_silence(self, now: float) -> None:
        """No frames for too long: a port_silent event and a LinkError (the link reconnects)."""
        silence = now - self._last_frame_mono
        if silence <= self.min_silence_s:     # the limit is never below it: no need for the clock's estimate
            return
        ratio = self.clock.rate_ratio() or 1.0
        limit = max(self.min_silence_s, 30.0 / max(ratio, 1.0))  # STATUS comes at least every 10 s device time
        if silence > limit:
            self._event("port_silent", "warning", f"no frames from {self.port} for {silence:.1f} s",
                        silence_s=round(silence, 3))
            raise LinkError(f"port {self.port!r} silent for {silence:.1f} s")

    def _pump_data(self, data: bytes, now: float) -> list[tuple[Frame, Any]]:
        """Handle bytes read at now: frames checked and delivered, junk counted; DeviceRestarted on a restart."""
        if not data:
            return []
        junk: dict[str, int] = {}
        handled = []
        items = self._reader.feed_batched(data) if self.batched else self._reader.feed(data)
        for item in items:
            if isinstance(item, AxesBatch):
                self._last_frame_mono = now
                if not self._deliver_batch(item, now):   # not a plain run: frame by frame, as feed() gives it
                    for frame in item.frames():
                        msg = self._handle(frame, now)
                        if msg is not None:
                            handled.append((frame, msg))
                continue
            if isinstance(item, Junk):
                junk[item.kind] = junk.get(item.kind, 0) + item.n_bytes
                if item.kind == "crc":
                    self.stats.crc_errors += 1
                elif item.kind == "length":
                    self.stats.length_errors += 1
                else:
                    self.stats.garbage_bytes += item.n_bytes
                continue
            self._last_frame_mono = now
            msg = self._handle(item, now)
            if msg is not None:
                handled.append((item, msg))
        for kind, n in junk.items():
            name = {"crc": "crc_error", "length": "length_error"}.get(kind, "garbage")
            self._event(name, "warning", f"{n} byte(s) skipped ({kind})", n_bytes=n)
        if self._restart_pending:
            self._restart_pending = False
            raise DeviceRestarted
        return handled

    def _handle(self, frame: Frame, now: float):
        """Check one frame's sequence and deliver it; returns the parsed message or None."""
        self.stats.frames += 1
        try:
            msg = parse_payload(frame)
        except ProtocolError as exc:
            self.stats.malformed += 1
            self._event("malformed", "warning", f"frame type 0x{frame.type:02x} seq {frame.seq}: {exc}",
                        type=frame.type, seq=frame.seq)
            self._track_seq(frame)
            return None
        if isinstance(msg, Boot) and self.ident is None:
            self._event("device_boot", "info", f"device booted (boot count {msg.boot_count}, reset cause "
                        f"{msg.reset_cause})", boot=msg.boot_count, reset_cause=msg.reset_cause)
            self._boot = msg.boot_count
            self._last_seq, self._last_tick = frame.seq, frame.tick_ms
            return msg
        if isinstance(msg, Boot):
            self._on_restart(f"device sent BOOT (boot count {msg.boot_count}, reset cause {msg.reset_cause})",
                             boot=msg.boot_count, reset_cause=msg.reset_cause)
            self._boot = msg.boot_count
            self._last_seq, self._last_tick = frame.seq, frame.tick_ms
            return msg
        if self._looks_restarted(frame):
            self._on_restart(f"sequence fell back from {self._last_seq} to {frame.seq} and the device "
                             "clock went back", seq=frame.seq, prev_seq=self._last_seq)
            self._last_seq, self._last_tick = frame.seq, frame.tick_ms
            if isinstance(msg, Ident):
                self._boot = msg.boot_count
            return msg
        self._track_seq(frame)
        if isinstance(msg, Fault):
            self._on_fault(msg)
        elif isinstance(msg, (Axes, Spectrum, Status)):
            self._deliver_data(frame, msg, now)
        return msg

    def _looks_restarted(self, frame: Frame) -> bool:
        if self._last_seq is None or self._last_tick is None:
            return False
        delta = seq_delta(self._last_seq, frame.seq)
        back = (self._last_tick - frame.tick_ms) % (1 << 32)
        return delta > HALF_TICK and frame.seq < RESTART_SEQ_MAX and 0 < back < HALF_TICK

    def _track_seq(self, frame: Frame) -> None:
        if self._last_seq is not None:
            delta = seq_delta(self._last_seq, frame.seq)
            if delta == 0:
                self.stats.duplicates += 1
                self._event("duplicate_frame", "warning", f"frame seq {frame.seq} repeated", seq=frame.seq)
            elif 1 < delta <= HALF_TICK:
                self.stats.gaps += 1
                self.stats.lost_frames += delta - 1
                self._event("seq_gap", "warning", f"{delta - 1} frame(s) lost between seq {self._last_seq} and "
                            f"{frame.seq}", lost=delta - 1, prev_seq=self._last_seq, seq=frame.seq,
                            boot=self._boot)
            elif delta > HALF_TICK:
                self._event("seq_backward", "warning", f"frame seq {frame.seq} arrived after {self._last_seq}",
                            seq=frame.seq, prev_seq=self._last_seq)
                return
        self._last_seq, self._last_tick = frame.seq, frame.tick_ms

    def _on_restart(self, message: str, **detail) -> None:
        self._restart_pending = True
        self.stats.restarts += 1
        self.clock.restart()
        self._event("device_restart", "warning", message, **detail)

    def _on_fault(self, f: Fault) -> None:
        self.stats.faults += 1
        try:
            name = FaultCode(f.code).name
        except ValueError:
            name = f"code {f.code}"
        sev = "error" if f.code == FaultCode.SENSOR else "warning"
        self._event("fault", sev, f"device FAULT {name} (command 0x{f.cmd_type:02x} seq {f.cmd_seq}): "
                    f"{clean_text(f.text)}", code=f.code, name=name, cmd_type=f.cmd_type, cmd_seq=f.cmd_seq,
                    text=f.text)

    def _deliver_data(self, frame: Frame, msg, now: float) -> None:
        if self.clock.mapping is None or self._boot is None:
            self.stats.unsynced += 1
            if self.stats.unsynced == 1:
                self._event("unsynced", "warning", "data frame before the handshake ignored", seq=frame.seq)
            return
        tick = self.clock.unwrap(frame.tick_ms)
        t_utc = self.clock.utc_of(tick)
        if isinstance(msg, Axes):
            self.stats.readings += 1
            self.clock.observe(now, tick)
            self._put(Reading(self._boot, frame.seq, tick, t_utc, msg))
        elif isinstance(msg, Spectrum):
            self.stats.spectra += 1
            self.clock.observe(now, tick)
            self._put(SpectrumReading(self._boot, frame.seq, tick, t_utc, msg))
        else:
            self.stats.statuses += 1
            self._put(StatusReport(self._boot, frame.seq, tick, t_utc, msg))

    def _deliver_batch(self, b: AxesBatch, now: float) -> bool:
        """Deliver a run of AXES frames as one ReadingBatch when it needs no frame-by-frame attention:
        the clock is mapped, seq follows the last frame by one each, the tick neither wraps nor
        goes back. Returns False (nothing done) otherwise."""
        if self.clock.mapping is None or self._boot is None or self._last_seq is None or self._last_tick is None:
            return False
        seq, tick = b.seq, b.tick_ms
        if seq_delta(self._last_seq, int(seq[0])) != 1 or (seq.size > 1 and not bool(np.all(np.diff(seq) == 1))):
            return False
        steps = np.diff(tick, prepend=self._last_tick)
        if not bool(np.all((steps >= 0) & (steps < HALF_TICK))):
            return False
        n = len(b)
        self.stats.frames += n
        self.stats.readings += n
        first = self.clock.unwrap(int(tick[0]))
        if n > 1:
            self.clock.unwrap(int(tick[-1]))
        ticks = tick - int(tick[0]) + first
        self.clock.utc_of(int(ticks[-1]))        # the latest time given out (a later boot starts after it)
        m = self.clock.mapping
        t_utc = m.utc0_s + (ticks - m.tick0_ms) / 1000.0
        self.clock.observe_many(now, ticks[-256:].tolist())   # the drift estimate keeps the last 256 pairs anyway
        self._last_seq, self._last_tick = int(seq[-1]), int(tick[-1])
        self._put(ReadingBatch(self._boot, seq, ticks, t_utc, b.flags, b.range_index, b.raw))
        return True

