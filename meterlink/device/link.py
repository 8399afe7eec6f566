"""The meter link: handshake, one reader thread, reconnection; sequence and restart checks in intake.py.

``MeterLink`` owns a transport and a background thread that deframes, parses and checks every
frame (the frames-in logic is meterlink.device.intake.FrameIntake, which MeterLink takes in), then
hands typed items (meterlink.device.items: Connected, Reading, ReadingBatch, SpectrumReading,
StatusReport, LinkEvent) to consumers through a queue. A frame with a bad CRC or a malformed payload is never delivered as
a reading; it becomes a LinkEvent. Device strings are untrusted data.
"""

from __future__ import annotations

import queue
import threading
import time
from typing import TYPE_CHECKING, Any, Callable

from meterlink.device.clock import DeviceClock
from meterlink.errors import LinkError
from meterlink.safetext import clean_text
from meterlink.device.protocol import (Ack, AxesBatch, Empty, Fault, Frame, FrameReader, FrameType, Ident,
                                Junk, PROTOCOL_MAJOR, SetInterval, Status, encode_message)
from meterlink.device.intake import RESTART_SEQ_MAX, FrameIntake  # noqa: F401 (RESTART_SEQ_MAX re-exported)
from meterlink.device.items import (  # noqa: F401 (re-exported: what the link delivers)
    Connected, LinkEvent, LinkStats, Reading, ReadingBatch, SpectrumReading, StatusReport,
)
from meterlink.device.transport import Link, SerialLink

if TYPE_CHECKING:
    from meterlink.device.mux import PortMux


def safe_text(s: str) -> str:
    """A device string made safe to print (control and bidi characters escaped): meterlink.safetext."""
    return clean_text(s)


class _Restart(Exception):
    """Internal: the device restarted; handshake again."""


class _Continue(Exception):
    """Internal: the link's own thread takes over reading from the mux, streaming as it was."""


class _Fatal(Exception):
    """Internal: the device cannot be used (wrong protocol major version)."""


class MeterLink(FrameIntake):
    """Acquire from one meter on a background thread; consumers call get()."""

    def __init__(self, port: str | None = None, interval_ms: int = 1000, *,
                 link_factory: Callable[[], Link] | None = None, max_reconnects: int | None = None,
                 backoff_initial_s: float = 0.1, backoff_max_s: float = 5.0, who_retries: int = 5,
                 reply_timeout_s: float = 0.5, min_silence_s: float = 3.0, drift_report_s: float = 10.0,
                 queue_max: int = 20_000, read_timeout_s: float = 0.25, wake: threading.Event | None = None,
                 batched: bool = False, read_pause_s: float = 0.0, mux: "PortMux | None" = None):
        if link_factory is None:
            if not port:
                raise LinkError("no serial port given")
            link_factory = lambda: SerialLink(port)  # noqa: E731
        self.port = port or ""
        self.interval_ms = int(interval_ms)
        self._factory = link_factory
        self.max_reconnects = max_reconnects
        self.backoff_initial_s, self.backoff_max_s = backoff_initial_s, backoff_max_s
        self.who_retries, self.reply_timeout_s = who_retries, reply_timeout_s
        self.min_silence_s, self.drift_report_s = min_silence_s, drift_report_s
        # Bounded: a device that sends faster than the consumer stores is held back (back-pressure,
        # see _put) instead of growing memory; what it cannot hand over meanwhile shows as seq gaps.
        self.queue: queue.Queue = queue.Queue(maxsize=queue_max)
        self._spill: list = []      # items that met a full queue while stopping: given out after the queue
        # A streaming read returns as soon as bytes arrive; the timeout only bounds how long an
        # idle port goes unchecked (stop request, silence watchdog), so it need not be short.
        self.read_timeout_s = read_timeout_s
        self._wake = wake           # set after every item queued (and at the end), if given
        # batched: runs of clean, consecutive AXES frames come out as one ReadingBatch (decoded in
        # numpy) instead of a Reading each; read_pause_s: while streaming, a read that brought little
        # is followed by this pause, so that the next one gathers several frames (fewer wake-ups)
        self.batched, self.read_pause_s = bool(batched), float(read_pause_s)
        self._last_read_n = 0
        # mux: once streaming on a port with a descriptor, one shared thread reads it (meterlink/device/mux.py)
        # and this link's own thread ends; it comes back for a reconnect or a handshake
        self._mux = mux
        self.mux_headroom = min(2048, max(1, queue_max // 4))  # the mux leaves the port unread this near full
        self._mux_fd: int | None = None
        self._mux_paused_since: float | None = None
        self._mux_gen = 0
        self._attempts, self._delay = 0, backoff_initial_s     # reconnection state (whichever thread reads)
        self._next_drift = 0.0
        self.stats = LinkStats()
        self.clock = DeviceClock()
        self.ident: Ident | None = None
        self._link: Link | None = None
        self._reader = FrameReader()
        self._host_seq = 0
        self._boot: int | None = None
        self._last_seq: int | None = None
        self._last_tick: int | None = None
        self._last_frame_mono = time.monotonic()
        self._restart_pending = False
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self.finished = threading.Event()  # set when the reader thread has ended

    # -- public --------------------------------------------------------------------------------
    def start(self, require_open: bool = True) -> "MeterLink":
        """Start the reader thread; with require_open the port is opened first and LinkError raised here."""
        if require_open:
            link = self._factory()
            link.open()
            self._link = link
        self._next_drift = time.monotonic() + self.drift_report_s
        self._resume_thread(None)
        return self

    def stop(self, timeout_s: float = 5.0) -> None:
        """Stop the thread, tell the device to stop streaming (best effort) and close the port."""
        self.request_stop()
        if self._thread is not None:
            self.finished.wait(timeout_s)

    def request_stop(self) -> None:
        """Ask the link to stop without waiting (stop() waits): many links are stopped together this way."""
        self._stop.set()
        if self._mux is not None:
            self._mux.wake()

    def get(self, timeout_s: float = 0.1):
        """Next item from the link, or None if nothing arrived within timeout_s."""
        try:
            return self.queue.get(timeout=timeout_s)
        except queue.Empty:
            if self._spill and self.finished.is_set():
                return self._spill.pop(0)
            return None

    def __enter__(self) -> "MeterLink":
        return self.start()

    def __exit__(self, *exc) -> None:
        self.stop()

    # -- thread --------------------------------------------------------------------------------
    def _resume_thread(self, after: BaseException | None) -> None:
        """(Re)start the link's own thread: at start, or when the mux hands the link back (after: why)."""
        self._thread = threading.Thread(target=self._run, args=(after,), name=f"meterlink-link-{self.port}",
                                        daemon=True)
        self._thread.start()

    def _run(self, after: BaseException | None = None) -> None:
        """Connect, handshake, stream; reconnect with back-off. after: where the mux left off (a LinkError:
        the port lost or silent; _Restart: the device restarted; another exception: a bug)."""
        handed = False
        try:
            while not self._stop.is_set():
                try:
                    if after is None:
                        self._connect()
                    else:
                        exc, after = after, None
                        if isinstance(exc, _Restart):
                            self._handshake()
                        elif not isinstance(exc, _Continue):
                            raise exc
                    if self._hand_over():
                        handed = True
                        return
                    self._stream()
                except LinkError as exc:
                    self._close_link()
                    if self._stop.is_set():
                        break
                    self._attempts += 1
                    if self._attempts == 1:
                        self.stats.port_losses += 1
                        self._event("port_lost", "error", str(exc), port=self.port)
                    if self.max_reconnects is not None and self._attempts > self.max_reconnects:
                        self._event("gave_up", "error", f"no link to {self.port} after {self._attempts - 1} "
                                    f"reconnection attempt(s)", attempts=self._attempts - 1)
                        break
                    self._stop.wait(self._delay)
                    self._delay = min(self._delay * 2, self.backoff_max_s)
        except _Fatal as exc:
            self._event("handshake", "error", str(exc))
        except Exception as exc:  # a bug must not kill acquisition silently
            self._event("internal_error", "error", f"link thread stopped: {type(exc).__name__}: {exc}")
        finally:
            if not handed:
                self._finish()

    def _leave_mux(self, why: str | None) -> None:
        """Read on the link's own thread from now on (the mux failed: why), streaming as it was."""
        self._mux = None
        if why:
            self._event("internal_error", "error", f"port reader stopped: {why}; {self.port} is read on its own "
                        "thread from now on")
        self._resume_thread(_Continue() if self._link is not None and self._link.is_open else None)

    def _connect(self) -> None:
        """Open the port if needed and handshake; a reconnection after failed attempts is an event."""
        if self._link is None or not self._link.is_open:
            link = self._factory()
            link.open()
            self._link, self._reader = link, FrameReader()
        self._handshake()
        if self._attempts:
            self.stats.reconnects += 1
            self._event("reconnected", "info", f"link to {self.port} re-established after "
                        f"{self._attempts} attempt(s)", attempts=self._attempts)
        self._attempts, self._delay = 0, self.backoff_initial_s

    def _hand_over(self) -> bool:
        """Give a streaming port with a descriptor to the mux (True: this thread's part is done)."""
        if self._mux is None or self._stop.is_set() or self._link is None or self._link.fileno() is None:
            return False
        self._mux.add(self)
        return True

    def _stream(self) -> None:
        """Read on this thread until stopped (a port without a descriptor, or no mux)."""
        while not self._stop.is_set():
            try:
                self._pump(self.read_timeout_s)
            except _Restart:
                self._handshake()
            if self.read_pause_s and self._last_read_n < 1024:
                self._stop.wait(self.read_pause_s)
            if time.monotonic() >= self._next_drift:
                self._next_drift = time.monotonic() + self.drift_report_s
                self._report_drift()

    def _finish(self) -> None:
        """The link's end (whichever thread reads it): last drift, back-pressure summary, STOP, close."""
        self._report_drift()
        if self.stats.backpressure_waits:
            self._event("backpressure", "warning", f"the consumer fell behind {self.stats.backpressure_waits} "
                        f"time(s); reading from {self.port} paused for {self.stats.backpressure_s:.1f} s in all "
                        "(frames the device could not hand over meanwhile are in seq_gap events)",
                        waits=self.stats.backpressure_waits, paused_s=round(self.stats.backpressure_s, 3))
        self._say_stop()
        self._close_link()
        self.finished.set()
        if self._wake is not None:
            self._wake.set()

    def _close_link(self) -> None:
        if self._link is not None:
            self._link.close()
        self._link = None

    def _say_stop(self) -> None:
        if self._link is not None and self._link.is_open:
            try:
                self._send(FrameType.STOP, Empty())
            except LinkError:
                pass

    # -- frames in -----------------------------------------------------------------------------
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
        """Handle bytes read at now: frames checked and delivered, junk counted; _Restart on a restart."""
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
            raise _Restart
        return handled

    # -- commands ------------------------------------------------------------------------------
    def _send(self, ftype: int, msg) -> int:
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
        for _ in range(5):
            try:
                self._handshake_once()
                return
            except _Restart:
                continue
        raise LinkError(f"device on {self.port!r} keeps restarting during the handshake")

    def _handshake_once(self) -> None:
        self._last_frame_mono = time.monotonic()
        ident = None
        for _ in range(self.who_retries):
            if self._stop.is_set():
                return
            ident = self._command(FrameType.WHO, Empty(), Ident)
            if isinstance(ident, Ident):
                break
        if not isinstance(ident, Ident):
            raise LinkError(f"no IDENT from the device on {self.port!r} after {self.who_retries} WHO")
        t_utc = time.time()
        if ident.proto_major != PROTOCOL_MAJOR:
            raise _Fatal(f"device speaks protocol {ident.proto_major}.{ident.proto_minor}, this host {PROTOCOL_MAJOR}")
        ident_tick = self._last_tick if self._last_tick is not None else 0
        new_boot = self._boot != ident.boot_count or self.clock.mapping is None
        if new_boot:
            self.clock.sync(ident.boot_count, ident_tick, t_utc)
        self._boot = ident.boot_count
        self.ident = ident
        status = self._command(FrameType.STATUS_QUERY, Empty(), Status)
        if self._stop.is_set():
            return
        interval = min(max(self.interval_ms, ident.min_interval_ms), ident.max_interval_ms)
        if interval != self.interval_ms:
            self._event("interval_clamped", "warning", f"interval {self.interval_ms} ms outside the device's "
                        f"{ident.min_interval_ms}..{ident.max_interval_ms} ms; using {interval} ms",
                        requested_ms=self.interval_ms, used_ms=interval)
        reply = self._command(FrameType.SET_INTERVAL, SetInterval(interval), Ack)
        if not isinstance(reply, Ack):
            self._event("handshake", "warning", f"SET_INTERVAL {interval} ms not accepted", interval_ms=interval)
            interval = status.interval_ms if isinstance(status, Status) else interval
        reply = self._command(FrameType.START, Empty(), Ack)
        if self._stop.is_set():
            return
        if reply is None:
            raise LinkError(f"device on {self.port!r} did not acknowledge START")
        self.stats.handshakes += 1
        assert self.clock.mapping is not None
        self._event("handshake", "info", f"connected to {safe_text(ident.model)} serial {safe_text(ident.serial)} "
                    f"on {self.port} (boot {ident.boot_count}, interval {interval} ms)",
                    boot=ident.boot_count, interval_ms=interval, new_boot=new_boot)
        self._put(Connected(ident, status if isinstance(status, Status) else None, ident.boot_count, interval,
                            self.clock.mapping, self.port))

    # -- out -----------------------------------------------------------------------------------
    def _report_drift(self) -> None:
        ratio = self.clock.rate_ratio()
        if ratio is None:
            return
        self._event("clock_drift", "info", f"device clock runs at {ratio:.6g} x host time "
                    f"({(ratio - 1) * 1e6:+.1f} ppm) over {self.clock.n_pairs} readings",
                    rate_ratio=ratio, drift_ppm=(ratio - 1) * 1e6, n_pairs=self.clock.n_pairs)

    def _event(self, kind: str, severity: str, message: str, **detail) -> None:
        self._put(LinkEvent(kind, severity, message, time.time(), detail))

    def _put(self, item) -> None:
        """Queue an item; a full queue makes the reader wait for the consumer (never a silent drop).

        While it waits the port is not read: the device's frames back up in the serial buffers, and
        any it cannot hand over are lost there and reported as seq_gap events with exact counts.
        Once stopping, an item that meets a full queue is kept aside and given out after it.
        """
        try:
            self.queue.put_nowait(item)
        except queue.Full:
            self.stats.backpressure_waits += 1
            t0 = time.monotonic()
            if self._wake is not None:
                self._wake.set()
            while True:
                if self._stop.is_set():
                    self._spill.append(item)
                    break
                try:
                    self.queue.put(item, timeout=0.1)
                    break
                except queue.Full:
                    continue
            self.stats.backpressure_s += time.monotonic() - t0
            self._last_frame_mono = time.monotonic()  # waiting on the consumer is not the port going silent
        if self._wake is not None:
            self._wake.set()
