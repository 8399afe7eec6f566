"""The monitor's per-meter pipeline: link items in, raw rows buffered, calibration, health checks,
derived series and alarms, on arrays (the batched path: one numpy pass per batch, not per reading).

``Ingest`` is a part of :class:`meterlink.station.monitor.Monitor` (it uses the monitor's station,
store, event and hook helpers); ``MeterState`` is what the monitor keeps per meter.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field

import numpy as np

from meterlink.device.link import Connected, LinkEvent, MeterLink, Reading, ReadingBatch, SpectrumReading, StatusReport
from meterlink.physics import calibrate
from meterlink.physics.limits import most_restrictive_level
from meterlink.station.alarms import command_call, rule_value
from meterlink.station.meterwriter import MeterWriter
from meterlink.station.spectral import RATIO_BAND, SweepAssembler, SweepValue
from meterlink.station.stationfile import MeterConfig
from meterlink.storage.store import StorageError, epoch_row

import sqlite3


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

    def update_many(self, t: np.ndarray, cond: np.ndarray) -> list[tuple[str, float, float | None]]:
        """As update() for each (t, cond) in turn: [(what, t, since at that moment), ...]."""
        if not cond.any():
            if self.since is None and not self.active:
                return []
            out = [("end", float(t[0]), self.since)] if self.active and t.size else []
            self.since, self.active = None, False if t.size else self.active
            return out
        out = []
        cuts = np.flatnonzero(cond[1:] != cond[:-1]) + 1
        for a, b in zip(np.r_[0, cuts].tolist(), np.r_[cuts, cond.size].tolist()):
            if cond[a]:
                if self.since is None:
                    self.since = float(t[a])
                if not self.active:
                    hit = np.flatnonzero(t[a:b] - self.since >= self.hold_s)
                    if hit.size:
                        self.active = True
                        out.append(("start", float(t[a + hit[0]]), self.since))
            else:
                self.since = None
                if self.active:
                    self.active = False
                    out.append(("end", float(t[a]), None))
        return out


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
    writer: MeterWriter | None = None
    series: dict = field(default_factory=dict)       # band -> derived.Series
    alarms: list = field(default_factory=list)
    pending: list = field(default_factory=list)      # (t_utc, raw (N, 3)) chunks not yet calibrated
    n_pending: int = 0
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


def _alarm_many(am, t: np.ndarray, v: np.ndarray, ok: np.ndarray) -> list:
    """AlarmMachine.update for each value in turn (t strictly rising); an idle machine skips in numpy
    to the next complete value at or above its threshold."""
    out: list = []
    if am.last_t is not None:
        k = int(np.searchsorted(t, am.last_t, side="right"))
        t, v, ok = t[k:], v[k:], ok[k:]
    n = t.size
    i = 0
    thr = am.rule.threshold
    while i < n:
        if am.state == "idle":
            with np.errstate(invalid="ignore"):
                hit = np.flatnonzero(ok[i:] & (v[i:] >= thr))
            if not hit.size:
                am.last_t = float(t[-1])
                return out
            i += int(hit[0])
        out.extend(am.update(float(t[i]), float(v[i]), bool(ok[i])))
        i += 1
    return out


class Ingest:
    """Link items of one meter through storage buffers, calibration, health checks, series and alarms."""

    def _t_of(self, ms: MeterState, item, tick=None):
        """Data time of an item (or of an array of ticks): device time, or accelerated host time."""
        if self.time_scale == 1.0:
            return item.t_utc
        m = ms.boot_map.get(ms.clock_key)
        if tick is None:
            tick = item.tick_ms
        if m is None:
            first = tick if np.ndim(tick) == 0 else int(tick[0])
            m = ms.boot_map[ms.clock_key] = (first, self.now_utc())
        return m[1] + (tick - m[0]) / 1000.0

    def _resume_gap(self, ms: MeterState, boot: int, seq: int) -> None:
        """First reading of this run: frames the device sent while no monitor read it (a kill, a power
        cut) are counted exactly from the sequence numbers, and stored as a seq_gap event."""
        ms.resume_check = False
        row = self.conn.execute("SELECT seq_hi FROM reading_spans WHERE session_id=? AND boot=? "
                                "ORDER BY id DESC LIMIT 1", (ms.session_id, boot)).fetchone()
        if row is None:
            return
        last = int(row[0])
        lost = seq - last - 1
        if 0 < lost < 1 << 31:  # the same boot carried on: the frames in between never reached the store
            self._event(ms, "seq_gap", "warning", f"{lost} frame(s) lost between seq {last} and {seq} while "
                        "no monitor was reading this meter", lost=lost, prev_seq=last, seq=seq, boot=boot,
                        while_down=True)

    def _readings(self, ms: MeterState, boot: int, seq, tick, t, raw, flags, rng) -> None:
        """Readings (arrays) into the store buffer and the calibration queue."""
        if ms.resume_check:
            self._resume_gap(ms, boot, int(seq[0]))
        ms.writer.add_arrays(boot, ms.epoch, seq, tick, t, raw, flags, rng)
        if not ms.pending:
            ms.pending_mono = time.monotonic()
        ms.pending.append((t, raw))
        ms.n_pending += int(seq.size)

    def _handle(self, ms: MeterState, item) -> None:
        if isinstance(item, ReadingBatch):
            t = self._t_of(ms, item, item.tick_ms)
            self._readings(ms, item.boot, item.seq, item.tick_ms, np.asarray(t, float), item.raw, item.flags,
                           item.range_index)
        elif isinstance(item, Reading):
            a = item.axes
            one = lambda v: np.array([v], np.int64)  # noqa: E731
            self._readings(ms, item.boot, one(item.seq), one(item.tick_ms), np.array([self._t_of(ms, item)], float),
                           np.array([[a.x, a.y, a.z]], np.int64), one(a.flags), one(a.range_index))
        elif isinstance(item, StatusReport):
            # readings before it keep the temperature they were taken at: calibrated first if it changes
            # (the only part of a STATUS calibration uses; not calibrating at every STATUS keeps the
            # batches of a large station as long as calibrate_s)
            if item.status.temp_centi_c / 100.0 != ms.status.get("temperature_degc"):
                self._calibrate_pending(ms)
            self._status(ms, item)
        elif isinstance(item, Connected):
            self._connected(ms, item)
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

    def _connected(self, ms: MeterState, item: Connected) -> None:
        ms.link_state = "streaming"
        ident = item.ident
        try:
            dev = self.store.device_id(ident.model, ident.serial, ident.probe_serial, ident.cert_ref,
                                       int(ident.sensor_kind), f"{ident.fw_major}.{ident.fw_minor}.{ident.fw_patch}",
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
        ms.session_update = {**({"device_id": dev} if dev is not None else {}), "interval_ms": item.interval_ms,
                             "clock_boot": item.boot, "clock_tick0_ms": item.mapping.tick0_ms,
                             "clock_utc0_s": item.mapping.utc0_s}

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
        self._calibrate_pending_many([ms])

    def _calibrate_pending_many(self, meters: list[MeterState]) -> None:
        """Calibrate the pending readings of these meters, then feed each meter's own.

        Meters that share a certificate, a declared frequency and a device temperature are
        calibrated in ONE calibrate_axes call over their readings put end to end (each reading's
        result depends on nothing else, so the values are those of a call per meter): a call has a
        fixed cost (interpolants, budget) that a station of hundreds of meters would otherwise pay
        once per meter and batch. Each meter's readings are then fed in its own order, as before.
        """
        groups: dict = {}
        for ms in meters:
            if not ms.pending:
                continue
            temp = ms.status.get("temperature_degc")
            try:
                key = (id(ms.cert), ms.freq, temp)
                hash(key)
            except TypeError:            # a frequency given in a form that cannot be a key: on its own
                key = (id(ms), None, None)
            groups.setdefault(key, []).append(ms)
        for group in groups.values():
            parts = []
            for ms in group:
                if len(ms.pending) == 1:
                    t, raw = ms.pending[0]
                else:
                    t = np.concatenate([c[0] for c in ms.pending])
                    raw = np.concatenate([c[1] for c in ms.pending])
                ms.pending, ms.n_pending = [], 0
                parts.append((ms, t, raw))
            first = group[0]
            raw_all = parts[0][2] if len(parts) == 1 else np.concatenate([r for _, _, r in parts])
            res = calibrate.calibrate_axes(first.cert, raw_all, first.freq,
                                           temp_c=first.status.get("temperature_degc"))
            a = 0
            for ms, t, raw in parts:
                b = a + len(raw)
                ms.last_u_db = float(res.u_expanded_db[b - 1])
                self._feed(ms, t, res.e_v_per_m[a:b], res.flags[a:b], raw)
                a = b

    def _feed(self, ms: MeterState, t, e, flags, raw, replay: bool = False) -> None:
        """Push calibrated samples (arrays) through the health checks, series and alarm machines."""
        t = np.asarray(t, float)
        e = np.asarray(e, float)
        flags = np.asarray(flags, np.int64)
        if not t.size:
            return
        if not replay:
            self._health_checks(ms, t, e, flags, np.asarray(raw))
        # an overrange reading (NaN from calibrate) enters as the top of the calibrated range: a lower
        # bound of the field, so blocks and alarms understate nothing they can know; blocks count them
        over = ((flags & calibrate.ABOVE_RANGE) != 0) & ~np.isfinite(e)
        if over.any():
            e = np.where(over, ms.e_top, e)
        blocks, runs = ms.series["total"].push_many(t, e, over)
        if blocks:
            ms.blocks_out.append(("total", blocks))
        for am in ms.alarms:
            if am.instantaneous:     # no averaging time in the standard here: each value is compared
                prev = -math.inf if am.last_t is None else am.last_t
                keep = t > np.maximum.accumulate(np.r_[prev, t[:-1]])
                v = rule_value(am.rule.unit, e[keep], ms.e_ref, ms.s_ref)
                evs = _alarm_many(am, t[keep], np.asarray(v, float), np.ones(int(keep.sum()), bool))
            else:
                if am.rule.window_s not in runs.windows_s:
                    continue
                w = runs.windows_s.index(am.rule.window_s)
                v = rule_value(am.rule.unit, runs.e_rms_v_per_m[w], ms.e_ref, ms.s_ref)
                evs = _alarm_many(am, runs.t_end, np.asarray(v, float), runs.complete[w])
            for ev in evs:
                self._alarm_event(ms, ev)

    def _health_checks(self, ms: MeterState, t, e, flags, raw) -> None:
        """Gaps, a sensor stuck at the noise floor, at overrange or frozen: events on transitions only."""
        gap_s = self.st.health.max_gap_s
        prev = np.maximum.accumulate(np.r_[-math.inf if ms.last_t is None else ms.last_t, t])
        for i in np.flatnonzero(np.isfinite(prev[:-1]) & (t - prev[:-1] > gap_s)).tolist():
            t0, ti = float(prev[i]), float(t[i])
            self._event(ms, "gap", "warning", f"no readings from {_iso(t0)} to {_iso(ti)} ({ti - t0:.0f} s)", t=ti,
                        start_utc=t0, end_utc=ti, duration_s=ti - t0)
        ms.last_t = float(prev[-1])
        raw = raw.astype(np.int64).reshape(-1, 3)
        full = raw if ms.last_counts is None else np.vstack((np.asarray([ms.last_counts], np.int64), raw))
        frozen = np.all(full[1:] == full[:-1], axis=1)      # each reading's counts equal the one before
        if ms.last_counts is None:
            frozen = np.r_[False, frozen]
        found = []
        for name, cond in (("noise_floor", (flags & calibrate.BELOW_RANGE) != 0),
                           ("overrange", ((flags & calibrate.ABOVE_RANGE) != 0) | ~np.isfinite(e)),
                           ("frozen", frozen)):
            p = ms.checks[name]
            for what, ti, since in p.update_many(t, cond):
                found.append((ti, name, p, what, since))
        for ti, name, p, what, since in sorted(found, key=lambda x: x[0]):
            self._event(ms, p.kind if what == "start" else p.kind + "_end", "warning" if what == "start" else "info",
                        f"sensor {name.replace('_', ' ')} since {_iso(since or ti)}" if what == "start"
                        else f"sensor no longer {name.replace('_', ' ')}", t=ti)
        ms.last_counts = tuple(int(c) for c in raw[-1])
        fin = np.flatnonzero(np.isfinite(e))
        if fin.size:
            ms.last_e = float(e[fin[-1]])

    def _push_total(self, ms: MeterState, ti: float, ei: float, over: bool, replay: bool) -> None:
        """One value (a dipole sweep's total) into the total series and the alarm machines."""
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


def _iso(t: float | None) -> str:
    import datetime as _dt

    if t is None:
        return "-"
    return _dt.datetime.fromtimestamp(t, _dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")
