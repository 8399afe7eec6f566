"""Statistics of a 6-minute series per day, week and month (pure).

Inputs are the fixed blocks of :mod:`meterlink.station.derived` (RMS field per block, covered seconds,
completeness). Only complete blocks enter the order statistics. Definitions:
- convention "field": values are E (V/m) and percent of the field reference level 100 E / E_ref;
  convention "power": values are the plane-wave S = E^2 / Z0 and percent 100 S / S_ref.
  Order statistics are taken in the convention's quantity, then also shown as E.
- median and 95th percentile: Hyndman & Fan (1996) definition 7, linear interpolation between
  order statistics at h = (n - 1) p (numpy's default, spreadsheet PERCENTILE.INC).
- coverage: covered seconds of the period / seconds of the period inside the requested span.
- hour-of-day profile and weekday/weekend split: power-domain mean of the complete block values
  (RMS of E), in the station's time zone; weeks start on Monday (ISO 8601).
"""

from __future__ import annotations

import datetime as _dt
import math
from dataclasses import dataclass
from zoneinfo import ZoneInfo

import numpy as np

from meterlink.physics.units import Z0_OHM

PERIODS = ("day", "week", "month")
PERCENTILE_METHOD = "Hyndman-Fan definition 7 (linear between order statistics)"


@dataclass(frozen=True)
class Reference:
    """The limit set the percentages refer to."""

    standard: str
    tier: str
    e_ref_v_per_m: float
    s_ref_w_per_m2: float
    convention: str          # "field" or "power"

    def pct(self, e_v_per_m):
        """Percent of the reference level in the convention, from RMS field values."""
        e = np.asarray(e_v_per_m, dtype=float)
        if self.convention == "field":
            return 100.0 * e / self.e_ref_v_per_m
        return 100.0 * (e * e / Z0_OHM) / self.s_ref_w_per_m2

    def label(self) -> str:
        what = "field (E/E_ref)" if self.convention == "field" else "power density (S/S_ref, S = E^2/Z0)"
        return f"{self.standard} {self.tier}: percent of the {what} reference level"


def quantile7(x, p: float) -> float:
    """Hyndman-Fan definition 7 quantile of x at probability p (NaN for no data)."""
    x = np.sort(np.asarray(x, dtype=float))
    if x.size == 0:
        return math.nan
    h = (x.size - 1) * p
    lo = math.floor(h)
    hi = min(lo + 1, x.size - 1)
    return float(x[lo] + (h - lo) * (x[hi] - x[lo]))


def _period_start(d: _dt.datetime, period: str) -> _dt.datetime:
    d = d.replace(hour=0, minute=0, second=0, microsecond=0)
    if period == "week":
        d -= _dt.timedelta(days=d.weekday())
    elif period == "month":
        d = d.replace(day=1)
    return d


def _next(d: _dt.datetime, period: str) -> _dt.datetime:
    if period == "day":
        n = d + _dt.timedelta(days=1)
    elif period == "week":
        n = d + _dt.timedelta(days=7)
    else:
        n = d.replace(year=d.year + (d.month == 12), month=d.month % 12 + 1)
    return n.replace(tzinfo=d.tzinfo)


def _label(d: _dt.datetime, period: str) -> str:
    if period == "day":
        return d.strftime("%Y-%m-%d")
    if period == "week":
        y, w, _ = d.isocalendar()
        return f"{y}-W{w:02d}"
    return d.strftime("%Y-%m")


def _ts(d: _dt.datetime) -> float:
    return d.timestamp()


def _summary(ref: Reference, e: np.ndarray) -> dict:
    """max, min, median, p95 in the convention quantity, with E and percent."""
    q = e if ref.convention == "field" else e * e / Z0_OHM
    if q.size == 0:
        return {"n_blocks": 0}
    out = {"n_blocks": int(q.size)}
    for name, v in (("max", float(q.max())), ("min", float(q.min())), ("median", quantile7(q, 0.5)),
                    ("p95", quantile7(q, 0.95))):
        ev = v if ref.convention == "field" else math.sqrt(v * Z0_OHM)
        out[f"{name}_e_v_per_m"] = ev
        out[f"{name}_pct"] = float(ref.pct(ev))
    return out


def _power_mean(e: np.ndarray) -> float:
    return float(np.sqrt(np.mean(e * e))) if e.size else math.nan


def _period_bounds(t0_s: float, t1_s: float, period: str, tz) -> list[tuple[str, float, float]]:
    """(label, start, end) of every period overlapping [t0_s, t1_s), clipped to it."""
    out = []
    p = _period_start(_dt.datetime.fromtimestamp(t0_s, tz), period)
    while _ts(p) < t1_s:
        n = _next(p, period)
        out.append((_label(p, period), max(_ts(p), t0_s), min(_ts(n), t1_s)))
        p = n
    return out


def _sorted_by_time(t: np.ndarray, *arrays):
    """The arrays in time order (stable: equal times keep their order); unchanged when already sorted."""
    if t.size < 2 or not np.any(t[1:] < t[:-1]):
        return (t, *arrays)
    order = np.argsort(t, kind="stable")
    return (t[order], *(a[order] for a in arrays))


def period_bounds(t0_s: float, t1_s: float, period: str, timezone: str = "UTC") -> list[tuple[str, float, float]]:
    """(label, start_utc, end_utc) of each day, week or month (station time zone) overlapping [t0_s, t1_s),
    clipped to it."""
    if period not in PERIODS:
        raise ValueError(f"period must be one of {PERIODS}")
    return _period_bounds(t0_s, t1_s, period, ZoneInfo(timezone))


def period_stats(ref: Reference, t_start_s, e_rms_v_per_m, covered_s, complete, t0_s: float, t1_s: float,
                 period: str, timezone: str = "UTC", running=None, running_max=None) -> list[dict]:
    """One summary per period overlapping [t0_s, t1_s). ``running`` maps window_s -> (t_block_s, e_max)
    arrays of the largest complete running average inside each block; or ``running_max`` maps window_s
    -> the largest of them in each period of :func:`period_bounds` (None where there is none), as a
    database aggregate gives them.

    One pass: the blocks are put in time order once and each period is a slice found with
    np.searchsorted, so the work grows with the number of blocks, not blocks times periods."""
    if period not in PERIODS:
        raise ValueError(f"period must be one of {PERIODS}")
    tz = ZoneInfo(timezone)
    t = np.asarray(t_start_s, dtype=float)
    e = np.asarray(e_rms_v_per_m, dtype=float)
    cov = np.asarray(covered_s, dtype=float)
    ok = np.asarray(complete, dtype=bool) & np.isfinite(e)
    t, e, cov, ok = _sorted_by_time(t, e, cov, ok)
    bounds = _period_bounds(t0_s, t1_s, period, tz)
    starts = np.array([a for _, a, _ in bounds], dtype=float)
    ends = np.array([b for _, _, b in bounds], dtype=float)
    # period k holds the blocks with t in [start_k, end_k): one slice of the sorted times
    lo = np.searchsorted(t, starts, side="left")
    hi = np.searchsorted(t, ends, side="left")
    runs = []
    for ws, (tr, emax) in sorted((running or {}).items()):
        tr, emax = _sorted_by_time(np.asarray(tr, dtype=float), np.asarray(emax, dtype=float))
        fin = np.isfinite(emax)
        tr, emax = tr[fin], emax[fin]
        runs.append((ws, emax, np.searchsorted(tr, starts, side="left"), np.searchsorted(tr, ends, side="left")))
    given = sorted((running_max or {}).items())
    out = []
    for k, (label, a, b) in enumerate(bounds):
        i0, i1 = int(lo[k]), int(hi[k])
        row = {"period": label, "start_utc": a, "end_utc": b,
               "coverage": float(cov[i0:i1].sum() / (b - a)) if b > a else 0.0}
        ek = e[i0:i1]
        row.update(_summary(ref, ek[ok[i0:i1]]))
        for ws, emax, r_lo, r_hi in runs:
            j0, j1 = int(r_lo[k]), int(r_hi[k])
            v = float(emax[j0:j1].max()) if j1 > j0 else None
            row[f"running_{ws:g}s_max_e_v_per_m"] = v
            row[f"running_{ws:g}s_max_pct"] = None if v is None else float(ref.pct(v))
        for ws, vals in given:
            v = None if vals[k] is None else float(vals[k])
            row[f"running_{ws:g}s_max_e_v_per_m"] = v
            row[f"running_{ws:g}s_max_pct"] = None if v is None else float(ref.pct(v))
        out.append(row)
    return out


def _utc_offsets_s(t: np.ndarray, tz) -> np.ndarray:
    """UTC offset (s) of the time zone at each time t: offsets are looked up on a 6-hour grid and
    each change is located to the second by bisection, so a year costs a few thousand look-ups,
    not one per block (tz database transitions fall on whole seconds)."""
    def off(x: float) -> float:
        return _dt.datetime.fromtimestamp(x, tz).utcoffset().total_seconds()

    if t.size == 0:
        return np.zeros(0)
    step = 6 * 3600.0
    g0 = math.floor(float(t.min()) / step) * step
    grid = np.arange(g0, float(t.max()) + step, step)
    offs = [off(float(g)) for g in grid]
    starts, values = [-math.inf], [offs[0]]
    for k in range(1, len(grid)):
        if offs[k] != offs[k - 1]:
            a, b = int(grid[k - 1]), int(grid[k])        # off(a) is the old offset, off(b) the new
            while b - a > 1:
                m = (a + b) // 2
                a, b = (m, b) if off(m) == offs[k - 1] else (a, m)
            starts.append(float(b))
            values.append(offs[k])
    idx = np.searchsorted(np.array(starts), t, side="right") - 1
    return np.array(values)[idx]


def _local_hour_weekday(t: np.ndarray, tz) -> tuple[np.ndarray, np.ndarray]:
    """Local hour (0..23) and weekday (Monday 0) of each time, as datetime.fromtimestamp(t, tz) gives
    them (times rounded to the microsecond as it does); vectorised."""
    local = np.round(t, 6) + _utc_offsets_s(t, tz)
    day = np.floor(local / 86400.0)
    hour = np.floor((local - day * 86400.0) / 3600.0).astype(int)
    weekday = ((day.astype(np.int64) + 3) % 7).astype(int)    # 1970-01-01 was a Thursday
    return hour, weekday


def profiles(ref: Reference, t_start_s, e_rms_v_per_m, complete, timezone: str = "UTC") -> dict:
    """Hour-of-day profile (24 power means) and weekday/weekend split of complete blocks."""
    tz = ZoneInfo(timezone)
    t = np.asarray(t_start_s, dtype=float)
    e = np.asarray(e_rms_v_per_m, dtype=float)
    ok = np.asarray(complete, dtype=bool) & np.isfinite(e)
    t, e = t[ok], e[ok]
    hour, wd = _local_hour_weekday(t, tz)
    weekend = wd >= 5
    hours = []
    for h in range(24):
        eh = e[hour == h]
        v = _power_mean(eh)
        hours.append({"hour": h, "n_blocks": int(eh.size), "mean_e_v_per_m": None if math.isnan(v) else v,
                      "mean_pct": None if math.isnan(v) else float(ref.pct(v))})
    split = {}
    for name, m in (("weekday", ~weekend), ("weekend", weekend)):
        v = _power_mean(e[m])
        split[name] = {"n_blocks": int(m.sum()), "mean_e_v_per_m": None if math.isnan(v) else v,
                       "mean_pct": None if math.isnan(v) else float(ref.pct(v)), **_summary(ref, e[m])}
    return {"hour_of_day": hours, "weekday_weekend": split}


_BARS = " ▁▂▃▄▅▆▇█"


def sparkline(values) -> str:
    """A one-line bar chart of values (None/NaN shown as a space)."""
    v = np.array([np.nan if x is None else x for x in values], dtype=float)
    if not np.isfinite(v).any():
        return " " * v.size
    top = np.nanmax(v)
    chars = []
    for x in v:
        if not np.isfinite(x):
            chars.append(" ")
        else:
            chars.append(_BARS[max(1, int(round(x / top * (len(_BARS) - 1)))) if top > 0 else 1])
    return "".join(chars)
