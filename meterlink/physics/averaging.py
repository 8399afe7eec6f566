"""Time-averaged exposure in the power domain, for irregular records with gaps (pure).

Reference levels are time averages of power-like quantities: a field (E or H) is averaged as
its square and the root taken afterwards (RMS over time), power density S is averaged linearly.
The ``*_s`` functions do the latter. Sampling model: each sample holds its value from its own
time until the next sample, but never longer than ``max_hold_s`` (default ``HOLD_FACTOR`` times
the median sample interval); the last sample holds for one median interval (capped the same
way). Time covered by no held sample is a gap: it is never filled with zeros. Each window
reports its coverage (covered seconds / window seconds); below ``min_coverage`` it is flagged
incomplete, and its value is still the average over the covered time. A time average over T is
a window of length T inside the record: a window reaching before the first sample or past the
end of the last hold (the start and end of a record) is flagged ``partial`` and is never
complete, whatever its coverage; its value is reported separately, labelled as partial.

Speed and precision: one O(n) pass builds cumulative integrals of p*dt (p = E^2 or S); window
averages are differences of that integral located with ``np.searchsorted``, done in chunks so
memory stays bounded by the outputs. Windows ending at the samples themselves share one pass
over the samples both ends span, and on regular stretches the window start is a constant index
offset (checked, no search). The cumulative sum restarts every ``_BLOCK`` samples and
the block offsets are carried as a compensated (two-float) sum, so a window far into a year-long
record loses no digits to the size of the running total. What remains is the rounding of a
cumulative sum inside one block: the absolute error of a window's mean of p is a few float64
ulps of max(p) times (block duration / window), negligible unless p spans ~14 decades.

Running averages ending at the sample times (``at_s`` not given, the common case) take a fused
path (:mod:`meterlink.physics.averaging_fast`): one forward pass in cache-sized chunks that does
the checks, the integrals and the window values together, with the same results within rounding
(a property test compares the two); whatever it does not handle is done by the general path.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from meterlink.errors import MeterlinkError
from meterlink.physics import averaging_fast

#: Default minimum coverage of a complete window (90 % of the window's seconds held by samples).
DEFAULT_MIN_COVERAGE = 0.9
#: Default longest hold, as a multiple of the median sample interval.
HOLD_FACTOR = 3.0
#: Default block length for fixed blocks: 6 minutes, 240 blocks a day.
BLOCK_S = 360.0

_BLOCK = 4096          # samples per cumulative-sum block (precision)
_SPAN = 1 << 20        # samples per evaluation pass (memory)
_QCHUNK = 1 << 18      # window ends per pass (memory)
_MEDIAN_SAMPLES = 2_000_000
_COVER_TOL = 1e-9      # coverage comparisons tolerate rounding of covered seconds
_FAST = True           # windows at the sample times: fused one-pass path (averaging_fast)
_FAST_CHUNK_BLOCKS = 16  # blocks per chunk of that path (64k samples: its steps stay in cache)


def _median_interval(t: np.ndarray) -> float:
    """Median sample interval (from evenly spaced intervals when the record is very long)."""
    n = t.size
    if n < 2:
        return 0.0
    if n - 1 <= _MEDIAN_SAMPLES:
        d = np.diff(t)
    else:
        idx = np.linspace(0, n - 2, _MEDIAN_SAMPLES).astype(np.int64)
        d = t[idx + 1] - t[idx]
    lo, hi = float(d.min()), float(d.max())
    if lo == hi:                     # evenly spaced: the median without sorting (NaN fails this test)
        return lo
    return float(np.median(d))


class _Held:
    """A record held piecewise constant, with block-compensated cumulative integrals of p*dt."""

    def __init__(self, t_s, x, max_hold_s, square: bool, what: str):
        t = np.asarray(t_s, dtype=np.float64)
        x = np.asarray(x, dtype=np.float64)
        if t.ndim != 1 or x.shape != t.shape:
            raise MeterlinkError(f"{what}: times and values must be 1-D arrays of equal length "
                                 f"(got {t.shape} and {x.shape})")
        n = t.size
        if n == 0:
            raise MeterlinkError(f"{what}: no samples")
        self.t, self.x, self.n, self.square = t, x, n, square
        med = _median_interval(t)
        if max_hold_s is None:
            if not med > 0:
                raise MeterlinkError(f"{what}: cannot infer the hold time from the sample times; "
                                     "give max_hold_s")
            hold = HOLD_FACTOR * med
        else:
            hold = float(max_hold_s)
            if not (np.isfinite(hold) and hold > 0):
                raise MeterlinkError(f"{what}: max_hold_s must be a positive number, got {max_hold_s!r}")
        self.hold = hold
        self.last_hold = min(med, hold) if med > 0 else hold
        self._first_pass(what)

    def _p(self, s: int, e: int) -> np.ndarray:
        v = self.x[s:e]
        return v * v if self.square else v.copy()

    def _hold(self, s: int, e: int) -> np.ndarray:
        """Hold durations d_i = min(t_{i+1} - t_i, hold) for samples s..e-1."""
        t = self.t
        if e < self.n:
            return np.minimum(t[s + 1:e + 1] - t[s:e], self.hold)
        d = np.empty(e - s)
        d[:-1] = np.minimum(t[s + 1:e] - t[s:e - 1], self.hold)
        d[-1] = self.last_hold
        return d

    def _first_pass(self, what: str) -> None:
        n, t = self.n, self.t
        totals, gap_idx, gap_amt = [], [], []
        for s in range(0, n, _SPAN):
            e = min(s + _SPAN, n)
            tc = t[s:min(e + 1, n)]
            if not np.all(np.isfinite(tc)):
                raise MeterlinkError(f"{what}: sample times must be finite")
            dt = np.diff(tc)
            if np.any(dt < 0):
                k = s + int(np.argmax(dt < 0)) + 1
                raise MeterlinkError(f"{what}: sample times must not decrease (sample {k})")
            p = self._p(s, e)
            if not np.all(np.isfinite(p)) or np.any(p < 0):
                k = s + int(np.argmax(~(np.isfinite(p) & (p >= 0))))
                raise MeterlinkError(f"{what}: sample {k} is not a finite, non-negative value")
            gaps = np.nonzero(dt > self.hold)[0]
            gap_idx.append(gaps + s)
            gap_amt.append(dt[gaps] - self.hold)
            p *= self._hold(s, e)
            totals.append(np.add.reduceat(p, np.arange(0, e - s, _BLOCK)))
        # Block offsets as a compensated two-float prefix sum (Neumaier).
        tot = np.concatenate(totals)
        hi = np.zeros(tot.size + 1)
        lo = np.zeros(tot.size + 1)
        s_hi = s_lo = 0.0
        for k, v in enumerate(tot.tolist()):
            u = s_hi + v
            s_lo += (s_hi - u) + v if abs(s_hi) >= abs(v) else (v - u) + s_hi
            s_hi = u
            hi[k + 1], lo[k + 1] = s_hi, s_lo
        self.off_hi, self.off_lo = hi, lo
        self.gap_idx = np.concatenate(gap_idx)
        self.gap_cum = np.concatenate(([0.0], np.cumsum(np.concatenate(gap_amt))))
        self.t_end = float(t[-1]) + self.last_hold
        self.cover_eps = 16.0 * np.finfo(np.float64).eps * (self.t_end - float(t[0]) + abs(float(t[0])))

    def integrals(self, q: np.ndarray, i: np.ndarray | None = None):
        """For sorted times q: (hi, rest, covered) with integral of p from t_0 to q = hi + rest.

        ``i`` may give the index of the last sample at or before each q (skips the search)."""
        t, n = self.t, self.n
        at_samples = i is not None      # q[k] == t[i[k]]: nothing of sample i held yet
        if i is None:
            # Search only the stretch of t that the sorted queries can fall in: far faster.
            a0 = max(int(np.searchsorted(t, q[0], side="right")) - 1, 0)
            a1 = int(np.searchsorted(t, q[-1], side="right"))
            i = np.searchsorted(t[a0:a1], q, side="right") + (a0 - 1)
        before = i < 0
        ic = np.maximum(i, 0)
        hi = np.empty(q.size)
        rest = np.empty(q.size)
        cov = np.empty(q.size)
        k = 0
        while k < q.size:
            a = int(ic[k])
            kend = max(int(np.searchsorted(ic, a + _SPAN, side="left")), k + 1)
            ii = ic[k:kend]
            b = int(ii[-1])
            s0 = (a // _BLOCK) * _BLOCK
            e0 = min((b // _BLOCK + 1) * _BLOCK, n)
            d = self._hold(s0, e0)
            p = self._p(s0, e0)
            w = np.zeros(-(-(e0 - s0) // _BLOCK) * _BLOCK)
            np.multiply(p, d, out=w[:e0 - s0])
            w = w.reshape(-1, _BLOCK)
            loc = np.zeros_like(w)
            np.cumsum(w[:, :-1], axis=1, out=loc[:, 1:])
            loc = loc.ravel()
            # Consecutive samples: slices instead of gathers. Sorted indices spanning size-1 are
            # consecutive only without repeats ([3, 3, 5] spans 3 too).
            if b - a + 1 == ii.size and (ii.size < 2 or bool(np.all(ii[1:] != ii[:-1]))):
                j = slice(a - s0, b - s0 + 1)
                ti = t[a:b + 1]
                blk = np.repeat(np.arange(a // _BLOCK, b // _BLOCK + 1), _BLOCK)
                blk = blk[a - (a // _BLOCK) * _BLOCK:][:ii.size]
            else:
                j = ii - s0
                ti = t[ii]
                blk = ii // _BLOCK
            hi[k:kend] = self.off_hi[blk]
            r = rest[k:kend]
            c = cov[k:kend]
            np.subtract(ti, t[0], out=c)
            if at_samples:
                np.add(loc[j], self.off_lo[blk], out=r)
            else:
                part = q[k:kend] - ti
                np.clip(part, 0.0, d[j], out=part)
                np.multiply(p[j], part, out=r)
                r += loc[j]
                r += self.off_lo[blk]
                c += part
            if self.gap_idx.size:
                c -= self.gap_cum[np.searchsorted(self.gap_idx, ii, side="left")]
            k = kend
        hi[before] = 0.0
        rest[before] = 0.0
        cov[before] = 0.0
        return hi, rest, cov

    def sample_windows(self, k0: int, k1: int, window_s: float):
        """(energy, covered) of the windows (t_k - window_s, t_k] for samples k0..k1-1, or None.

        Both window ends share one pass over the samples they span. On a regular stretch the
        start index is a constant offset (checked with slices, no search). None when the span
        is too long for bounded memory: use ``between``."""
        t, n, B = self.t, self.n, _BLOCK
        tk = t[k0:k1]
        q0 = tk - window_s
        i00 = int(np.searchsorted(t, q0[0], side="right")) - 1
        m = k0 - i00
        regular = (i00 >= 0 and k1 - m < n and np.all(t[i00:k1 - m] <= q0)
                   and np.all(q0 < t[i00 + 1:k1 - m + 1]))
        if regular:
            i0 = None
            lo = i00
        else:
            a0 = max(i00, 0)
            a1 = int(np.searchsorted(t, q0[-1], side="right"))
            i0 = np.searchsorted(t[a0:a1], q0, side="right") + (a0 - 1)
            lo = max(int(i0[0]), 0)
        s0 = (lo // B) * B
        e0 = min(((k1 - 1) // B + 1) * B, n)
        if e0 - s0 > _SPAN:
            return None
        nb = -(-(e0 - s0) // B)
        d = self._hold(s0, e0)
        p = self._p(s0, e0)
        w = np.zeros(nb * B)
        np.multiply(p, d, out=w[:e0 - s0])
        w = w.reshape(nb, B)
        loc = np.empty_like(w)
        loc[:, 0] = 0.0
        np.cumsum(w[:, :-1], axis=1, out=loc[:, 1:])
        del w
        b0 = s0 // B
        oh = np.empty_like(loc)
        oh[...] = self.off_hi[b0:b0 + nb, None]
        ol = np.empty_like(loc)
        ol[...] = self.off_lo[b0:b0 + nb, None]
        loc, oh, ol = loc.ravel(), oh.ravel(), ol.ravel()
        j1 = slice(k0 - s0, k1 - s0)
        if regular:
            j0 = slice(i00 - s0, k1 - m - s0)
            ti0 = t[i00:k1 - m]
        else:
            before = i0 < 0
            ic = np.maximum(i0, 0)
            j0 = ic - s0
            ti0 = t[ic]
        # Start of each window: the part of sample i0 held after q0 (as in integrals()).
        part = q0
        part -= ti0
        np.clip(part, 0.0, d[j0], out=part)
        r0 = p[j0] * part
        r0 += loc[j0]
        r0 += ol[j0]
        h0 = oh[j0]
        c0 = np.subtract(ti0, t[0])
        c0 += part
        if self.gap_idx.size:
            c0 -= self.gap_cum[np.searchsorted(self.gap_idx, np.arange(i00, k1 - m) if regular else ic,
                                               side="left")]
        if not regular:
            h0[before] = 0.0
            r0[before] = 0.0
            c0[before] = 0.0
        energy = np.subtract(oh[j1], h0)
        r1 = np.add(loc[j1], ol[j1])
        r1 -= r0
        energy += r1
        np.maximum(energy, 0.0, out=energy)
        c1 = np.subtract(tk, t[0])
        if self.gap_idx.size:
            c1 -= self.gap_cum[np.searchsorted(self.gap_idx, np.arange(k0, k1), side="left")]
        c1 -= c0
        c1[c1 <= self.cover_eps] = 0.0
        return energy, c1

    def between(self, q0: np.ndarray, q1: np.ndarray, i1: np.ndarray | None = None):
        """Integral of p and covered seconds over [q0, q1] (both sorted; i1 as in integrals)."""
        h1, r1, c1 = self.integrals(q1, i1)
        h0, r0, c0 = self.integrals(q0)
        energy = (h1 - h0) + (r1 - r0)
        covered = c1 - c0
        # Covered seconds are differences of times since t_0: a few ulps of the record span
        # are rounding, not coverage (else 0/0 noise would become a value).
        covered[covered <= self.cover_eps] = 0.0
        return np.maximum(energy, 0.0), covered


def _check_window(window_s, min_coverage) -> tuple[float, float]:
    w = float(window_s)
    if not (np.isfinite(w) and w > 0):
        raise MeterlinkError(f"averaging window must be a positive number of seconds, got {window_s!r}")
    m = float(min_coverage)
    if not (0.0 < m <= 1.0):
        raise MeterlinkError(f"min_coverage must be in (0, 1], got {min_coverage!r}")
    return w, m


def _ends(held: _Held, at_s):
    """Window end times (read-only), and the order that sorts them (None if already sorted)."""
    if at_s is None:
        ends = held.t.view()
    else:
        ends = np.array(at_s, dtype=np.float64, ndmin=1)
        if ends.ndim != 1 or not np.all(np.isfinite(ends)):
            raise MeterlinkError("window end times at_s must be a 1-D array of finite seconds")
    ends.flags.writeable = False
    order = None
    if ends.size > 1 and np.any(ends[1:] < ends[:-1]):
        order = np.argsort(ends, kind="stable")
    return ends, order


def _window_chunks(held: _Held, ends_sorted: np.ndarray, window_s: float, at_samples: bool):
    """Yield (k0, k1, mean_p, coverage) over chunks of sorted window ends; mean_p is NaN if empty.

    With at_samples the ends are the sample times themselves, so their indices are known."""
    for k0 in range(0, ends_sorted.size, _QCHUNK):
        k1 = min(k0 + _QCHUNK, ends_sorted.size)
        q1 = ends_sorted[k0:k1]
        got = held.sample_windows(k0, k1, window_s) if at_samples else None
        if got is None:
            i1 = np.arange(k0, k1) if at_samples else None
            got = held.between(q1 - window_s, q1, i1)
        energy, covered = got
        with np.errstate(invalid="ignore", divide="ignore"):
            mean = np.where(covered > 0, energy / covered, np.nan)
        yield k0, k1, mean, np.minimum(covered / window_s, 1.0)


@dataclass(frozen=True)
class RunningAverage:
    """Running RMS of a field (E in V/m, or H in A/m) over a sliding window ending at t_end_s."""

    t_end_s: np.ndarray
    e_rms_v_per_m: np.ndarray
    coverage: np.ndarray
    complete: np.ndarray
    window_s: float
    partial: np.ndarray | None = None   # window reaches outside the record (start or end)


@dataclass(frozen=True)
class RunningAverageS:
    """Running linear mean of power density S (W/m^2) over a sliding window ending at t_end_s."""

    t_end_s: np.ndarray
    s_w_per_m2: np.ndarray
    coverage: np.ndarray
    complete: np.ndarray
    window_s: float
    partial: np.ndarray | None = None   # window reaches outside the record (start or end)


def _fast_running(t_s, x, square, w, m, max_hold_s):
    """The fused path for windows at the sample times, or None where it does not apply."""
    t = np.asarray(t_s, dtype=np.float64)
    x = np.asarray(x, dtype=np.float64)
    if t.ndim != 1 or x.shape != t.shape or t.size < 2:
        return None
    med = _median_interval(t)
    if max_hold_s is None:
        if not med > 0:
            return None
        hold = HOLD_FACTOR * med
    else:
        hold = float(max_hold_s)
        if not (np.isfinite(hold) and hold > 0):
            return None
    last_hold = min(med, hold) if med > 0 else hold
    got = averaging_fast.running_at_samples(t, x, square, w, m, hold, last_hold, _COVER_TOL, _BLOCK,
                                            _FAST_CHUNK_BLOCKS, _SPAN)
    if got is None:
        return None
    ends = t.view()
    ends.flags.writeable = False
    mean, cov, ok, partial = got
    return ends, mean, cov, ok, w, partial


def _running(t_s, x, square, what, window_s, min_coverage, max_hold_s, at_s):
    """(ends, mean (RMS if square), coverage, complete, window, partial) of a running average."""
    if at_s is None and _FAST:
        try:
            w, m = _check_window(window_s, min_coverage)
        except MeterlinkError:
            w = None                         # reported after the record's own checks, as below
        if w is not None:
            got = _fast_running(t_s, x, square, w, m, max_hold_s)
            if got is not None:
                return got
    held = _Held(t_s, x, max_hold_s, square, what)
    w, m = _check_window(window_s, min_coverage)
    ends, order = _ends(held, at_s)
    srt = ends if order is None else ends[order]
    mean = np.empty(ends.size)
    cov = np.empty(ends.size)
    for k0, k1, mp, c in _window_chunks(held, srt, w, at_s is None):
        mean[k0:k1] = mp
        cov[k0:k1] = c
    if order is not None:
        mean[order] = mean.copy()
        cov[order] = cov.copy()
    if square:
        np.sqrt(mean, out=mean)
    partial = _partial(held, ends - w, ends)
    return ends, mean, cov, (cov >= m - _COVER_TOL) & ~partial, w, partial


def _partial(held, start_s, end_s) -> np.ndarray:
    """Windows [start, end] that reach before the first sample or past the end of the last hold."""
    tol = held.cover_eps
    return (np.asarray(start_s) < held.t[0] - tol) | (np.asarray(end_s) > held.t_end + tol)


def running_average(t_s, e_v_per_m, window_s, *, min_coverage=DEFAULT_MIN_COVERAGE,
                    max_hold_s=None, at_s=None) -> RunningAverage:
    """Sliding-window RMS of a field, sqrt(time-weighted mean of E^2), ending at each sample time
    (the window is (t_end - window_s, t_end]) or at each of ``at_s``."""
    return RunningAverage(*_running(t_s, e_v_per_m, True, "running average", window_s, min_coverage,
                                    max_hold_s, at_s))


def running_average_s(t_s, s_w_per_m2, window_s, *, min_coverage=DEFAULT_MIN_COVERAGE,
                      max_hold_s=None, at_s=None) -> RunningAverageS:
    """Sliding-window time-weighted linear mean of power density S (no root)."""
    return RunningAverageS(*_running(t_s, s_w_per_m2, False, "running average", window_s, min_coverage,
                                     max_hold_s, at_s))


def _one_window(held, t0_s, t1_s):
    t0, t1 = float(t0_s), float(t1_s)
    if not (np.isfinite(t0) and np.isfinite(t1) and t1 > t0):
        raise MeterlinkError(f"window must have t1_s > t0_s, got [{t0_s!r}, {t1_s!r}]")
    energy, covered = held.between(np.array([t0]), np.array([t1]))
    mean = float(energy[0] / covered[0]) if covered[0] > 0 else float("nan")
    return mean, min(float(covered[0]) / (t1 - t0), 1.0)


def window_rms(t_s, e_v_per_m, t0_s, t1_s, *, max_hold_s=None) -> tuple[float, float]:
    """(RMS field over the covered part of [t0_s, t1_s], coverage 0..1); NaN if nothing covered."""
    mean, cov = _one_window(_Held(t_s, e_v_per_m, max_hold_s, True, "window"), t0_s, t1_s)
    return float(np.sqrt(mean)), cov


def window_mean_s(t_s, s_w_per_m2, t0_s, t1_s, *, max_hold_s=None) -> tuple[float, float]:
    """(linear mean of S over the covered part of [t0_s, t1_s], coverage 0..1)."""
    return _one_window(_Held(t_s, s_w_per_m2, max_hold_s, False, "window"), t0_s, t1_s)


@dataclass(frozen=True)
class Blocks:
    """Fixed, back-to-back averaging blocks [t_start_s, t_end_s) aligned to an origin."""

    t_start_s: np.ndarray
    t_end_s: np.ndarray
    value: np.ndarray        # RMS field (V/m or A/m) or, for blocks_s, mean S (W/m^2)
    coverage: np.ndarray
    complete: np.ndarray
    block_s: float
    quantity: str            # "field rms" or "power density mean"
    partial: np.ndarray | None = None   # block reaches outside the record (start or end)


def _blocks(held, block_s, origin_s, min_coverage, quantity):
    b, m = _check_window(block_s, min_coverage)
    origin = float(origin_s)
    k0 = int(np.floor((held.t[0] - origin) / b))
    k1 = int(np.ceil((held.t_end - origin) / b))
    edges = origin + np.arange(k0, max(k1, k0 + 1) + 1) * b
    energy, covered = held.between(edges[:-1], edges[1:])
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(covered > 0, energy / covered, np.nan)
    cov = np.minimum(covered / b, 1.0)
    value = np.sqrt(mean) if quantity == "field rms" else mean
    partial = _partial(held, edges[:-1], edges[1:])
    return Blocks(edges[:-1], edges[1:], value, cov, (cov >= m - _COVER_TOL) & ~partial, b, quantity, partial)


def block_averages(t_s, e_v_per_m, block_s=BLOCK_S, *, origin_s=0.0,
                   min_coverage=DEFAULT_MIN_COVERAGE, max_hold_s=None) -> Blocks:
    """RMS field in fixed blocks (default 6 min, 240 a day) aligned to origin_s, over the record."""
    held = _Held(t_s, e_v_per_m, max_hold_s, True, "block averages")
    return _blocks(held, block_s, origin_s, min_coverage, "field rms")


def block_averages_s(t_s, s_w_per_m2, block_s=BLOCK_S, *, origin_s=0.0,
                     min_coverage=DEFAULT_MIN_COVERAGE, max_hold_s=None) -> Blocks:
    """Linear mean of power density in fixed blocks aligned to origin_s."""
    held = _Held(t_s, s_w_per_m2, max_hold_s, False, "block averages")
    return _blocks(held, block_s, origin_s, min_coverage, "power density mean")


@dataclass(frozen=True)
class ExposureSummary:
    """Peak sample and highest complete running average of a record (field: V/m; S: W/m^2)."""

    peak_v_per_m: float
    t_peak_s: float
    max_avg_v_per_m: float       # NaN when no window is complete
    t_max_avg_end_s: float
    window_s: float
    n_complete: int
    n_incomplete: int
    overall_coverage: float      # covered seconds / (first sample .. end of last hold)
    quantity: str = "field rms"  # "power density mean": the two values are S in W/m^2
    max_partial_v_per_m: float = float("nan")   # highest partial window (start/end of record), labelled apart
    n_partial: int = 0


def _summarise(held, window_s, min_coverage, at_s, quantity):
    w, m = _check_window(window_s, min_coverage)
    ends, order = _ends(held, at_s)
    srt = ends if order is None else ends[order]
    best, t_best, n_ok, best_part, n_part = -1.0, float("nan"), 0, -1.0, 0
    for k0, k1, mp, c in _window_chunks(held, srt, w, at_s is None):
        part = _partial(held, srt[k0:k1] - w, srt[k0:k1])
        ok = (c >= m - _COVER_TOL) & np.isfinite(mp) & ~part
        n_ok += int(np.count_nonzero(ok))
        pv = part & np.isfinite(mp)
        n_part += int(np.count_nonzero(part))
        if pv.any():
            best_part = max(best_part, float(np.max(mp[pv])))
        if ok.any():
            j = int(np.argmax(np.where(ok, mp, -1.0)))
            if mp[j] > best:
                best, t_best = float(mp[j]), float(srt[k0 + j])
    ipk = int(np.argmax(held.x))
    span = held.t_end - float(held.t[0])
    _, covered = held.between(np.array([held.t[0]]), np.array([held.t_end]))
    root = np.sqrt if quantity == "field rms" else float
    best_v = float("nan") if best < 0 else root(best)
    part_v = float("nan") if best_part < 0 else root(best_part)
    return ExposureSummary(float(held.x[ipk]), float(held.t[ipk]), float(best_v), t_best, w,
                           n_ok, int(ends.size - n_ok), min(float(covered[0]) / span, 1.0), quantity,
                           float(part_v), n_part)


def summarise(t_s, e_v_per_m, window_s, *, min_coverage=DEFAULT_MIN_COVERAGE, max_hold_s=None,
              at_s=None) -> ExposureSummary:
    """Peak field and the highest RMS over complete windows (with its end time), without keeping
    the whole running average in memory."""
    held = _Held(t_s, e_v_per_m, max_hold_s, True, "summary")
    return _summarise(held, window_s, min_coverage, at_s, "field rms")


def summarise_s(t_s, s_w_per_m2, window_s, *, min_coverage=DEFAULT_MIN_COVERAGE, max_hold_s=None,
                at_s=None) -> ExposureSummary:
    """As :func:`summarise` for power density, averaged linearly (values in W/m^2)."""
    held = _Held(t_s, s_w_per_m2, max_hold_s, False, "summary")
    return _summarise(held, window_s, min_coverage, at_s, "power density mean")
