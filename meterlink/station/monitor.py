"""The monitoring daemon: acquire from every meter of a station, store, derive, alarm, watch health.

One ``MeterLink`` reader thread per meter (reconnecting for ever with back-off) feeds a queue;
one ingest thread (``Monitor.run``) calibrates in batches, updates the derived series and alarm
machines and commits readings, events, derived rows and alarm state in ONE transaction at most
``commit_s`` apart, so after a crash or power loss everything stored is mutually consistent and
the loss is bounded by the last unfinished batch. On start it resumes the station record and
replays recent raw readings to rebuild the in-memory windows. See docs/monitoring.md.
"""

from __future__ import annotations

import datetime as _dt
import json
import math
import os
import sqlite3
import threading
import time
from dataclasses import dataclass, field

import numpy as np

from meterlink.physics import calibrate

from meterlink.station import derived, period_report, retention
from meterlink.station.alarms import AlarmEvent, AlarmMachine, command_call, percent_rules_instantaneous, rule_value
from meterlink.physics.certificate import KIND_DIPOLE, certificate_status, load_certificate
from meterlink.station.hooks import STOP_WAIT_S, HookRunner
from meterlink.device.link import Connected, LinkEvent, MeterLink, Reading, SpectrumReading, StatusReport
from meterlink.physics.limits import most_restrictive_level
from meterlink.station.lock import StationLock
from meterlink.station.notify import Notifier
from meterlink.station.retention import thin_readings  # noqa: F401 - kept importable from here
from meterlink.station.spectral import RATIO_BAND, SweepAssembler, SweepValue
from meterlink.station.stationfile import MeterConfig, Station
from meterlink.storage.store import BatchWriter, Store, StorageError, epoch_row, event_row
from meterlink.physics.units import Z0_OHM

SEVERITY_OF = {"warning": "warning", "error": "error"}


def band_reference(standard: str, tier: str, freq) -> tuple[float, float]:
    """(E_ref, S_ref) at a frequency, or the most stringent over a band (lowest level inside it)."""
    lo, hi = freq if isinstance(freq, tuple) else (float(freq), float(freq))
    return (most_restrictive_level(standard, tier, lo, hi, quantity="e").e_v_per_m,
            most_restrictive_level(standard, tier, lo, hi, quantity="s").s_w_per_m2)


@dataclass
class Persist:
    """A condition that becomes an event once it has held for hold_s (data time), and again on ending."""

    kind: str
    hold_s: float
    since: float | None = None
    active: bool = False

    def update(self, t: float, cond: bool) -> str | None:
        if cond:
            if self.since is None:
                self.since = t
            if not self.active and t - self.since >= self.hold_s:
                self.active = True
                return "start"
        else:
            self.since = None
            if self.active:
                self.active = False
                return "end"
        return None


@dataclass
class MeterState:
    """Everything the monitor keeps for one meter."""

    cfg: MeterConfig
    cert: object
    freq: object
    e_ref: float
    s_ref: float
    session_id: int
    e_top: float = math.nan                          # top of the calibrated range, V/m
    link: MeterLink | None = None
    sweeps: SweepAssembler | None = None             # a dipole meter: orientation spectra -> band values
    writer: BatchWriter | None = None
    series: dict = field(default_factory=dict)       # band -> derived.Series
    alarms: list = field(default_factory=list)
    pending: list = field(default_factory=list)      # Reading items not yet calibrated
    pending_mono: float = 0.0                        # host monotonic time of the oldest pending reading
    blocks_out: list = field(default_factory=list)   # (band, final blocks) not yet committed
    session_update: dict = field(default_factory=dict)
    last_t: float | None = None
    last_counts: tuple | None = None
    boot_map: dict = field(default_factory=dict)     # device clock -> (tick0_ms, utc0) when time_scale != 1
    clock_key: tuple | None = None                   # the device clock now: (boot, tick0_ms, utc0_s) of its mapping
    epoch: int = 0                                   # the current connection's epoch (storage.epoch_row)
    resume_check: bool = True                        # first reading of this run: compare with the last stored
    checks: dict = field(default_factory=dict)
    status: dict = field(default_factory=dict)
    link_state: str = "connecting"
    last_e: float | None = None
    last_u_db: float | None = None
    drift_ppm: float | None = None
    drift_flagged: bool = False
    battery_flagged: bool = False
    temp_flagged: bool = False


class Monitor:
    """Run a station until ``stop()``; ``time_scale`` > 1 only for an accelerated simulator."""

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
        self.calibrate_s = calibrate_s
        self._wake = threading.Event()      # set by the links when an item is queued, and by stop()
        self.log = log or (lambda line: None)
        self._stop = threading.Event()
        self._mono0, self._utc0 = time.monotonic(), time.time()
        for m in station.meters:           # an unusable certificate is refused before the database is touched
            load_certificate(m.certificate)
        self.store = Store(station.database)
        self.conn = self.store.db.conn
        with self.store.write():
            derived.ensure_schema(self.conn)
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

    # -- setup ---------------------------------------------------------------------------------
    def _station_record(self):
        st = self.st
        row = self.conn.execute("SELECT * FROM mon_station WHERE name=?", (st.name,)).fetchone()
        prev = None
        text = st.path.read_text(encoding="utf-8") if st.path.exists() else ""
        with self.store.write():
            self.conn.execute("CREATE TABLE IF NOT EXISTS mon_storage (station_id INTEGER PRIMARY KEY, "
                              "storing INTEGER, "
                              "since_utc REAL, error TEXT, pending_readings INTEGER, checked_utc REAL)")
            if row is None:
                self.conn.execute("INSERT INTO mon_station (name, created_utc, runs) VALUES (?,?,0)",
                                  (st.name, time.time()))
            else:
                cols = [c[0] for c in self.conn.execute("SELECT * FROM mon_station LIMIT 0").description]
                prev = dict(zip(cols, row))
            self.conn.execute(
                "UPDATE mon_station SET config_path=?, config_text=?, standard=?, tier=?, convention=?, block_s=?, "
                "windows_s=?, latitude_deg=?, longitude_deg=?, elevation_m=?, timezone=?, started_utc=?, "
                "heartbeat_utc=?, pid=?, state='running', runs=runs+1 WHERE name=?",
                (str(st.path), text, st.standard, st.tier, st.convention, st.block_s, json.dumps(st.windows_s),
                 st.latitude_deg, st.longitude_deg, st.elevation_m, st.timezone, time.time(), time.time(),
                 os.getpid(), st.name))
            sid = self.conn.execute("SELECT id FROM mon_station WHERE name=?", (st.name,)).fetchone()[0]
            self.conn.execute("INSERT OR REPLACE INTO mon_storage VALUES (?, 1, NULL, NULL, 0, ?)", (sid, time.time()))
            # stored in the same transaction that marks this run as running: a kill at any later moment,
            # even before the first commit, can no longer lose them
            rows = []
            if prev and prev["state"] == "running":
                hb = prev["heartbeat_utc"]
                rows.append(self._event_row(None, "unclean_shutdown", "warning", f"previous run (pid {prev['pid']}) "
                                            f"ended without a clean stop; last heartbeat {_iso(hb)}", t=hb,
                                            last_heartbeat_utc=hb))
            rows.append(self._event_row(None, "monitor_started", "info", f"monitor of {st.name} started (run "
                                        f"{prev['runs'] + 1 if prev else 1})", pid=os.getpid()))
            Store._insert_events(self.conn, None, rows)
        return sid, prev

    def _meter(self, m: MeterConfig) -> MeterState:
        st = self.st
        cert = load_certificate(m.certificate)
        freq = st.meter_freq(m)
        e_ref, s_ref = band_reference(st.standard, st.tier, freq)
        row = self.conn.execute("SELECT session_id FROM mon_meter WHERE station_id=? AND meter=?",
                                (self.station_id, m.name)).fetchone()
        lo, hi = (freq if isinstance(freq, tuple) else (None, None))
        if row is None or row[0] is None:
            sid = self.store.begin_session("monitor", m.port, interval_ms=int(round(m.interval_s * 1000)),
                                           freq_hz=None if isinstance(freq, tuple) else freq, band_lo_hz=lo,
                                           band_hi_hz=hi, notes=f"station {st.name}, meter {m.name}")
        else:
            sid = int(row[0])
        with self.store.write():
            self.conn.execute("INSERT OR IGNORE INTO mon_meter (station_id, meter) VALUES (?,?)",
                              (self.station_id, m.name))
            self.conn.execute("UPDATE mon_meter SET session_id=?, port=?, certificate=?, freq_hz=?, band_lo_hz=?, "
                              "band_hi_hz=?, e_ref_v_per_m=?, s_ref_w_per_m2=?, cert_due=?, link_state=? "
                              "WHERE station_id=? AND meter=?",
                              (sid, m.port, m.certificate, None if isinstance(freq, tuple) else freq, lo, hi, e_ref,
                               s_ref, cert.due_date.isoformat(), "connecting", self.station_id, m.name))
        dipole = cert.kind == KIND_DIPOLE
        top = math.nan if dipole else cert.level_range[1] * (Z0_OHM if cert.quantity == "H" else 1.0)
        ms = MeterState(m, cert, freq, e_ref, s_ref, sid, top)
        # a dipole meter reports one orientation per interval: a value per sweep of three
        hold = 3.0 * m.interval_s * (3 if dipole else 1)
        names = ("total", *(b[0] for b in m.bands), *((RATIO_BAND,) if dipole else ()))
        for band in names:
            ms.series[band] = derived.Series(hold, st.block_s, st.windows_s, st.min_coverage)
        if dipole:
            ms.sweeps = SweepAssembler(cert, m.bands, st.standard, st.tier)
        inst = percent_rules_instantaneous(st.standard, st.tier, freq)
        for rule in st.alarms:
            if not rule.meters or m.name in rule.meters:
                ms.alarms.append(AlarmMachine(rule, m.name, instantaneous=inst))
        h = st.health
        ms.checks = {"noise_floor": Persist("stuck_noise_floor", h.stuck_s),
                     "overrange": Persist("stuck_overrange", h.stuck_s),
                     "frozen": Persist("stuck_frozen", h.stuck_s)}
        self._replay(ms)
        return ms

    def _replay(self, ms: MeterState) -> None:
        """Rebuild windows, blocks in progress and alarm state from stored readings."""
        last_end = derived.last_final_block_end(self.conn, self.station_id, ms.cfg.name)
        t0 = None if last_end is None else last_end - max(self.st.windows_s) - 3.0 * ms.cfg.interval_s
        arr = self.store.readings(ms.session_id, t0=t0)
        saved = {(r[0]): r[1:] for r in self.conn.execute(
            "SELECT rule, state, t_on_utc, peak_t_utc, peak_value, last_t_utc FROM mon_alarm "
            "WHERE station_id=? AND meter=? AND band='total'", (self.station_id, ms.cfg.name))}
        for am in ms.alarms:
            if am.rule.name in saved:
                am.restore(*saved[am.rule.name])
        if ms.sweeps is not None:
            self._replay_spectra(ms, t0)
        elif len(arr):
            res = calibrate.calibrate_axes(ms.cert, arr.raw, ms.freq)
            self._feed(ms, arr.t_utc, res.e_v_per_m, res.flags, arr.raw, replay=True)
            ms.last_t = float(arr.t_utc[-1])
        if last_end is not None:   # blocks already stored stay as they are (the replay's first one is partial)
            ms.blocks_out = [(band, kept) for band, bl in ms.blocks_out
                             if (kept := [b for b in bl if b.t_start + b.block_s > last_end + 1e-6])]
        table = "spectra" if ms.sweeps is not None else "readings"
        last = self.conn.execute(f"SELECT max(t_utc) FROM {table} WHERE session_id=?", (ms.session_id,)).fetchone()[0]
        if last is not None:
            ms.last_t = float(last)

    def _replay_spectra(self, ms: MeterState, t0: float | None) -> None:
        rows = self.conn.execute(
            "SELECT s.id, s.boot, s.sweep, s.orientation, s.t_utc, l.freq_hz, l.level_dbuv FROM spectra s "
            "JOIN spectrum_lines l ON l.spectrum_id = s.id WHERE s.session_id=? AND s.t_utc >= ? "
            "ORDER BY s.t_utc, s.id, l.id", (ms.session_id, -math.inf if t0 is None else t0)).fetchall()
        i = 0
        while i < len(rows):
            j = i
            while j < len(rows) and rows[j][0] == rows[i][0]:
                j += 1
            _, boot, sweep, o, t, *_ = rows[i]
            v = ms.sweeps.add(boot, sweep, o, t, [r[5] for r in rows[i:j]], [r[6] for r in rows[i:j]])
            if v is not None:
                self._feed_sweep(ms, v, replay=True)
            i = j

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

    # -- ingest --------------------------------------------------------------------------------
    def _t_of(self, ms: MeterState, item) -> float:
        if self.time_scale == 1.0:
            return item.t_utc
        m = ms.boot_map.get(ms.clock_key)
        if m is None:
            m = ms.boot_map[ms.clock_key] = (item.tick_ms, self.now_utc())
        return m[1] + (item.tick_ms - m[0]) / 1000.0

    def _resume_gap(self, ms: MeterState, item: Reading) -> None:
        """First reading of this run: frames the device sent while no monitor read it (a kill, a power
        cut) are counted exactly from the sequence numbers, and stored as a seq_gap event."""
        ms.resume_check = False
        row = self.conn.execute("SELECT seq_hi FROM reading_spans WHERE session_id=? AND boot=? "
                                "ORDER BY id DESC LIMIT 1",
                                (ms.session_id, item.boot)).fetchone()
        if row is None:
            return
        last = int(row[0])
        lost = item.seq - last - 1
        if 0 < lost < 1 << 31:  # the same boot carried on: the frames in between never reached the store
            self._event(ms, "seq_gap", "warning", f"{lost} frame(s) lost between seq {last} and {item.seq} while "
                        "no monitor was reading this meter", lost=lost, prev_seq=last, seq=item.seq, boot=item.boot,
                        while_down=True)

    def _handle(self, ms: MeterState, item) -> None:
        if isinstance(item, Reading):
            if ms.resume_check:
                self._resume_gap(ms, item)
            t = self._t_of(ms, item)
            a = item.axes
            ms.writer._add("readings", {"boot": item.boot, "seq": item.seq, "tick_ms": item.tick_ms, "t_utc": t,
                                        "raw_x": a.x, "raw_y": a.y, "raw_z": a.z, "flags": a.flags,
                                        "range_index": a.range_index, "epoch": ms.epoch})
            if not ms.pending:
                ms.pending_mono = time.monotonic()
            ms.pending.append((t, a.x, a.y, a.z))
        elif isinstance(item, StatusReport):
            self._calibrate_pending(ms)     # readings before it keep the temperature they were taken at
            self._status(ms, item)
        elif isinstance(item, Connected):
            ms.link_state = "streaming"
            ident = item.ident
            try:
                dev = self.store.device_id(ident.model, ident.serial, ident.probe_serial, ident.cert_ref,
                                           int(ident.sensor_kind),
                                           f"{ident.fw_major}.{ident.fw_minor}.{ident.fw_patch}",
                                           f"{ident.proto_major}.{ident.proto_minor}")
            except (sqlite3.DatabaseError, StorageError):
                dev = None  # not storing just now (a full disk): the epoch still keeps the readings apart
            # every handshake opens an epoch: a meter back with a boot count it used before (a reflash,
            # a replacement unit) is never taken for readings already stored
            row = epoch_row(ms.session_id, item.boot, "handshake", dev)
            ms.epoch = row["id"]
            ms.writer.add_epoch(row)
            # the link keeps its clock mapping across a reconnect to the same boot and makes a new one after
            # a restart (even one reusing the boot count): the accelerated time follows the same rule
            ms.clock_key = (item.boot, item.mapping.tick0_ms, item.mapping.utc0_s)
            if self.time_scale != 1.0 and ms.clock_key not in ms.boot_map:
                ms.boot_map[ms.clock_key] = (item.mapping.tick0_ms, self.now_utc())
            ms.session_update = {**({"device_id": dev} if dev is not None else {}), "interval_ms": item.interval_ms, "clock_boot": item.boot,
                                 "clock_tick0_ms": item.mapping.tick0_ms, "clock_utc0_s": item.mapping.utc0_s}
        elif isinstance(item, SpectrumReading):
            sp = item.spectrum
            t = self._t_of(ms, item)
            lines = [(f * 1000.0, lv / 100.0) for f, lv in sp.pairs]
            ms.writer._add("spectra", {"boot": item.boot, "seq": item.seq, "tick_ms": item.tick_ms, "epoch": ms.epoch,
                                       "t_utc": t, "orientation": sp.orientation, "sweep": sp.sweep, "lines": lines})
            if ms.sweeps is not None:
                v = ms.sweeps.add(item.boot, sp.sweep, sp.orientation, t, [x[0] for x in lines],
                                  [x[1] for x in lines])
                if v is not None:
                    self._feed_sweep(ms, v)
        elif isinstance(item, LinkEvent):
            self._link_event(ms, item)

    def _link_event(self, ms: MeterState, ev: LinkEvent) -> None:
        if ev.kind == "clock_drift":
            ratio = ev.detail.get("rate_ratio")
            if ratio:
                ms.drift_ppm = (ratio / self.time_scale - 1.0) * 1e6
                high = abs(ms.drift_ppm) > self.st.health.drift_max_ppm
                if high != ms.drift_flagged:
                    ms.drift_flagged = high
                    self._event(ms, "clock_drift_high" if high else "clock_drift_ok", "warning" if high else "info",
                                f"device clock {ms.drift_ppm:+.1f} ppm against the host (limit "
                                f"{self.st.health.drift_max_ppm:g} ppm)", drift_ppm=ms.drift_ppm)
            return
        if ev.kind in ("port_lost", "port_silent", "gave_up"):
            ms.link_state = "disconnected"
        elif ev.kind in ("handshake", "reconnected") and ev.severity == "info":
            ms.link_state = "streaming"
        self._event(ms, ev.kind, ev.severity, ev.message, **ev.detail)

    def _status(self, ms: MeterState, item: StatusReport) -> None:
        s = item.status
        t = self._t_of(ms, item)
        temp = s.temp_centi_c / 100.0
        ms.writer._add("statuses", {"boot": item.boot, "seq": item.seq, "tick_ms": item.tick_ms, "t_utc": t,
                                    "battery_mv": s.battery_mv, "battery_pct": s.battery_pct,
                                    "temperature_degc": temp, "flags": s.flags, "interval_ms": s.interval_ms})
        ms.status = {"battery_pct": None if s.battery_pct == 255 else s.battery_pct, "temperature_degc": temp,
                     "battery_mv": s.battery_mv, "flags": s.flags}
        h = self.st.health
        low = s.battery_pct != 255 and s.battery_pct < h.battery_low_pct
        if low != ms.battery_flagged:
            ms.battery_flagged = low
            self._event(ms, "battery_low" if low else "battery_ok", "warning" if low else "info",
                        f"battery {s.battery_pct} % ({s.battery_mv} mV)", t=t, battery_pct=s.battery_pct)
        bad = not (h.temp_min_c <= temp <= h.temp_max_c)
        if bad != ms.temp_flagged:
            ms.temp_flagged = bad
            self._event(ms, "temperature_out_of_range" if bad else "temperature_ok", "warning" if bad else "info",
                        f"device temperature {temp:.1f} degC (allowed {h.temp_min_c:g}..{h.temp_max_c:g})",
                        t=t, temperature_degc=temp)

    def _calibrate_pending(self, ms: MeterState) -> None:
        if not ms.pending:
            return
        arr = np.array(ms.pending, dtype=float)
        ms.pending = []
        temp = ms.status.get("temperature_degc")
        res = calibrate.calibrate_axes(ms.cert, arr[:, 1:4].astype(np.int64), ms.freq, temp_c=temp)
        ms.last_u_db = float(res.u_expanded_db[-1])
        self._feed(ms, arr[:, 0], res.e_v_per_m, res.flags, arr[:, 1:4])

    def _feed(self, ms: MeterState, t, e, flags, raw, replay: bool = False) -> None:
        """Push calibrated samples through the health checks, series and alarm machines."""
        gap_s = self.st.health.max_gap_s
        for i in range(len(t)):
            ti, ei, fi = float(t[i]), float(e[i]), int(flags[i])
            if not replay:
                if ms.last_t is not None and ti - ms.last_t > gap_s:
                    self._event(ms, "gap", "warning", f"no readings from {_iso(ms.last_t)} to {_iso(ti)} "
                                f"({ti - ms.last_t:.0f} s)", t=ti, start_utc=ms.last_t, end_utc=ti,
                                duration_s=ti - ms.last_t)
                ms.last_t = ti if ms.last_t is None else max(ms.last_t, ti)
                counts = tuple(int(c) for c in raw[i])
                for name, cond in (("noise_floor", bool(fi & calibrate.BELOW_RANGE)),
                                   ("overrange", bool(fi & calibrate.ABOVE_RANGE) or not math.isfinite(ei)),
                                   ("frozen", counts == ms.last_counts)):
                    p = ms.checks[name]
                    what = p.update(ti, cond)
                    if what:
                        self._event(ms, p.kind if what == "start" else p.kind + "_end",
                                    "warning" if what == "start" else "info",
                                    f"sensor {name.replace('_', ' ')} since {_iso(p.since or ti)}" if what == "start"
                                    else f"sensor no longer {name.replace('_', ' ')}", t=ti)
                ms.last_counts = counts
                if math.isfinite(ei):
                    ms.last_e = ei
            # an overrange reading (NaN from calibrate) enters as the top of the calibrated range: a lower
            # bound of the field, so blocks and alarms understate nothing they can know; blocks count them
            over = bool(fi & calibrate.ABOVE_RANGE) and not math.isfinite(ei)
            if over:
                ei = ms.e_top
            self._push_total(ms, ti, ei, over, replay)

    def _push_total(self, ms: MeterState, ti: float, ei: float, over: bool, replay: bool) -> None:
        blocks, runs = ms.series["total"].push(ti, ei, over)
        if blocks:
            ms.blocks_out.append(("total", blocks))
        for am in ms.alarms:
            if am.instantaneous:     # no averaging time in the standard here: each value is compared
                if not (replay and am.last_t is not None and ti <= am.last_t):
                    for ev in am.update(ti, rule_value(am.rule.unit, ei, ms.e_ref, ms.s_ref), True):
                        self._alarm_event(ms, ev)
                continue
            for r in runs:
                if r.window_s == am.rule.window_s:
                    if replay and am.last_t is not None and ti <= am.last_t:
                        continue
                    v = rule_value(am.rule.unit, r.e_rms_v_per_m, ms.e_ref, ms.s_ref)
                    for ev in am.update(ti, v, r.complete):
                        self._alarm_event(ms, ev)

    def _feed_sweep(self, ms: MeterState, v: SweepValue, replay: bool = False) -> None:
        """A complete dipole sweep: per-band series, the exposure-ratio series, then the total as a probe's."""
        ti = v.t_utc
        if not replay:
            gap_s = max(self.st.health.max_gap_s, 3.0 * ms.cfg.interval_s)
            if ms.last_t is not None and ti - ms.last_t > gap_s:
                self._event(ms, "gap", "warning", f"no sweeps from {_iso(ms.last_t)} to {_iso(ti)} "
                            f"({ti - ms.last_t:.0f} s)", t=ti, start_utc=ms.last_t, end_utc=ti,
                            duration_s=ti - ms.last_t)
            ms.last_t = ti if ms.last_t is None else max(ms.last_t, ti)
            p = ms.checks["noise_floor"]
            what = p.update(ti, v.n_lines == 0)
            if what:
                self._event(ms, p.kind if what == "start" else p.kind + "_end", "warning" if what == "start"
                            else "info", "receiver: no line above its noise floor" if what == "start"
                            else "receiver lines above the noise floor again", t=ti)
            ms.last_e, ms.last_u_db = v.total_v_per_m, (v.u_expanded_db if v.n_lines else ms.last_u_db)
        for name, e in v.band_v_per_m.items():
            blocks, _ = ms.series[name].push(ti, e, v.band_over[name])
            if blocks:
                ms.blocks_out.append((name, blocks))
        if v.exposure_ratio is not None:
            # the ratio is a sum of power-like terms: its square root enters the power-domain series,
            # so a block's energy / covered_s is the time-mean ratio
            blocks, _ = ms.series[RATIO_BAND].push(ti, math.sqrt(v.exposure_ratio), v.over)
            if blocks:
                ms.blocks_out.append((RATIO_BAND, blocks))
        self._push_total(ms, ti, v.total_v_per_m, v.over, replay)

    def _alarm_event(self, ms: MeterState, ev) -> None:
        sev = "warning" if ev.kind != "end" else "info"
        self._event(ms, f"alarm_{ev.kind}", sev, ev.message(), t=ev.t_utc, **ev.detail())
        for am in ms.alarms:
            if am.rule.name == ev.rule and am.rule.command:
                args, env = command_call(am.rule.command, ev, self.st.name)
                self.hooks.start(args, env, am.rule.command_timeout_s, label=f"{ms.cfg.name}/{ev.rule}/{ev.kind}")

    # -- commit --------------------------------------------------------------------------------
    def _commit(self, force: bool = False) -> bool:
        """One transaction: buffered readings/status/events of every meter, derived rows, alarm state.

        Nothing leaves memory before its transaction commits. A commit that fails (a full disk, an
        I/O error) keeps every batch, raises a storage_failed health event and the alarm hooks once,
        marks the station as not storing, and is retried with back-off (1 s doubling to 60 s); the
        batches go in with the first commit that works. Returns whether this call stored them.
        """
        fail = self._store_fail
        if fail is not None and not force and time.monotonic() < fail["next_mono"]:
            return False
        now = time.time()
        taken = [ms.writer.take() for ms in self.meters]
        try:
            with self.store.write():
                for ms, buf in zip(self.meters, taken):
                    ms.writer.write_taken(buf)
                    for band, blocks in ms.blocks_out:
                        derived.save_blocks(self.conn, self.station_id, ms.cfg.name, band, blocks, self.st.min_coverage)
                    if ms.session_update:
                        sets = ", ".join(f"{k}=?" for k in ms.session_update)
                        self.conn.execute(f"UPDATE sessions SET {sets} WHERE id=?",
                                          (*ms.session_update.values(), ms.session_id))
                    for am in ms.alarms:
                        self.conn.execute("INSERT OR REPLACE INTO mon_alarm VALUES (?,?,?,?,?,?,?,?,?)",
                                          (self.station_id, am.rule.name, ms.cfg.name, am.band, *am.snapshot()))
                    self.conn.execute("UPDATE mon_meter SET last_seen_utc=?, link_state=?, battery_pct=?, "
                                      "temperature_degc=?, drift_ppm=?, last_e_v_per_m=?, u_expanded_db=? "
                                      "WHERE station_id=? AND meter=?",
                                      (ms.last_t, ms.link_state, ms.status.get("battery_pct"),
                                       ms.status.get("temperature_degc"), ms.drift_ppm, ms.last_e, ms.last_u_db,
                                       self.station_id, ms.cfg.name))
                if self._station_events:
                    for sid, row in self._station_events:
                        self.store.write_batch(sid, events=[row])
                if fail is not None:
                    self.conn.execute("UPDATE mon_storage SET storing=1, since_utc=NULL, error=NULL, pending_readings=0, "
                                      "checked_utc=? WHERE station_id=?", (now, self.station_id))
                    # in the same transaction as the batches it speaks of
                    Store._insert_events(self.conn, None, [self._recovered_row(fail)])
                if fail is not None or now >= self._heartbeat_next:  # every station.heartbeat_s (host time)
                    self.conn.execute("UPDATE mon_station SET heartbeat_utc=? WHERE id=?", (now, self.station_id))
                    self._heartbeat_next = now + self.st.heartbeat_s
        except (sqlite3.DatabaseError, StorageError) as exc:
            for ms, buf in zip(self.meters, taken):
                ms.writer.put_back(buf, exc)
            self._storage_failed(exc)
            return False
        for ms in self.meters:
            ms.writer.stored()
            ms.blocks_out = []
            ms.session_update = {}
        self._station_events = []
        if fail is not None:
            self._storage_recovered(fail)
        return True

    def _storage_failed(self, exc: BaseException) -> None:
        """A commit failed: keep everything, say so (log, status, alarm hooks) once, retry later."""
        pending = sum(ms.writer.pending_readings for ms in self.meters)
        fail = self._store_fail
        if fail is None:
            fail = self._store_fail = {"since_utc": time.time(), "error": f"{type(exc).__name__}: {exc}",
                                       "attempts": 0, "delay_s": 1.0, "next_mono": 0.0}
            self._event(None, "storage_failed", "error", f"cannot write {self.st.database}: {fail['error']}; "
                        "readings are kept in memory and the commit retried", error=fail["error"])
            self._storage_alarm("start", fail["since_utc"], pending)
        fail["attempts"] += 1
        fail["next_mono"] = time.monotonic() + fail["delay_s"]
        fail["delay_s"] = min(2.0 * fail["delay_s"], 60.0)
        # moving the write-ahead log into the file and truncating it may free room for the small update
        # below, which tells `status` that the station is not storing
        self.store.make_room()
        try:
            with self.store.write():
                self.conn.execute("UPDATE mon_storage SET storing=0, since_utc=?, error=?, pending_readings=?, "
                                  "checked_utc=? WHERE station_id=?",
                                  (fail["since_utc"], fail["error"], pending, time.time(), self.station_id))
        except (sqlite3.DatabaseError, StorageError):
            pass

    def _recovered_row(self, fail: dict) -> dict:
        dropped = sum(ms.writer.dropped for ms in self.meters)
        msg = (f"storing again after {time.time() - fail['since_utc']:.0f} s and {fail['attempts']} failed commit(s); "
               "readings kept meanwhile are stored"
               + (f", {dropped} dropped beyond the memory bound (see readings_dropped)" if dropped else ""))
        return event_row("storage_recovered", "info", msg, self.now_utc(), station=self.st.name,
                         attempts=fail["attempts"], since_utc=fail["since_utc"], dropped=dropped)

    def _storage_recovered(self, fail: dict) -> None:
        self._store_fail = None
        self.log(f"{_iso(self.now_utc())} INFO    storage_recovered: storing again after {fail['attempts']} failed "
                 "commit(s)")
        self._storage_alarm("end", fail["since_utc"], 0)

    def _storage_alarm(self, kind: str, since_utc: float, pending: int) -> None:
        """Run each alarm rule's command once for the station not storing (rule name ``not_storing``)."""
        done = set()
        for rule in self.st.alarms:
            if not rule.command or rule.command in done:
                continue
            done.add(rule.command)
            ev = AlarmEvent(kind=kind, rule="not_storing", meter="*", band="storage", t_utc=time.time(),
                            value=float(pending), unit=rule.unit, threshold=0.0, clear=0.0, window_s=0.0,
                            episode_start_utc=since_utc, peak_t_utc=time.time(), peak_value=float(pending))
            args, env = command_call(rule.command, ev, self.st.name)
            self.hooks.start(args, env, rule.command_timeout_s, label=f"station/not_storing/{kind}")

    def _certificates(self) -> None:
        today = _dt.date.fromtimestamp(self.now_utc())
        if self._day_checked == today.isoformat():
            return
        self._day_checked = today.isoformat()
        for ms in self.meters:
            days = (ms.cert.due_date - today).days
            if days < 0:
                self._event(ms, "certificate_expired", "error", "; ".join(certificate_status(ms.cert, today)),
                            due_date=ms.cert.due_date.isoformat())
            elif days <= self.st.health.cert_warn_days:
                self._event(ms, "certificate_due_soon", "warning", f"certificate due on "
                            f"{ms.cert.due_date.isoformat()} ({days} days)", due_date=ms.cert.due_date.isoformat())

    def _retention(self) -> None:
        """Thin every growing table to its age limit (meterlink/station/retention.py), one chunk per commit tick."""
        keep = self.st.retention
        if not self._retention_todo:
            if time.monotonic() < self._retention_next:
                return
            self._retention_next = time.monotonic() + keep.check_every_s
            self._retention_todo = retention.plan(
                self.conn, keep, self.station_id, [(ms.cfg.name, ms.session_id, ms.cfg.interval_s) for ms in self.meters],
                self.now_utc(), max(self.st.windows_s))
            return
        task = self._retention_todo[0]
        if task.step(self.store, keep.chunk_rows) < keep.chunk_rows:
            self._retention_todo.pop(0)
            if task.removed:
                ms = next((m for m in self.meters if m.cfg.name == task.meter), None)
                what = {"readings": "raw reading(s)", "status": "status row(s)", "events": "event(s)",
                        "derived": "derived row(s) (blocks and running averages)"}[task.table]
                self._event(ms, "retention", "info", f"{task.removed} {what} before {_iso(task.before_utc)} deleted"
                            + (" (the derived series keeps them)" if task.table == "readings" else ""),
                            table=task.table, removed=task.removed, before_utc=task.before_utc)

    # -- main loop -----------------------------------------------------------------------------
    def run(self) -> None:
        """Acquire until stop(); commits at most commit_s apart; always leaves a consistent database."""
        for ms in self.meters:
            # while the file cannot be written, up to max_keep readings per meter wait in memory (about
            # 0.1 GB; 2.3 days at one reading a second); beyond, the oldest go, each drop an event
            ms.writer = BatchWriter(self.store, ms.session_id, max_rows=10**9, max_age_s=self.commit_s,
                                    max_keep=200_000)
            factory = None if self._link_factory is None else (lambda p=ms.cfg.port: self._link_factory(p))
            ms.link = MeterLink(ms.cfg.port, int(round(ms.cfg.interval_s * 1000)), link_factory=factory,
                                backoff_max_s=self._backoff_max_s, wake=self._wake)
            ms.link.start(require_open=False)
        next_commit = time.monotonic() + self.commit_s
        self.notify.ready(f"monitoring {self.st.name}: {len(self.meters)} meter(s)")
        try:
            more = False
            while not self._stop.is_set():
                # Sleep until a link queues something or the next commit is due (no polling).
                if not more:
                    self._wake.wait(max(0.0, next_commit - time.monotonic()))
                self.notify.watchdog()      # only this loop pings: if it hangs, systemd restarts the unit
                self._wake.clear()          # before draining: an item queued after this wakes us again
                more = False
                for ms in self.meters:
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
                ms.link.stop()
            for ms in self.meters:
                while (item := ms.link.get(0.0)) is not None:
                    self._handle(ms, item)
            self._tick(closing=True)
            self._hook_outcomes(self.hooks.shutdown(STOP_WAIT_S))
            self._event(None, "monitor_stopped", "info", f"monitor of {self.st.name} stopped cleanly")
            self._final_commit()
            self.store.close()
            self._lock.release()
            self.notify.close()

    def _hook_outcomes(self, outcomes) -> None:
        """Alarm commands that ended badly become events (a clean exit 0 is not recorded)."""
        for o in outcomes:
            who = f"{o.argv0} ({o.label}{f', pid {o.pid}' if o.pid else ''})"
            detail = {"hook": o.label, "command": o.argv0, "pid": o.pid, "returncode": o.returncode,
                      "duration_s": round(o.duration_s, 3), "timeout_s": o.timeout_s}
            if o.kind == "timeout":
                self._event(None, "alarm_command_timeout", "error", f"{who} still running after {o.timeout_s:g} s: "
                            "its process group was killed", **detail)
            elif o.kind == "killed_at_stop":
                self._event(None, "alarm_command_timeout", "warning", f"{who} still running when the monitor "
                            "stopped: its process group was killed", at_stop=True, **detail)
            elif o.kind in ("not_started", "skipped"):
                self._event(None, "alarm_command_failed", "error", f"{who} not run: {o.error}", **detail)
            elif o.returncode:
                self._event(None, "alarm_command_failed", "warning", f"{who} exited with status {o.returncode}",
                            **detail)

    def _final_commit(self, tries: int = 4) -> None:
        """Store everything left and mark the station stopped; if the file still cannot be written after
        a few short tries, say exactly what is lost (the log is then the only record left)."""
        for k in range(tries):
            if self._commit(force=True):
                break
            time.sleep(0.25 * (k + 1))  # back-off before retrying a failed commit at shutdown
        else:
            lost = {ms.cfg.name: ms.writer.pending_readings for ms in self.meters}
            self.log(f"{_iso(time.time())} ERROR   not_stored: {self.st.database} cannot be written "
                     f"({self._store_fail['error'] if self._store_fail else '?'}); readings not stored at stop: "
                     + ", ".join(f"{m} {n}" for m, n in lost.items()))
            return
        try:
            with self.store.write():
                self.conn.execute("UPDATE mon_station SET state='stopped', heartbeat_utc=? WHERE id=?",
                                  (time.time(), self.station_id))
        except (sqlite3.DatabaseError, StorageError) as exc:
            self.log(f"{_iso(time.time())} ERROR   cannot mark the station stopped: {exc}")

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
        for ms in self.meters:
            limit = max(self.st.health.max_gap_s, 3 * ms.cfg.interval_s) * 2
            # with an accelerated simulator, a host that is merely a little behind is not a silent meter
            limit = max(limit, 2.0 * self.time_scale) if self.time_scale != 1.0 else limit
            if closing or (ms.pending and ((time.monotonic() - ms.pending_mono) * self.time_scale >= self.calibrate_s
                                           or len(ms.pending) >= 1024
                                           or (ms.last_t is not None and now_data - ms.last_t > limit))):
                self._calibrate_pending(ms)
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


def _iso(t: float | None) -> str:
    if t is None:
        return "-"
    return _dt.datetime.fromtimestamp(t, _dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")
