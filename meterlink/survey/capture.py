"""Capture over a MeterLink: calibrate each reading in memory, store every raw item, and collect
the samples of one point (spot, timed average, sweep with maximum hold) in device time.

Every item from the link is written to the session through the BatchWriter, whatever the mode,
so the raw record stays complete. Readings taken while the probe settles after a move are kept
in the database but not used.
"""

from __future__ import annotations

import dataclasses
import math
import threading
import time
from dataclasses import dataclass
from typing import Callable

import numpy as np

from meterlink.physics.averaging import window_rms
from meterlink.physics.calibrate import ABOVE_RANGE, BELOW_RANGE, calibrate_axes, calibrate_spectrum, floor_e_v_per_m
from meterlink.physics.certificate import DipoleCertificate
from meterlink.errors import LinkError
from meterlink.physics.limits import reference_level
from meterlink.device.link import Connected, LinkEvent, Reading, SpectrumReading, StatusReport
from meterlink.device.protocol import AXIS_OVER_X, AXIS_OVER_Y, AXIS_OVER_Z, STATUS_BATTERY_LOW, STATUS_OVERRANGE
from meterlink.storage.recorder import reading_row, spectrum_row, status_row
from meterlink.survey.model import Sample
from meterlink.survey.positions import Placing

_OVER = AXIS_OVER_X | AXIS_OVER_Y | AXIS_OVER_Z


@dataclass(frozen=True)
class Value:
    """One calibrated reading (probe) or one complete three-orientation sweep (dipole)."""

    boot: int
    seq: int
    t_s: float            # device time (unwrapped tick), s
    t_utc: float
    e_v_per_m: float
    axes_v_per_m: tuple[float, float, float]
    u_expanded_db: float
    flags: int
    overrange: bool
    emitters: tuple = ()  # (freq_hz, e_v_per_m) per line, dipole only


@dataclass(frozen=True)
class View:
    """What the live readout shows at one moment (a snapshot; see readout.render)."""

    label: str
    mode: str
    phase: str                     # "settling", "measuring", "done"
    height_m: float | None
    progress: float                # 0..1 of the device-time duration
    elapsed_s: float
    duration_s: float
    e_v_per_m: float
    axes_v_per_m: tuple[float, float, float]
    e_max_v_per_m: float
    e_avg_v_per_m: float
    n: int
    e_ref_v_per_m: float
    ratio_power: float             # current value against the reference level, power terms
    battery_pct: int | None
    battery_low: bool
    overrange: bool
    emitters: tuple = ()           # (name, freq_hz, e_v_per_m), strongest first
    followup_v_per_m: float | None = None
    sample: str = ""               # e.g. "height 2 of 3"


@dataclass(frozen=True)
class Geo:
    """A sample's GNSS position: mean of its readings' positions, with an accuracy estimate."""

    lat_deg: float
    lon_deg: float
    alt_m: float | None
    u_m: float | None          # sqrt(largest per-reading estimate^2 + RMS scatter^2), m
    fix_utc: float | None      # the GNSS time of the middle positioned reading
    n_positioned: int


def geo_of(positions) -> Geo | None:
    """Combine the positions of a sample's readings (None entries: readings without a position);
    anything with lat_deg, lon_deg, alt_m, accuracy_m and fix_utc will do."""
    from meterlink.device.gnss import to_local_m

    got = [f for f in positions if f is not None]
    if not got:
        return None
    lat = sum(f.lat_deg for f in got) / len(got)
    lon = sum(f.lon_deg for f in got) / len(got)
    alts = [f.alt_m for f in got if f.alt_m is not None]
    x, y = to_local_m([f.lat_deg for f in got], [f.lon_deg for f in got], lat, lon)
    scatter2 = float(np.mean(np.asarray(x) ** 2 + np.asarray(y) ** 2))
    accs = [f.accuracy_m for f in got if f.accuracy_m is not None]
    u = math.sqrt(max(accs) ** 2 + scatter2) if accs else None
    mid = got[len(got) // 2]
    return Geo(lat, lon, sum(alts) / len(alts) if alts else None, u, mid.fix_utc, len(got))


def _row_position(row: dict):
    """The position stored on a trace row, or None."""
    if row.get("lat_deg") is None:
        return None
    from meterlink.device.gnss import Position

    return Position(row["lat_deg"], row["lon_deg"], row["alt_m"], row["pos_u_m"], row["fix_utc"],
                    row["fix_quality"], row["n_sats"], row["hdop"], 0.0)


class Interrupted(Exception):
    """The capture was stopped (stop event or Ctrl-C); what was collected is still used."""


class Capture(Placing):
    """Consume one MeterLink for a survey session: calibrate, store, and collect samples."""

    def __init__(self, link, writer, cert, *, standard: str, tier: str, e_ref_v_per_m: float,
                 freq_hz=None, band_hz=None, settle_s: float = 2.0, on_view: Callable[[View], None] | None = None,
                 stop_event: threading.Event | None = None, names=None, followup_v_per_m=None, gnss=None,
                 gnss_max_gap_s: float = 2.0):
        self.link, self.writer, self.cert = link, writer, cert
        self.standard, self.tier, self.e_ref = standard, tier, float(e_ref_v_per_m)
        self.freq = freq_hz if freq_hz is not None else band_hz
        self.settle_s = float(settle_s)
        self.on_view = on_view
        self.stop_event = stop_event or threading.Event()
        self.names = names or (lambda f: f"{f / 1e6:.1f} MHz")
        self.followup = followup_v_per_m
        self.gnss = gnss
        self.gnss_max_gap_s = float(gnss_max_gap_s)   # GNSS seconds between fixes a position may bridge
        self._unplaced: list[dict] = []      # trace rows not yet given a position (the fix after them not in)
        self.offset = None                   # the latest GNSS TimeOffset used (readings' time - GNSS time)
        self.connected: Connected | None = None
        self.epoch = 0          # a resumed survey (a re-measurement later) stores its readings in a new epoch
        self.temp_c: float | None = None
        self.temps_c: list[float] = []       # every temperature the meter reported, in order
        self.battery_pct: int | None = None
        self.battery_low = False
        self.status_over = False
        self.trace: list[dict] = []
        self.position: tuple | None = None
        self._sweeps: dict = {}
        self._lim: dict = {}
        self._floor: dict = {}

    # -- items ---------------------------------------------------------------------------------
    def _item(self, item) -> Value | None:
        w = self.writer
        if isinstance(item, Reading):
            w.add_reading(reading_row(item, self.epoch))
            # a meter of the other sensor kind (refused at the handshake): stored raw, never calibrated
            return None if isinstance(self.cert, DipoleCertificate) else self._probe(item)
        if isinstance(item, SpectrumReading):
            w.add_spectrum(spectrum_row(item, self.epoch))
            return self._dipole(item) if isinstance(self.cert, DipoleCertificate) else None
        if isinstance(item, StatusReport):
            w.add_status(status_row(item))
            st = item.status
            self.temp_c = st.temp_centi_c / 100.0
            self.temps_c.append(self.temp_c)
            self.battery_pct = None if st.battery_pct > 100 else int(st.battery_pct)
            self.battery_low = bool(st.flags & STATUS_BATTERY_LOW)
            self.status_over = bool(st.flags & STATUS_OVERRANGE)
        elif isinstance(item, LinkEvent):
            w.add_event(item.kind, item.severity, item.message, item.t_utc, **item.detail)
        elif isinstance(item, Connected):
            self.connected = item
        self.gnss_events()
        w.flush_if_due()
        return None

    def _probe(self, r: Reading) -> Value:
        a = r.axes
        res = calibrate_axes(self.cert, [[a.x, a.y, a.z]], self.freq, self.temp_c)
        e = float(res.e_v_per_m[0])
        over = bool(a.flags & _OVER) or not math.isfinite(e)
        axes = tuple(float(v) for v in res.axes_v_per_m[0])
        return Value(r.boot, r.seq, r.tick_ms / 1000, r.t_utc, e, axes, float(res.u_expanded_db[0]),
                     int(res.flags[0]), over)

    def _dipole(self, s: SpectrumReading) -> Value | None:
        sp = s.spectrum
        if not sp.pairs or sp.orientation > 2:
            return None
        f = np.array([k * 1000.0 for k, _ in sp.pairs])
        lv = np.array([c / 100.0 for _, c in sp.pairs])
        vhi = self.cert.level_range_dbuv[1]
        # above the receiver's range: calibrated at the top of the range, a lower bound (flagged)
        res = calibrate_spectrum(self.cert, f, np.where(lv > vhi, vhi, lv), "xyz"[sp.orientation])
        res = dataclasses.replace(res, flags=np.where(lv > vhi, res.flags | ABOVE_RANGE, res.flags))
        acc = self._sweeps.setdefault((s.boot, sp.sweep), {})
        acc[sp.orientation] = res
        if sp.orientation != 2:
            return None
        del self._sweeps[(s.boot, sp.sweep)]
        self._sweeps.clear()     # an older sweep missing its last orientation is dropped
        if len(acc) < 3:
            return None
        # A line an orientation reports below the receiver's floor, or does not report, is not
        # 0 V/m: it is "< floor", counted at the floor (an upper bound; BELOW_RANGE flags it).
        lines = sorted({float(fi) for o in range(3) for fi in acc[o].freq_hz})
        p: dict[float, float] = {fi: 0.0 for fi in lines}
        axes, over, flags, u = [], False, 0, 0.0
        for o in range(3):
            r = acc[o]
            got = {float(fi): float(ei) for fi, ei in zip(r.freq_hz, r.e_v_per_m)}
            ax2 = 0.0
            for fi in lines:
                ei = got.get(fi, math.nan)
                if not math.isfinite(ei):
                    ei = self.floor_v_per_m(fi)
                    flags |= BELOW_RANGE
                p[fi] += ei * ei
                ax2 += ei * ei
            over |= bool(np.any((r.flags & ABOVE_RANGE) > 0))
            axes.append(math.sqrt(ax2))
            flags |= int(np.bitwise_or.reduce(r.flags)) if r.flags.size else 0
            u = max(u, float(np.max(r.u_expanded_db)))
        ems = tuple((fi, math.sqrt(v)) for fi, v in sorted(p.items()) if v > 0)
        total = math.sqrt(sum(v for v in p.values()))
        return Value(s.boot, s.seq, s.tick_ms / 1000, s.t_utc, total, tuple(axes), u, flags, over, ems)

    def floor_v_per_m(self, freq_hz: float) -> float:
        """One orientation's floor (V/m) at a line: what a line below it is at most."""
        if freq_hz not in self._floor:
            self._floor[freq_hz] = float(floor_e_v_per_m(self.cert, freq_hz)[0])
        return self._floor[freq_hz]

    def next_value(self, timeout_s: float = 0.2) -> Value | None:
        """Next calibrated value; LinkError once the link has ended, Interrupted if stopped."""
        deadline = time.monotonic() + timeout_s
        while True:
            if self.stop_event.is_set():
                raise Interrupted()
            item = self.link.get(max(0.0, min(0.05, deadline - time.monotonic())))
            if item is None:
                if self.link.finished.is_set() and self.link.queue.empty():
                    raise LinkError(f"link to {self.link.port} ended")
                if time.monotonic() >= deadline:
                    self.writer.flush_if_due()
                    return None
                continue
            v = self._item(item)
            if v is not None:
                return v

    def drain(self) -> None:
        """Store whatever the link already delivered (readings from before a move)."""
        while (item := self.link.get(0.0)) is not None:
            v = self._item(item)
            if v is not None:
                self._trace(v, None, -1, False)

    # -- collection ----------------------------------------------------------------------------
    def _ratio(self, v: Value) -> float:
        if not v.emitters:
            return (v.e_v_per_m / self.e_ref) ** 2 if math.isfinite(v.e_v_per_m) else math.inf
        tot = 0.0
        for f, e in v.emitters:
            if f not in self._lim:
                try:
                    self._lim[f] = reference_level(self.standard, self.tier, f).e_v_per_m or math.inf
                except Exception:  # noqa: BLE001 - a line the tables do not cover counts at the broadband level
                    self._lim[f] = self.e_ref
            tot += (e / self._lim[f]) ** 2
        return tot

    def _trace(self, v: Value, point_no, sample_no, used) -> dict:
        """Keep one value in the trace with the probe's position; its GNSS position comes in place()."""
        pos = self.position or (None, None, None)
        row = {"point_no": point_no, "sample_no": sample_no, "boot": v.boot, "seq": v.seq,
               "t_utc": v.t_utc, "t_device_s": v.t_s, "e_v_per_m": v.e_v_per_m,
               "x_m": pos[0], "y_m": pos[1], "z_m": pos[2], "used": int(bool(used))}
        self.trace.append(row)
        if self.gnss is not None:
            self._unplaced.append(row)
        return row

    def _view(self, base: dict, v: Value, t0, dur, es, phase) -> None:
        if self.on_view is None:
            return
        el = 0.0 if t0 is None else v.t_s - t0
        ems = sorted(((self.names(f), f, e) for f, e in v.emitters), key=lambda x: -x[2])[:5]
        avg = math.sqrt(sum(x * x for x in es) / len(es)) if es else math.nan
        self.on_view(View(phase=phase, progress=min(1.0, el / dur) if dur else 0.0, elapsed_s=el, duration_s=dur,
                          e_v_per_m=v.e_v_per_m, axes_v_per_m=v.axes_v_per_m,
                          e_max_v_per_m=max(es) if es else math.nan, e_avg_v_per_m=avg, n=len(es),
                          e_ref_v_per_m=self.e_ref, ratio_power=self._ratio(v), battery_pct=self.battery_pct,
                          battery_low=self.battery_low, overrange=v.overrange or self.status_over,
                          emitters=tuple(ems), followup_v_per_m=self.followup, **base))

    def settle(self, base: dict, point_no: int, sample_no: int, host_timeout_s: float,
               placed_at: tuple[int, int] | None = None) -> None:
        """Skip readings for settle_s of device time after the probe was placed (kept, not used).

        placed_at, when the mover knows it, is (boot, sequence number) of the device's first frame
        after the move: readings before it were taken at the old place, however late the host
        reads them (a host behind the device, say on a loaded machine), and do not start the
        settling time."""
        self.drain()
        t_end = None
        host_deadline = time.monotonic() + host_timeout_s
        while time.monotonic() < host_deadline:
            v = self.next_value()
            if v is None:
                continue
            self._trace(v, point_no, sample_no, False)
            if placed_at is not None and v.boot == placed_at[0] and (v.seq - placed_at[1]) % 2 ** 32 >= 2 ** 31:
                self._view({**base}, v, None, 0.0, [], "settling")
                continue
            t_end = v.t_s + self.settle_s if t_end is None else t_end
            self._view({**base}, v, None, 0.0, [], "settling")
            if v.t_s >= t_end:
                self.place(final=False)
                return
        self.place(final=False)

    def collect(self, duration_s: float, base: dict, point_no: int, sample_no: int, *, height_m: float,
                walk=None, mover=None, host_timeout_s: float | None = None) -> tuple[Sample, bool]:
        """Collect values over duration_s of device time; returns (sample, interrupted)."""
        vals: list[Value] = []
        rows = []
        host_timeout_s = host_timeout_s if host_timeout_s is not None else 2 * duration_s + 30
        host_deadline = time.monotonic() + host_timeout_s
        interrupted = False
        t0 = None
        t_before, i_temp = self.temp_c, len(self.temps_c)     # the meter's temperature as the sample starts
        try:
            while time.monotonic() < host_deadline:
                v = self.next_value()
                if v is None:
                    continue
                if vals and v.boot != vals[-1].boot:
                    interrupted = True       # the device restarted: its clock starts again
                    break
                vals.append(v)
                t0 = vals[0].t_s if t0 is None else t0
                rows.append(self._trace(v, point_no, sample_no, True))
                if walk is not None and mover is not None:
                    self.position = walk(min(1.0, (v.t_s - t0) / duration_s), height_m)
                    mover(self.position)
                self._view(base, v, t0, duration_s, [x.e_v_per_m for x in vals], "measuring")
                if len(vals) >= 2 and v.t_s - t0 + _step(vals) >= duration_s - 1e-6:
                    break
            else:
                interrupted = True
        except KeyboardInterrupt:
            self.stop_event.set()      # Ctrl-C ends the survey after this point is stored
            interrupted = True
        except (Interrupted, LinkError):
            interrupted = True
        floor = (lambda f: math.sqrt(3.0) * self.floor_v_per_m(f)) if is_dipole(self.cert) else None
        temps = ([] if t_before is None else [t_before]) + self.temps_c[i_temp:]
        s = _sample(vals, duration_s, height_m, self.position, floor)
        self.place(final=True)
        return dataclasses.replace(s, temp_span_c=(min(temps), max(temps)) if temps else None,
                                   geo=geo_of([_row_position(r) for r in rows])), interrupted


def _step(vals) -> float:
    return float(np.median(np.diff([v.t_s for v in vals]))) if len(vals) >= 2 else 0.0


def _sample(vals, duration_s, height_m, position, floor=None) -> Sample:
    if not vals:
        nan = math.nan
        return Sample(height_m, position, nan, nan, (nan, nan, nan), 0.0, 0, 0.0, nan, nan)
    t = np.array([v.t_s for v in vals])
    e = np.array([v.e_v_per_m for v in vals])
    finite = np.isfinite(e)
    t0 = float(t[0])
    if len(vals) >= 2 and finite.sum() >= 1:
        # power-domain time average over [t0, t0 + duration]; an above-range reading (NaN) is a gap
        rms, cov = window_rms(t[finite], e[finite], t0, t0 + duration_s)
    else:
        rms, cov = float(e[0]), min(1.0, _step(vals) / duration_s) if len(vals) > 1 else 0.0
    if not np.all(finite):
        cov = min(cov, float(finite.mean()))
    axes = tuple(float(np.sqrt(np.nanmean(np.array([v.axes_v_per_m[i] for v in vals]) ** 2))) for i in range(3))
    flags = 0
    for v in vals:
        flags |= v.flags
    ems, sweeps = (), []
    if vals[0].emitters or any(v.emitters for v in vals):
        # time-weighted power mean per line: each sweep stands for the time to the next (capped), not
        # 1/n of the capture; a line absent from a sweep is below the floor there: counted at the floor
        from meterlink.physics.assessment import sweep_weights_s

        w = sweep_weights_s(t)
        lines = sorted({f for v in vals for f, _ in v.emitters})
        p = dict.fromkeys(lines, 0.0)
        sweeps = []
        for v, wi in zip(vals, w):
            got = dict(v.emitters)
            sweep = tuple((f, float(got.get(f, floor(f) if floor is not None else 0.0))) for f in lines)
            for f, ev in sweep:
                p[f] += ev * ev * wi
            sweeps.append(sweep)
        ems = tuple(("", f, math.sqrt(x / float(np.sum(w)))) for f, x in sorted(p.items()))
    return Sample(height_m=float(height_m), position_m=position, e_v_per_m=float(rms),
                  e_max_v_per_m=float(np.nanmax(e)) if finite.any() else math.nan, axes_v_per_m=axes,
                  u_expanded_db=float(max(v.u_expanded_db for v in vals)), n_readings=len(vals),
                  coverage=float(cov), t_start_utc=float(vals[0].t_utc), t_end_utc=float(vals[-1].t_utc),
                  flags=int(flags), emitters=ems, sweeps=tuple(sweeps) if ems else ())


def is_dipole(cert) -> bool:
    return isinstance(cert, DipoleCertificate)
