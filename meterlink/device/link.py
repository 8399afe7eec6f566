"""The meter link: one reader thread that connects, streams and reconnects with back-off.

``MeterLink`` owns a transport and a background thread that deframes, parses and checks every
frame, then hands typed items (meterlink.device.items: Connected, Reading, ReadingBatch, SpectrumReading,
StatusReport, LinkEvent) to consumers through a queue. A frame with a bad CRC or a malformed payload is never delivered as
a reading; it becomes a LinkEvent. Device strings are untrusted data.

It is read in three parts, one file each:

- this file: the settings and state, the public calls (start, stop, get), the thread that connects,
  streams and reconnects (or hands a streaming port to the shared reader, meterlink/device/mux.py),
  and the way out (events, the bounded queue with back-pressure);
- meterlink/device/handshake.py (CommandExchange): commands and their replies, the handshake, STOP;
- meterlink/device/intake.py (FrameIntake): frames in: reading the port, sequence and restart checks,
  faults, delivery of data.
"""

from __future__ import annotations

import queue
import threading
import time
from typing import TYPE_CHECKING, Callable

from meterlink.device.clock import DeviceClock
from meterlink.device.handshake import CommandExchange, WrongProtocol
from meterlink.device.intake import RESTART_SEQ_MAX, DeviceRestarted, FrameIntake  # noqa: F401 (re-exported)
from meterlink.device.items import (  # noqa: F401 (re-exported: what the link delivers)
    Connected, LinkEvent, LinkStats, Reading, ReadingBatch, SpectrumReading, StatusReport,
)
from meterlink.device.protocol import FrameReader, Ident
from meterlink.device.transport import Link, SerialLink
from meterlink.errors import LinkError
from meterlink.safetext import clean_text

if TYPE_CHECKING:
    from meterlink.device.mux import PortMux


def safe_text(s: str) -> str:
    """A device string made safe to print (control and bidi characters escaped): meterlink.safetext."""
    return clean_text(s)


class _Continue(Exception):
    """Internal: the link's own thread takes over reading from the mux, streaming as it was."""


class MeterLink(CommandExchange, FrameIntake):
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
        the port lost or silent; DeviceRestarted: the device restarted; another exception: a bug)."""
        handed = False
        try:
            while not self._stop.is_set():
                try:
                    if after is None:
                        self._connect()
                    else:
                        exc, after = after, None
                        if isinstance(exc, DeviceRestarted):
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
        except WrongProtocol as exc:
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
            except DeviceRestarted:
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
