"""One reader thread for many meter links: their ports waited on together (epoll, or poll).

A MeterLink given a ``PortMux`` connects and handshakes on its own thread as always; once it
streams on a port with a descriptor (a local serial port, socket://), it hands the port to the mux
and that thread ends. The mux then reads every such port as it becomes readable and runs the
link's own frame handling (``_pump_data``, meterlink/device/intake.py), so what is delivered, and
every event, is the link's. Anything that needs the link's thread (the port lost or silent, a device restart)
hands the link back: a new thread carries on exactly where the old loop would have (reconnect
with back-off, handshake again). The link's ``read_pause_s`` (let frames gather between reads),
drift reports, silence watchdog and back-pressure (its queue full: the port is left unread, the
frames wait in the kernel's buffer) are kept per link here.

Why: one thread per port at hundreds of ports spends more CPU switching and contending for the
interpreter lock than reading (bench/bench_many_meters.py).
"""

from __future__ import annotations

import heapq
import itertools
import math
import os
import select
import threading
import time


PAUSE_GRID_S = 0.05     # read pauses end on multiples of this (monotonic seconds)


class PortMux:
    """A thread that reads the ports of many MeterLinks; start() it, add() links, stop() at the end."""

    def __init__(self, sweep_s: float = 0.25, name: str = "meterlink-mux"):
        self.sweep_s = float(sweep_s)      # silence, drift and stop checks this often (as a link's read timeout)
        self.name = name
        self._sel = _Poller()
        self._wake_r, self._wake_w = os.pipe()
        os.set_blocking(self._wake_r, False)
        os.set_blocking(self._wake_w, False)
        self._sel.register(self._wake_r, None)
        self._lock = threading.Lock()
        self._closed = False
        self._incoming: list = []          # links handed over, not yet taken in by the mux thread
        self._links: dict[int, object] = {}    # id(link) -> link, every link the mux holds
        self._paused: list = []            # heap of (due monotonic, n, link, gen): not read until then
        self._n = itertools.count()
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None

    # -- public --------------------------------------------------------------------------------
    def start(self) -> "PortMux":
        self._thread = threading.Thread(target=self._run, name=self.name, daemon=True)
        self._thread.start()
        return self

    def add(self, link) -> None:
        """Take over reading a streaming link (called from the link's own thread, which then ends)."""
        with self._lock:
            closed = self._closed
            if not closed:
                self._incoming.append(link)
        if closed:                       # the mux has ended: the link reads on its own thread
            link._leave_mux(None)
            return
        self.wake()

    def wake(self) -> None:
        with self._lock:
            if self._closed:
                return
            try:
                os.write(self._wake_w, b"x")
            except BlockingIOError:      # the pipe is full: the mux is being woken anyway
                pass

    def stop(self, timeout_s: float = 10.0) -> None:
        """Finish every link still held (as each link's stop would) and end the thread."""
        self._stop.set()
        self.wake()
        if self._thread is not None:
            self._thread.join(timeout_s)

    @property
    def n_links(self) -> int:
        return len(self._links)

    # -- thread --------------------------------------------------------------------------------
    def _run(self) -> None:
        try:
            self._loop()
        except Exception as exc:  # noqa: BLE001 - a bug here must not leave the ports unread: back to threads
            for link in list(self._links.values()):
                self._drop(link, time.monotonic())
                link._leave_mux(f"{type(exc).__name__}: {exc}")
            with self._lock:
                late, self._incoming = self._incoming, []
            for link in late:
                link._leave_mux(f"{type(exc).__name__}: {exc}")
        finally:
            with self._lock:
                self._closed = True
                self._sel.close()
                os.close(self._wake_r)
                os.close(self._wake_w)

    def _loop(self) -> None:
        next_sweep = time.monotonic() + self.sweep_s
        while True:
            self._take_incoming()
            now = time.monotonic()
            due = min(next_sweep, self._paused[0][0]) if self._paused else next_sweep
            events = self._sel.select(max(0.0, due - now))
            now = time.monotonic()
            for link in events:
                if link is None:
                    self._drain_wake()
                elif id(link) in self._links:
                    self._read(link, now)
            while self._paused and self._paused[0][0] <= now:
                _, _, link, gen = heapq.heappop(self._paused)
                if id(link) in self._links and link._mux_gen == gen:   # not one handed back since
                    self._resume(link, now)
            if now >= next_sweep or self._stop.is_set():
                next_sweep = now + self.sweep_s
                self._sweep(now)
            if self._stop.is_set():
                for link in list(self._links.values()):
                    self._finish(link, now)
                with self._lock:
                    late, self._incoming = self._incoming, []
                for link in late:
                    link._finish()
                return

    def _drain_wake(self) -> None:
        try:
            while os.read(self._wake_r, 4096):
                pass
        except BlockingIOError:
            pass

    def _take_incoming(self) -> None:
        with self._lock:
            new, self._incoming = self._incoming, []
        now = time.monotonic()
        for link in new:
            fd = link._link.fileno() if link._link is not None else None
            if fd is None:               # closed between the hand-over and now: its own thread carries on
                link._leave_mux(None)
                continue
            link._mux_fd = fd
            link._mux_paused_since = None
            link._mux_gen += 1
            self._links[id(link)] = link
            self._sel.register(fd, link)
            if link._stop.is_set():
                self._finish(link, now)

    def _read(self, link, now: float) -> None:
        """A readable port: read it once and hand the bytes to the link; pause it if asked."""
        if link._stop.is_set():
            self._finish(link, now)
            return
        if self._full(link):
            # the consumer is behind: leave the port unread (frames wait in the kernel's buffer)
            link.stats.backpressure_waits += 1
            link._mux_paused_since = now
            self._pause(link, now + 0.1)
            return
        try:
            data = link._link.read_ready(16384 if link.batched else 4096)
            link._last_read_n = len(data)
            link._pump_data(data, now)
        except Exception as exc:  # noqa: BLE001 - handed to the link's thread: reconnect, handshake, or its end
            self._hand_back(link, exc, now)
            return
        if link.read_pause_s and len(data) < 1024:
            self._pause(link, now + link.read_pause_s)

    @staticmethod
    def _full(link) -> bool:
        q = link.queue
        return bool(q.maxsize) and q.qsize() > q.maxsize - link.mux_headroom

    def _pause(self, link, due: float) -> None:
        # due rounded up to the next PAUSE_GRID_S: the ports paused about the same time come out of
        # their pause together, and are read in one pass of the loop (one wake-up, not one each)
        due = math.ceil(due / PAUSE_GRID_S) * PAUSE_GRID_S
        self._sel.unregister(link._mux_fd)
        heapq.heappush(self._paused, (due, next(self._n), link, link._mux_gen))

    def _resume(self, link, now: float) -> None:
        if link._mux_paused_since is not None:
            if self._full(link):
                heapq.heappush(self._paused, (now + 0.1, next(self._n), link, link._mux_gen))
                return
            link.stats.backpressure_s += now - link._mux_paused_since
            link._mux_paused_since = None
            link._last_frame_mono = now     # waiting on the consumer is not the port going silent
        self._sel.register(link._mux_fd, link)

    def _sweep(self, now: float) -> None:
        """Per link: stop asked, the port silent too long, a drift report due."""
        for link in list(self._links.values()):
            if link._stop.is_set():
                self._finish(link, now)
                continue
            if link._mux_paused_since is not None:
                continue
            if now - link._last_frame_mono > link.min_silence_s:
                # silent only after a read that brings nothing, as on the link's own thread: a port
                # resting (read pause) or not yet served by this thread may have frames waiting
                try:
                    data = link._link.read_ready(16384 if link.batched else 4096)
                    link._last_read_n = len(data)
                    if data:
                        link._pump_data(data, now)
                    else:
                        link._check_silence(now)
                except Exception as exc:  # noqa: BLE001 - lost, silent or restarted: the link's thread goes on
                    self._hand_back(link, exc, now)
                    continue
                if id(link) not in self._links:
                    continue
            if now >= link._next_drift:
                link._next_drift = now + link.drift_report_s
                link._report_drift()

    def _drop(self, link, now: float) -> None:
        self._links.pop(id(link), None)
        link._mux_gen += 1                 # a heap entry left for it is skipped
        if link._mux_paused_since is not None:
            link.stats.backpressure_s += now - link._mux_paused_since
            link._mux_paused_since = None
        self._sel.unregister(link._mux_fd)   # paused: not registered just now, nothing to do

    def _hand_back(self, link, exc: BaseException, now: float) -> None:
        self._drop(link, now)
        link._resume_thread(exc)

    def _finish(self, link, now: float | None = None) -> None:
        self._drop(link, time.monotonic() if now is None else now)
        link._finish()


class _Poller:
    """Wait for input on many descriptors: epoll where there is one (Linux), else poll(); the plain
    calls, without the selectors module's bookkeeping (a paused port is taken out and put back
    several hundred times a second at 500 meters)."""

    def __init__(self):
        self._ep = getattr(select, "epoll", None)
        self._p = self._ep() if self._ep is not None else select.poll()
        self._mask = select.EPOLLIN if self._ep is not None else select.POLLIN
        self._data: dict[int, object] = {}

    def register(self, fd: int, data) -> None:
        self._p.register(fd, self._mask)
        self._data[fd] = data

    def unregister(self, fd: int) -> None:
        if self._data.pop(fd, _NONE) is not _NONE:
            try:
                self._p.unregister(fd)
            except OSError:     # closed already (a port lost): epoll has forgotten it by itself
                pass

    def select(self, timeout_s: float) -> list:
        """The data of every descriptor ready to read (or hung up) within timeout_s."""
        if self._ep is not None:
            ready = self._p.poll(timeout_s, max(1, len(self._data)))
        else:
            ready = self._p.poll(int(timeout_s * 1000) + (timeout_s > 0))
        get = self._data.get
        return [get(fd) for fd, _ in ready if fd in self._data]

    def close(self) -> None:
        if self._ep is not None:
            self._p.close()


_NONE = object()
