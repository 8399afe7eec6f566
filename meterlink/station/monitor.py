"""The monitoring daemon: acquire from every meter of a station, store, derive, alarm, watch health.

One ``MeterLink`` per meter (reconnecting for ever with back-off) feeds a queue; each connects on its
own thread, then one shared reader thread (``PortMux``, meterlink/device/mux.py) reads every streaming port;
one ingest thread (``Monitor.run``) calibrates in batches, updates the derived series and alarm
machines and commits readings, events, derived rows and alarm state in ONE transaction at most
``commit_s`` apart, so after a crash or power loss everything stored is mutually consistent and
the loss is bounded by the last unfinished batch. On start it resumes the station record and
replays recent raw readings to rebuild the in-memory windows. See docs/monitoring.md.
"""

from __future__ import annotations

import threading
import time

from meterlink.device.link import MeterLink
from meterlink.device.mux import PortMux
from meterlink.network import syncd
from meterlink.physics.certificate import load_certificate
from meterlink.station.health import Health
from meterlink.station.hooks import STOP_WAIT_S, HookRunner
from meterlink.station.ingest import Ingest, MeterState, Persist, _iso, band_reference  # noqa: F401 - importable here
from meterlink.station.lock import StationLock
from meterlink.station.meterwriter import MeterWriter
from meterlink.station import period_report
from meterlink.station.notify import Notifier
from meterlink.station.persist import Persistence
from meterlink.station.retention import thin_readings  # noqa: F401 - kept importable from here
from meterlink.station.stationfile import Station
from meterlink.storage.store import Store, event_row

SEVERITY_OF = {"warning": "warning", "error": "error"}


class Monitor(Ingest, Persistence, Health):
    """Run a station until ``stop()``; ``time_scale`` > 1 only for an accelerated simulator.

    The parts: meterlink/station/ingest.py (per-meter pipeline), persist.py (records, replay, commit),
    health.py (certificates, alarm commands, retention); this class opens the station and runs the loop.
    """

    def __init__(self, station: Station, **options):
        """Take the station's lock (meterlink/station/lock.py), then open it (``_open``; options as there).
        A failure while opening gives the lock and the database back at once."""
        self._lock = StationLock(station.database, station.name).acquire()
        try:
            self._open(station, **options)
        except BaseException:
            if getattr(self, "store", None) is not None:
                self.store.close()
            self._lock.release()
            raise

    def _open(self, station: Station, *, time_scale: float = 1.0, log=None, commit_s: float = 0.5,
              backoff_max_s: float = 30.0, link_factory=None, calibrate_s: float = 1.0):
        self.st, self.time_scale, self.commit_s = station, float(time_scale), commit_s
        # Readings are calibrated in batches at most calibrate_s of device time old: a call has a
        # fixed cost (interpolants, budget) that dominates the monitor's CPU at a few readings/s.
        # A large station pays per-meter fixed costs (an insert, a calibration, a series update) less
        # often: each meter's rows are stored once they are store_s old, calibrated once calibrate_s
        # old, and the links gather about read_pause_s of frames per read. Up to 50 meters nothing
        # changes (store_s = commit_s); 500 meters: 5 s, the loss bound of a crash (resume counts it).
        # The derived series and alarms are fed at twice that (10 s at 500 meters): Series.push_many
        # costs about 0.5 ms a call whatever its length, the largest fixed cost per meter; raw rows
        # are stored as before, so a crash loses no more, and a restart replays the windows from them.
        n = len(station.meters)
        spread_s = 0.01 * n if n > 50 else 0.0
        self.store_s = max(commit_s, spread_s)
        self.calibrate_s = max(calibrate_s, 2.0 * spread_s * self.time_scale)
        self.read_pause_s = min(2.5, 0.005 * n) if n > 50 else min(0.05, 0.001 * n)
        self.loop_s = min(0.1, 0.0002 * n)           # the main loop gathers this long after a wake-up
        self._wake = threading.Event()      # set by the links when an item is queued, and by stop()
        self.log = log or (lambda line: None)
        self._stop = threading.Event()
        self._mono0, self._utc0 = time.monotonic(), time.time()
        for m in station.meters:           # an unusable certificate is refused before the database is touched
            load_certificate(m.certificate)
        self.store = Store(station.database)
        self.conn = self.store.db.conn
        self._station_events: list[dict] = []
        self.station_id, prev = self._station_record()
        self.hooks = HookRunner()                        # alarm commands (meterlink/station/hooks.py)
        self.notify = Notifier()                         # systemd READY/WATCHDOG/STOPPING (meterlink/station/notify.py)
        self.meters = [self._meter(m) for m in station.meters]
        self._backoff_max_s, self._link_factory = backoff_max_s, link_factory
        # commit failures (a full disk): batches are kept and retried with back-off (see _commit)
        self._store_fail: dict | None = None     # since_utc, error, attempts, next_mono, delay_s
        self._retention_next = time.monotonic() + 5.0
        self._retention_todo: list = []
        self._day_checked: str | None = None
        self._heartbeat_next = 0.0                       # host time of the next heartbeat write

    # -- helpers -------------------------------------------------------------------------------
    def now_utc(self) -> float:
        """Host UTC, accelerated by time_scale for simulators."""
        if self.time_scale == 1.0:
            return time.time()
        return self._utc0 + (time.monotonic() - self._mono0) * self.time_scale

    def _event_row(self, ms: MeterState | None, kind: str, severity: str, message: str, t: float | None = None,
                   **detail) -> dict:
        t = self.now_utc() if t is None else t
        who = f"[{ms.cfg.name}] " if ms else ""
        self.log(f"{_iso(t)} {severity.upper():7s} {who}{kind}: {message}")
        if ms is not None:
            detail.setdefault("meter", ms.cfg.name)
        return event_row(kind, severity, message, t, station=self.st.name, **detail)

    def _event(self, ms: MeterState | None, kind: str, severity: str, message: str, t: float | None = None,
               **detail) -> None:
        row = self._event_row(ms, kind, severity, message, t, **detail)
        if ms is not None and ms.writer is not None:
            ms.writer._add("events", row)
        else:
            self._station_events.append((ms.session_id if ms else None, row))

    def stop(self) -> None:
        """Ask run() to finish (safe from a signal handler)."""
        self._stop.set()
        self._wake.set()

    # -- main loop -----------------------------------------------------------------------------
    def run(self) -> None:
        """Acquire until stop(); commits at most commit_s apart; always leaves a consistent database."""
        self._mux = PortMux().start()
        for ms in self.meters:
            # while the file cannot be written, up to max_keep readings per meter wait in memory (about
            # 0.1 GB; 2.3 days at one reading a second); beyond, the oldest go, each drop an event
            ms.writer = MeterWriter(self.store, ms.session_id, max_rows=10**9, max_age_s=self.store_s,
                                    max_keep=200_000)
            factory = None if self._link_factory is None else (lambda p=ms.cfg.port: self._link_factory(p))
            ms.link = MeterLink(ms.cfg.port, int(round(ms.cfg.interval_s * 1000)), link_factory=factory,
                                backoff_max_s=self._backoff_max_s, wake=self._wake, batched=True,
                                read_pause_s=self.read_pause_s, mux=self._mux)
            ms.link.start(require_open=False)
        next_commit = time.monotonic() + self.commit_s
        self.notify.ready(f"monitoring {self.st.name}: {len(self.meters)} meter(s)")
        self._sync = syncd.start_for(self.st, self.log)     # [central]: sync in the background (docs/network.md)
        try:
            more = False
            while not self._stop.is_set():
                # Sleep until a link queues something or the next commit is due (no polling).
                if not more:
                    self._wake.wait(max(0.0, next_commit - time.monotonic()))
                    if self.loop_s:
                        self._stop.wait(self.loop_s)
                self.notify.watchdog()      # only this loop pings: if it hangs, systemd restarts the unit
                self._wake.clear()          # before draining: an item queued after this wakes us again
                more = False
                for ms in self.meters:
                    if ms.link.queue.empty() and not ms.link.finished.is_set():
                        continue
                    for _ in range(2000):
                        item = ms.link.get(0.0)
                        if item is None:
                            break
                        self._guard(self._handle, ms, item)
                    else:
                        more = True         # fair share taken; come back without waiting
                if time.monotonic() >= next_commit:
                    self._guard(self._tick)
                    next_commit = time.monotonic() + self.commit_s
        finally:
            self.notify.stopping(f"stopping {self.st.name}")
            for ms in self.meters:
                ms.link.request_stop()       # all at once: each then only waits for its own end
            for ms in self.meters:
                ms.link.stop()
            self._mux.stop()
            for ms in self.meters:
                while (item := ms.link.get(0.0)) is not None:
                    self._handle(ms, item)
            self._tick(closing=True)
            self._hook_outcomes(self.hooks.shutdown(STOP_WAIT_S))
            self._event(None, "monitor_stopped", "info", f"monitor of {self.st.name} stopped cleanly")
            self._final_commit()
            syncd.stop(self._sync)
            self.store.close()
            self._lock.release()
            self.notify.close()

    def _guard(self, fn, *args) -> None:
        """Run one step; a bug becomes an event and acquisition goes on."""
        try:
            fn(*args)
        except Exception as exc:  # noqa: BLE001 - the daemon must keep recording
            if self.conn.in_transaction:
                self.conn.rollback()
            self._event(None, "internal_error", "error", f"{type(exc).__name__}: {exc}")

    def _tick(self, closing: bool = False) -> None:
        now_data = self.now_utc()
        now_mono = time.monotonic()
        limits = []
        due = []
        for ms in self.meters:
            limit = max(self.st.health.max_gap_s, 3 * ms.cfg.interval_s) * 2
            # with an accelerated simulator, a host that is merely a little behind is not a silent meter
            limit = max(limit, 2.0 * self.time_scale) if self.time_scale != 1.0 else limit
            limits.append(limit)
            if closing or (ms.pending and ((now_mono - ms.pending_mono) * self.time_scale >= self.calibrate_s
                                           or ms.n_pending >= 4096
                                           or (ms.last_t is not None and now_data - ms.last_t > limit))):
                due.append(ms)
        # the meters due are calibrated together (one call per certificate, frequency and temperature)
        self._calibrate_pending_many(due)
        for ms, limit in zip(self.meters, limits):
            if not closing:
                silent = ms.last_t is not None and now_data - ms.last_t > limit
                if silent:
                    for band, series in ms.series.items():
                        blocks = series.close_gap(ms.last_t + series.hold_s + 1e-6)
                        if blocks:
                            ms.blocks_out.append((band, blocks))
        self._certificates()
        self._commit(force=closing)
        self._hook_outcomes(self.hooks.outcomes())
        if not closing and self._store_fail is None:
            self._retention()
            period_report.housekeeping(self.st, self.now_utc(), lambda *e: self._event(None, *e))

