"""Exposure statistics of a long record fed chunk by chunk, so memory stays bounded (pure).

The sampling model is averaging.py's: each sample holds its power p = E^2 from its time until the
next sample, never longer than the hold time (``HOLD_FACTOR`` median intervals); a window
(t_end - T, t_end] ends at each sample. Windows that span chunk boundaries are exact: the
accumulator carries the samples of the last T seconds (and the one before them) into the next
chunk, so every window sees all of its samples. The hold time needs the median interval of the
whole record, which :class:`IntervalMedian` finds in a first pass over the times alone.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from meterlink.errors import MeterlinkError
from meterlink.physics.averaging import DEFAULT_MIN_COVERAGE, HOLD_FACTOR

#: As averaging._MEDIAN_SAMPLES: beyond this many intervals the median is taken from evenly spaced ones.
MEDIAN_SAMPLES = 2_000_000
_COVER_TOL = 1e-9


class IntervalMedian:
    """Median sample interval of a record of n samples whose times arrive in chunks (as averaging._Held).

    Up to MEDIAN_SAMPLES intervals all are kept; beyond, the same evenly spaced ones averaging.py
    uses, so memory stays at most 2 x 8 x MEDIAN_SAMPLES bytes whatever the record's length.
    """

    def __init__(self, n: int):
        self.n = int(n)
        self._seen = 0
        self._prev: float | None = None
        self.first: float | None = None
        self.last: float | None = None
        self._median: float | None = None
        m = max(self.n - 1, 0)
        # intervals (i, i + 1) kept: all of them, or those at averaging.py's evenly spaced i
        self._idx = np.linspace(0, self.n - 2, MEDIAN_SAMPLES).astype(np.int64) if m > MEDIAN_SAMPLES else None
        self._diffs = np.empty(min(m, MEDIAN_SAMPLES))

    def feed(self, t_s: np.ndarray) -> None:
        t = np.asarray(t_s, dtype=np.float64)
        if t.size == 0:
            return
        if self._seen + t.size > self.n:
            raise MeterlinkError(f"interval median: more than the {self.n} samples announced")
        if self.first is None:
            self.first = float(t[0])
        self.last = float(t[-1])
        k0 = self._seen
        ext = t if self._prev is None else np.concatenate(([self._prev], t))
        base = k0 if self._prev is None else k0 - 1          # sample index of ext[0]
        if self._idx is None:
            d = np.diff(ext)
            self._diffs[base:base + d.size] = d
        else:   # intervals (i, i + 1) with both samples in ext
            a = int(np.searchsorted(self._idx, base, side="left"))
            b = int(np.searchsorted(self._idx, base + ext.size - 1, side="left"))
            sel = self._idx[a:b] - base
            self._diffs[a:b] = ext[sel + 1] - ext[sel]
        self._prev = float(t[-1])
        self._seen += t.size
        self._median = None

    def median_s(self) -> float:
        if self._median is None:
            if self._seen != self.n:
                raise MeterlinkError(f"interval median: {self._seen} samples fed, {self.n} announced")
            self._median = float(np.median(self._diffs)) if self._diffs.size else 0.0
        return self._median


@dataclass(frozen=True)
class FieldStats:
    """What assessing a broadband series needs from its values (assessment.assess_field_stats)."""

    n_finite: int
    peak_v_per_m: float
    t_peak_s: float
    value_v_per_m: float
    t_value_end_s: float | None
    complete: bool
    coverage: float
    partial_max_v_per_m: float | None
    u_max_db: float
    n_above: int
    n_below: int
    freq_out: bool
    freq_assumed: bool


class FieldAccumulator:
    """Peak, highest complete running RMS, partial windows, flags and uncertainty of a field record
    fed in time-ordered chunks (t_s, e_v_per_m, u_expanded_db, flags).

    ``median_s`` is the record's median sample interval (IntervalMedian) and ``t_last_s`` its last
    sample time; both fix the hold time exactly as averaging.running_average derives it.
    """

    def __init__(self, window_s: float | None, median_s: float, t_first_s: float, t_last_s: float,
                 min_coverage: float = DEFAULT_MIN_COVERAGE, above_bit: int = 0, below_bit: int = 0,
                 freq_out_bit: int = 0, freq_assumed_bit: int = 0):
        self.window = None if window_s is None else float(window_s)
        self.min_coverage = float(min_coverage)
        self.median = float(median_s)
        self.hold = HOLD_FACTOR * self.median if self.median > 0 else math.inf
        last_hold = min(self.median, self.hold) if self.median > 0 else self.hold
        self.t_first = float(t_first_s)
        t_end = float(t_last_s) + last_hold
        self.cover_eps = 16.0 * np.finfo(np.float64).eps * (t_end - self.t_first + abs(self.t_first))
        self.bits = (above_bit, below_bit, freq_out_bit, freq_assumed_bit)
        self.counts = [0, 0, 0, 0]
        self.n = 0
        self.peak, self.t_peak = -math.inf, math.nan
        self.u_max = -math.inf
        self.best, self.t_best, self.best_cov = -math.inf, None, 0.0
        self.pmax = -math.inf
        self._tail_t = np.zeros(0)
        self._tail_p = np.zeros(0)
        self._first_value: tuple[float, float] | None = None
        # whole-record mean (no complete window): sum of p * dt over consecutive finite samples
        self._sum_pdt = 0.0
        self._sum_dt = 0.0
        self._last_t: float | None = None
        self._last_p = 0.0
        self._t_prev: float | None = None
        #: optional callable(t_end_s, rms, complete, partial) given each chunk's running averages (a plot)
        self.window_sink = None

    def feed(self, t_s, e_v_per_m, u_expanded_db, flags) -> None:
        t_all = np.asarray(t_s, dtype=np.float64)
        e_all = np.asarray(e_v_per_m, dtype=np.float64)
        fl = np.asarray(flags, dtype=np.int64)
        for j, bit in enumerate(self.bits):
            if bit:
                self.counts[j] += int(np.count_nonzero(fl & bit))
        ok = np.isfinite(e_all)
        if not ok.any():
            return
        t, e = t_all[ok], e_all[ok]
        if self._t_prev is not None and t[0] < self._t_prev or np.any(np.diff(t) < 0):
            raise MeterlinkError("sample times must not decrease")
        self._t_prev = float(t[-1])
        self.u_max = max(self.u_max, float(np.max(np.asarray(u_expanded_db, dtype=np.float64)[ok])))
        i = int(np.argmax(e))
        if e[i] > self.peak:
            self.peak, self.t_peak = float(e[i]), float(t[i])
        if self._first_value is None:
            self._first_value = (float(e[0]), float(t[0]))
        self.n += e.size
        p = e * e
        # uncapped holds for the whole-record mean (used only when no window is complete)
        if self._last_t is not None:
            self._sum_pdt += self._last_p * (float(t[0]) - self._last_t)
            self._sum_dt += float(t[0]) - self._last_t
        if t.size > 1:
            dt = np.diff(t)
            self._sum_pdt += float(np.sum(p[:-1] * dt))
            self._sum_dt += float(np.sum(dt))
        self._last_t, self._last_p = float(t[-1]), float(p[-1])
        if self.window is not None:
            self._windows(t, p)

    def _windows(self, t: np.ndarray, p: np.ndarray) -> None:
        w = self.window
        tt = np.concatenate((self._tail_t, t))
        pp = np.concatenate((self._tail_p, p))
        m0 = self._tail_t.size
        d = np.minimum(np.diff(tt), self.hold)                    # holds of all but the last sample
        energy_to = np.concatenate(([0.0], np.cumsum(pp[:-1] * d)))
        covered_to = np.concatenate(([0.0], np.cumsum(d)))
        tk = tt[m0:]
        q0 = tk - w
        i0 = np.searchsorted(tt, q0, side="right") - 1
        before = i0 < 0
        ic = np.maximum(i0, 0)
        dd = np.append(d, 0.0)[ic]
        part = np.clip(q0 - tt[ic], 0.0, dd)
        e0 = np.where(before, 0.0, energy_to[ic] + pp[ic] * part)
        c0 = np.where(before, 0.0, covered_to[ic] + part)
        energy = np.maximum(energy_to[m0:] - e0, 0.0)
        covered = covered_to[m0:] - c0
        covered[covered <= self.cover_eps] = 0.0
        with np.errstate(invalid="ignore", divide="ignore"):
            rms = np.sqrt(np.where(covered > 0, energy / covered, np.nan))
        cov = np.minimum(covered / w, 1.0)
        partial = q0 < self.t_first - self.cover_eps
        complete = (cov >= self.min_coverage - _COVER_TOL) & ~partial
        if self.window_sink is not None:
            self.window_sink(tk, rms, complete, partial)
        pv = partial & np.isfinite(rms)
        if pv.any():
            self.pmax = max(self.pmax, float(np.max(rms[pv])))
        if complete.any():
            j = int(np.argmax(np.where(complete, rms, -np.inf)))
            if rms[j] > self.best:
                self.best, self.t_best, self.best_cov = float(rms[j]), float(tk[j]), float(cov[j])
        # carry the samples any later window can reach: those after t_last - T, and the one before
        keep = max(int(np.searchsorted(tt, tt[-1] - w, side="right")) - 1, 0)
        self._tail_t, self._tail_p = tt[keep:].copy(), pp[keep:].copy()

    def result(self) -> FieldStats:
        above, below, fout, fass = self.counts
        if self.n == 0:
            return FieldStats(0, math.nan, math.nan, math.nan, None, False, 0.0, None, math.nan,
                              above, below, fout > 0, fass > 0)
        pmax = None
        if self.window is None:
            value, t_end, complete, coverage = self.peak, self.t_peak, True, 1.0
        elif self.n == 1:
            value, t_end = self._first_value
            complete, coverage = False, 0.0
        else:
            pmax = self.pmax if self.pmax > -math.inf else None
            if self.t_best is not None:
                value, t_end, complete, coverage = self.best, self.t_best, True, self.best_cov
            else:       # shorter than the averaging time: power-domain mean over what was recorded
                med = self.median
                value = math.sqrt((self._sum_pdt + self._last_p * med) / (self._sum_dt + med))
                t_end, complete = self._last_t, False
                coverage = min(1.0, (self._sum_dt + med) / self.window)
        return FieldStats(self.n, self.peak, self.t_peak, value, t_end, complete, coverage, pmax, self.u_max,
                          above, below, fout > 0, fass > 0)


class ColumnEnvelope:
    """Per pixel column of [t0, t1]: lowest, highest and rms value, count and first time, fed in
    time-ordered chunks; what a plot of a long record can show (NaN values are skipped)."""

    def __init__(self, t0_s: float, t1_s: float, columns: int = 1000):
        self.t0, self.t1, self.k = float(t0_s), float(t1_s), int(columns)
        self.lo = np.full(self.k, np.inf)
        self.hi = np.full(self.k, -np.inf)
        self.p = np.zeros(self.k)
        self.n = np.zeros(self.k, dtype=np.int64)
        self.t_first = np.full(self.k, np.nan)

    def column_of(self, t_s) -> np.ndarray:
        span = self.t1 - self.t0
        if not span > 0:
            return np.zeros(np.shape(t_s), dtype=np.int64)
        return np.clip(((np.asarray(t_s) - self.t0) / span * self.k).astype(np.int64), 0, self.k - 1)

    def feed(self, t_s, values) -> None:
        t = np.asarray(t_s, dtype=np.float64)
        v = np.asarray(values, dtype=np.float64)
        ok = np.isfinite(v) & np.isfinite(t)
        if not ok.any():
            return
        t, v = t[ok], v[ok]
        col = self.column_of(t)
        # times are sorted, so each column is a run: reduce the runs
        starts = np.flatnonzero(np.r_[True, col[1:] != col[:-1]])
        c = col[starts]
        np.minimum.at(self.lo, c, np.minimum.reduceat(v, starts))
        np.maximum.at(self.hi, c, np.maximum.reduceat(v, starts))
        np.add.at(self.p, c, np.add.reduceat(v * v, starts))
        np.add.at(self.n, c, np.diff(np.r_[starts, v.size]))
        first = np.isnan(self.t_first[c])
        self.t_first[c[first]] = t[starts[first]]

    def columns(self):
        """(t of each column's first value, min, max, rms) over the columns that hold values."""
        has = self.n > 0
        return (self.t_first[has], self.lo[has], self.hi[has],
                np.sqrt(self.p[has] / self.n[has]))
