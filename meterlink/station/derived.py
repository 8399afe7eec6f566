"""Derived series kept up to date as readings arrive: fixed 6-minute blocks and running averages.

Everything is in the power domain: a field E is accumulated as the integral of E^2 dt and the
root is taken only when a value is read out (RMS over time). The sampling model is that of
:mod:`meterlink.physics.averaging`: a sample holds its value until the next sample, never longer than
``hold_s`` (3 nominal intervals); uncovered time is a gap, never a zero. The tables live next to
the Store's own (schema version 5, meterlink/storage/schema.py; docs/schema.md) and are written in the same
transaction as the readings they come from, so a crash leaves them consistent.
"""

from __future__ import annotations

import math
from array import array
from bisect import bisect_left
from dataclasses import dataclass, field

import numpy as np

from meterlink.storage.schema import monitoring_statements


def ensure_schema(conn) -> None:
    """Create the monitoring tables on a bare connection (idempotent). A file opened by the Store has
    them already: they are schema version 5 (meterlink/storage/schema.py, MONITORING_SQL)."""
    for stmt in monitoring_statements():
        conn.execute(stmt)


class SlidingWindow:
    """Energy and covered time of held segments within (t_end - window_s, t_end], in bounded memory.

    Contiguous held segments are merged as they are stored into bins of width
    ``bin_s = window_s / 3600`` (24 s for a day, 0.5 s for 30 min, 0.1 s for 6 min): a stored segment
    is either one held segment that crosses a bin edge, or the run of contiguous segments lying within
    one bin, kept as (t0, t1, p) with p = energy / (t1 - t0), so its energy (sum of p dt) and covered
    time are those of the run. A gap is never merged over: uncovered time stays a gap, never a zero.
    A window therefore holds at most about 2 x 3600 segments (plus one per gap) whatever the reading
    rate. Totals stay exact (to rounding); only the part cut off the one segment straddling the window
    start (t_end - window_s) is taken pro rata, which moves the window's energy by at most
    bin_s x p_max, p_max the largest value held in that bin. The relative error of the window mean is
    therefore at most ``bin_s / covered_s x p_max / p_mean`` (``bin_s / window_s x p_max / p_mean`` at
    full coverage; half that for the RMS field), p_mean the window mean; a window start on a bin edge,
    or in a segment that crosses one, is exact.
    """

    BINS = 3600

    def __init__(self, window_s: float):
        self.window_s = float(window_s)
        self.bin_s = self.window_s / self.BINS
        # the held segments, oldest first, as flat float64 triples t0, t1, p in _buf[_h:_t]: 24 bytes a
        # segment (a deque of tuples took about 150). The oldest leave by moving _h; an append that finds
        # no room at the end moves the held ones to the front, or grows the array by a quarter when they
        # fill more than 7/8 of it (_room). Its length therefore never shrinks and stops growing once the
        # window is full: resident memory plateaus with the window, at most about 1.45x what it holds.
        self._buf = array("d")
        self._h = 0
        self._t = 0
        self._energy = 0.0
        self._covered = 0.0
        self._adds = 0

    @property
    def _segs(self) -> list[tuple[float, float, float]]:
        """The held segments as (t0, t1, p) tuples, oldest first: a copy, for tests and benchmarks."""
        v = self._buf[self._h:self._t]
        return list(zip(v[0::3], v[1::3], v[2::3]))

    def add(self, t0: float, t1: float, p: float) -> None:
        """Add the segment [t0, t1) holding power-like value p (E^2 or S)."""
        if t1 <= t0:
            return
        buf = self._buf
        w = self.bin_s
        edge = (math.floor(t0 / w) + 1) * w
        t = self._t
        merged = False
        if t > self._h and t1 <= edge:     # within one bin: merge with the stored run it continues
            s0, s1, sp = buf[t - 3], buf[t - 2], buf[t - 1]
            if s1 == t0 and (math.floor(s0 / w) + 1) * w == edge:
                buf[t - 2] = t1
                buf[t - 1] = (sp * (s1 - s0) + p * (t1 - t0)) / (t1 - s0)
                merged = True
        if not merged:
            if t + 3 > len(buf):
                self._room(3)
                buf, t = self._buf, self._t
            buf[t], buf[t + 1], buf[t + 2] = t0, t1, p
            self._t = t + 3
        self._energy += p * (t1 - t0)
        self._covered += t1 - t0
        self._adds += 1
        if self._adds % 20000 == 0:      # re-sum now and then so rounding never accumulates
            v = buf[self._h:self._t]
            a, b, q = v[0::3], v[1::3], v[2::3]
            self._energy = sum(pi * (bi - ai) for ai, bi, pi in zip(a, b, q))
            self._covered = sum(bi - ai for ai, bi in zip(a, b))

    def _merge(self, a, b, p, tail):
        """Merge sorted segments (after the stored tail, if any) as add() would: starts, ends, p, joined
        (the first merged segment includes the tail, which it replaces)."""
        if not a.size:
            return a, b, p, False
        w = self.bin_s
        edge = a / w                                # the end of each segment's bin, (floor(a / w) + 1) * w
        np.floor(edge, out=edge)
        edge += 1.0
        edge *= w
        # a segment joins the run before it when it continues it and ends within the same bin (the run,
        # contiguous up to it, then lies in that bin too); one that crosses an edge stays alone
        e1 = edge[1:]
        same = a[1:] == b[:-1]
        same &= b[1:] <= e1
        same &= e1 == edge[:-1]
        joined = False
        if tail is not None:
            s0, s1, sp = tail
            joined = bool(s1 == a[0] and b[0] <= edge[0] and edge[0] == (math.floor(s0 / w) + 1) * w)
        if not joined and not same.any():
            return a, b, p, False
        np.logical_not(same, out=same)
        starts = np.flatnonzero(np.concatenate(((True,), same)))
        ga, gb = a[starts], b[np.concatenate((same, (True,)))]
        en = np.add.reduceat(p * (b - a), starts)
        if joined:
            ga[0] = s0
            en[0] += sp * (s1 - s0)
        return ga, gb, en / (gb - ga), joined

    def _extend(self, a, b, p, x, t_last: float) -> tuple[np.ndarray, np.ndarray]:
        """Add segments (sorted, after all held ones) and give value() at each x as if added in order."""
        cut = t_last - self.window_s
        buf, h, t = self._buf, self._h, self._t
        n_old = (t - h) // 3
        nq = _count_before(buf, h, n_old, cut)
        qa, qb, qp = _rows(buf, h, nq).T    # (a copy of) the old segments the batch's windows leave
        # the batch's segments merged among themselves and with the stored tail, as add() merges them
        ga, gb, gp, joined = self._merge(a, b, p, (buf[t - 3], buf[t - 2], buf[t - 1]) if n_old else None)
        # exact side (window ends): the stored segments and the batch's own; all of them end by any x
        aa, ab, ap = np.concatenate((qa, a)), np.concatenate((qb, b)), np.concatenate((qp, p))
        ce = np.concatenate(([0.0], np.cumsum(ap * (ab - aa))))
        cc = np.concatenate(([0.0], np.cumsum(ab - aa)))
        # window starts: the merged segments, as value() sees them (a run straddling a start is final by then)
        nq2 = nq - 1 if joined and nq == n_old else nq         # the tail, if replaced by its merged run
        n_old2 = n_old - 1 if joined else n_old
        if nq < n_old or (not joined and ga.size == a.size):
            # no window start reaches the batch or the tail (all at or before the first stored segment
            # left in the window), or nothing merged: the same segments as far as the starts go
            ma, mb, mp, me, mc = aa, ab, ap, ce, cc
        else:
            ma, mb, mp = (np.concatenate((qa[:nq2], ga)), np.concatenate((qb[:nq2], gb)),
                          np.concatenate((qp[:nq2], gp)))
            me = np.concatenate(([0.0], np.cumsum(mp * (mb - ma))))
            mc = np.concatenate(([0.0], np.cumsum(mb - ma)))
        base_e, base_c = self._energy - ce[nq], self._covered - cc[nq]

        def upto(y, sa, sb, sp, se, sc):  # integral of held p and of covered time from the earliest segment to y
            if not sa.size:
                return np.zeros_like(y), np.zeros_like(y)
            i = np.searchsorted(sa, y, side="right") - 1
            j = np.maximum(i, 0)
            d = np.clip(y - sa[j], 0.0, sb[j] - sa[j])
            return np.where(i < 0, 0.0, se[j] + sp[j] * d), np.where(i < 0, 0.0, sc[j] + d)

        e1, c1 = upto(x, aa, ab, ap, ce, cc)
        e0, c0 = upto(x - self.window_s, ma, mb, mp, me, mc)
        energy = base_e + e1 - e0
        covered = base_c + c1 - c0
        with np.errstate(invalid="ignore", divide="ignore"):
            mean = np.where(covered <= 1e-9, np.nan, np.maximum(energy, 0.0) / covered)
        cov = np.where(covered <= 1e-9, 0.0, np.minimum(covered / self.window_s, 1.0))
        # the state a push loop leaves: new segments held, those ending at or before the last cut dropped
        add_e, add_c = ce[-1] - ce[nq], cc[-1] - cc[nq]
        drop = int(np.searchsorted(mb, cut, side="right"))
        if drop > nq2 and n_old2 > nq2:
            drop = nq2                                         # later old segments still in the window
        self._energy += add_e - me[drop]
        self._covered += add_c - mc[drop]
        if joined:
            self._t -= 3
        if drop <= n_old2:
            self._h += 3 * drop
            self._append(ga, gb, gp)
        else:
            self._h = self._t = 0
            k = drop - n_old2
            self._append(ga[k:], gb[k:], gp[k:])
        before = self._adds
        self._adds += a.size
        if self._adds // 20000 != before // 20000 and self._t > self._h:   # the loop's periodic re-sum, in numpy
            g = _rows(self._buf, self._h, (self._t - self._h) // 3)
            self._energy = float(np.sum(g[:, 2] * (g[:, 1] - g[:, 0])))
            self._covered = float(np.sum(g[:, 1] - g[:, 0]))
        return mean, cov

    def _append(self, a: np.ndarray, b: np.ndarray, p: np.ndarray) -> None:
        """Append segments (t0 = a, t1 = b, p) after the held ones."""
        k = 3 * a.size
        if not k:
            return
        if self._t + k > len(self._buf):
            self._room(k)
        v = np.frombuffer(self._buf, float, k, 8 * self._t).reshape(-1, 3)    # a view, gone on return
        v[:, 0], v[:, 1], v[:, 2] = a, b, p
        self._t += k

    def _room(self, k: int) -> None:
        """Room for k more values at the end: the held ones moved to the front if they then fill at most
        7/8 of the array (the next such move is an eighth of it away: amortised O(1), a memmove), else a
        copy into an array a quarter as long again (or as long as needed)."""
        buf, h, t = self._buf, self._h, self._t
        n = t - h
        if 8 * (n + k) <= 7 * len(buf):
            if h:
                buf[0:n] = buf[h:t]
        else:
            new = array("d", bytes(8 * max(3 * ((len(buf) // 4 + 2) // 3) + len(buf), n + k, 3 * 64)))
            new[0:n] = buf[h:t]
            self._buf = new
        self._h, self._t = 0, n

    def value(self, t_end: float) -> tuple[float, float]:
        """(mean of p over the covered time, coverage 0..1) of the window ending at t_end."""
        cut = t_end - self.window_s
        buf, h, n = self._buf, self._h, self._t
        while h < n and buf[h + 1] <= cut:
            t0, t1, p = buf[h], buf[h + 1], buf[h + 2]
            self._energy -= p * (t1 - t0)
            self._covered -= t1 - t0
            h += 3
        self._h = h
        energy, covered = self._energy, self._covered
        if h < n and buf[h] < cut:    # the oldest segment straddles the window start
            t0, p = buf[h], buf[h + 2]
            energy -= p * (cut - t0)
            covered -= cut - t0
        if covered <= 1e-9:
            return math.nan, 0.0
        return max(energy, 0.0) / covered, min(covered / self.window_s, 1.0)


def _split(a, b, p, bs):
    """Segments [a, b) holding p cut at multiples of bs as _segment cuts them: starts, ends, p, block, end-on-edge."""
    outs = []
    while a.size:
        keep = b > a
        a, b, p = a[keep], b[keep], p[keep]
        k = np.floor(a / bs)
        edge = (k + 1) * bs
        c = np.minimum(b, edge)
        outs.append((a, c, p, k, c == edge))
        a = c
    if not outs:
        z = np.zeros(0)
        return z, z, z, z, np.zeros(0, bool)
    if len(outs) == 1:
        return outs[0]
    cat = [np.concatenate(x) for x in zip(*outs)]
    order = np.argsort(cat[0], kind="stable")
    return tuple(x[order] for x in cat)


def _count_before(buf: array, h: int, n: int, cut: float) -> int:
    """How many of the n held segments from index h start before cut (they may leave the window during
    a batch); the starts rise, so a bisection."""
    return bisect_left(range(n), cut, key=lambda i: buf[h + 3 * i])


def _rows(buf: array, h: int, n: int) -> np.ndarray:
    """A copy of n held segments from index h as an (n, 3) array (no view of buf outlives the call,
    so buf stays resizable)."""
    if n <= 0:
        return np.zeros((0, 3))
    return np.frombuffer(buf, float, 3 * n, 8 * h).reshape(n, 3).copy()


@dataclass
class Block:
    """Accumulator of one fixed block [t_start, t_start + block_s)."""

    t_start: float
    block_s: float
    energy: float = 0.0
    covered_s: float = 0.0
    n: int = 0
    e_max: float = -math.inf
    n_over: int = 0                                # samples at overrange (value is a lower bound)
    run_end: dict = field(default_factory=dict)    # window_s -> (e_rms at block end, coverage)
    run_max: dict = field(default_factory=dict)    # window_s -> (max complete e_rms, t)
    partial: bool = False                          # begins before the record's first sample: never complete

    def e_rms(self) -> float:
        return math.sqrt(self.energy / self.covered_s) if self.covered_s > 0 else math.nan

    def coverage(self) -> float:
        return min(self.covered_s / self.block_s, 1.0)


@dataclass(frozen=True)
class RunningBatch:
    """Running averages at each accepted sample of a push_many: rows follow windows_s, columns t_end."""

    windows_s: tuple[float, ...]
    t_end: np.ndarray
    e_rms_v_per_m: np.ndarray   # (W, M)
    coverage: np.ndarray        # (W, M)
    complete: np.ndarray        # (W, M) bool

    def samples(self) -> list["RunningSample"]:
        """The same values as RunningSample objects, in the order a push loop returns them."""
        t, e, c, ok = self.t_end.tolist(), self.e_rms_v_per_m.T.tolist(), self.coverage.T.tolist(), self.complete.T.tolist()
        return [RunningSample(ws, t[j], e[j][i], c[j][i], ok[j][i]) for j in range(len(t))
                for i, ws in enumerate(self.windows_s)]


@dataclass(frozen=True)
class RunningSample:
    """A running average of window_s seconds ending at t_end (RMS field, coverage, complete)."""

    window_s: float
    t_end: float
    e_rms_v_per_m: float
    coverage: float
    complete: bool


class Series:
    """Incremental blocks and running averages of one field series (one meter, one band)."""

    def __init__(self, hold_s: float, block_s: float = 360.0, windows_s=(360.0, 1800.0, 86400.0),
                 min_coverage: float = 0.9):
        self.hold_s, self.block_s, self.min_coverage = float(hold_s), float(block_s), float(min_coverage)
        self.windows = {float(w): SlidingWindow(w) for w in windows_s}
        self.last: tuple[float, float] | None = None     # (t, E^2) of the latest sample, hold not yet added
        self.frontier = -math.inf                        # no segment will ever start before this
        self.open: dict[int, Block] = {}
        self._next_end = math.inf                        # earliest end of an open block (skip _final before it)
        # first sample seen: a window reaching before it is partial (a T-average needs T of record), never
        # complete whatever its coverage; after a restart the replay starts a full window before anything new
        self.t_first: float | None = None

    def _block(self, k: int) -> Block:
        b = self.open.get(k)
        if b is None:
            b = self.open[k] = Block(k * self.block_s, self.block_s)
            b.partial = self.t_first is not None and b.t_start < self.t_first - 1e-6
            self._next_end = min(self._next_end, b.t_start + self.block_s)
        return b

    def _segment(self, t0: float, t1: float, p: float) -> None:
        """Add a held segment, split at block edges; evaluate running averages at each block end."""
        while t1 > t0:
            k = math.floor(t0 / self.block_s)
            edge = (k + 1) * self.block_s
            t_cut = min(t1, edge)
            b = self._block(k)
            b.energy += p * (t_cut - t0)
            b.covered_s += t_cut - t0
            for w in self.windows.values():
                w.add(t0, t_cut, p)
            if t_cut == edge:
                for ws, w in self.windows.items():
                    b.run_end[ws] = w.value(edge)
            t0 = t_cut

    def push(self, t: float, e_v_per_m: float, over: bool = False) -> tuple[list[Block], list[RunningSample]]:
        """Add a sample (over: an overrange lower bound); returns final blocks and running averages at t."""
        if not (t > self.frontier and math.isfinite(e_v_per_m) and e_v_per_m >= 0):
            return [], []
        if self.t_first is None:
            self.t_first = t
        last = self.last
        if last is not None:
            t0, p0 = last
            self._segment(t0, min(t, t0 + self.hold_s), p0)
        self.last = (t, e_v_per_m * e_v_per_m)
        self.frontier = t
        bs = self.block_s
        b = self._block(math.floor(t / bs))
        b.n += 1
        if over:
            b.n_over += 1
        if e_v_per_m > b.e_max:
            b.e_max = e_v_per_m
        runs = []
        ok_min = self.min_coverage - 1e-9
        bb = None
        looked = False
        for ws, w in self.windows.items():
            mean, cov = w.value(t)
            ok = cov >= ok_min and t - ws >= self.t_first - 1e-6
            e = math.sqrt(mean) if mean == mean else math.nan
            runs.append(RunningSample(ws, t, e, cov, ok))
            if ok:
                if not looked:   # an end exactly on an edge closes the earlier block
                    bb, looked = self.open.get(math.floor((t - 1e-9) / bs)), True
                if bb is not None:
                    rm = bb.run_max.get(ws)
                    if rm is None or e > rm[0]:
                        bb.run_max[ws] = (e, t)
        if t < self._next_end:
            return [], runs
        return self._final(), runs

    def push_many(self, t, e_v_per_m, over=None) -> tuple[list[Block], RunningBatch]:
        """As push() for each sample in turn (same blocks, same running values to rounding), in numpy."""
        t = np.asarray(t, dtype=float).ravel()
        e = np.asarray(e_v_per_m, dtype=float).ravel()
        over = np.zeros(t.shape, bool) if over is None else np.asarray(over, dtype=bool).ravel()
        with np.errstate(invalid="ignore"):
            valid = np.isfinite(e) & (e >= 0) & ~np.isnan(t)
        # a sample is taken when it is later than every sample taken before it (push's frontier test)
        front = np.maximum.accumulate(np.concatenate(([self.frontier], np.where(valid, t, -np.inf))))
        take = valid & (t > front[:-1])
        ts, es, ov = t[take], e[take], over[take]
        wins = tuple(self.windows)
        m = ts.size
        if m == 0:
            z = np.zeros((len(wins), 0))
            return [], RunningBatch(wins, ts, z, z, z.astype(bool))
        ps = es * es
        if self.t_first is None:
            self.t_first = float(ts[0])
        bs, hold = self.block_s, self.hold_s
        if self.last is not None:
            t_all, p_all = np.concatenate(([self.last[0]], ts)), np.concatenate(([self.last[1]], ps))
        else:
            t_all, p_all = ts, ps
        a, p = t_all[:-1], p_all[:-1]
        b = np.minimum(t_all[1:], a + hold)
        pa, pb, pp, pk, hit = _split(a, b, p, bs)        # held segments cut at block edges, in time order
        sk = np.floor(ts / bs)
        blocks = self._touch(np.concatenate((pk, sk)))
        if pa.size:
            keys, inv = np.unique(pk, return_inverse=True)
            en = np.bincount(inv, weights=pp * (pb - pa))
            cov = np.bincount(inv, weights=pb - pa)
            for kk, x, c in zip(keys.tolist(), en.tolist(), cov.tolist()):
                bl = blocks[kk]
                bl.energy += x
                bl.covered_s += c
        starts = np.flatnonzero(np.r_[True, sk[1:] != sk[:-1]])
        for kk, n, no, mx in zip(sk[starts].tolist(), np.diff(np.r_[starts, m]).tolist(),
                                 np.add.reduceat(ov.astype(np.int64), starts).tolist(),
                                 np.maximum.reduceat(es, starts).tolist()):
            bl = blocks[kk]
            bl.n += n
            bl.n_over += no
            if mx > bl.e_max:
                bl.e_max = mx
        edges = pb[hit]
        edge_k = pk[hit].tolist()
        ok_min = self.min_coverage - 1e-9
        front_before = np.concatenate(([self.frontier], ts[:-1]))
        kb = np.floor((ts - 1e-9) / bs)
        open_b = ((kb + 1) * bs > front_before) & np.isin(kb, np.fromiter(blocks, float, len(blocks)))
        e_rows, c_rows, ok_rows = [], [], []
        for ws, w in self.windows.items():
            mean, cv = w._extend(pa, pb, pp, np.concatenate((ts, edges)), ts[-1])
            with np.errstate(invalid="ignore"):
                er = np.sqrt(mean)
            for kk, x, c in zip(edge_k, mean[m:].tolist(), cv[m:].tolist()):
                blocks[kk].run_end[ws] = (x, c)
            er, cv = er[:m], cv[:m]
            ok = (cv >= ok_min) & (ts - ws >= self.t_first - 1e-6)
            e_rows.append(er)
            c_rows.append(cv)
            ok_rows.append(ok)
            sel = np.flatnonzero(ok & open_b)
            if sel.size:
                self._run_max(ws, kb[sel], er[sel], ts[sel])
        self.last = (float(ts[-1]), float(ps[-1]))
        self.frontier = float(ts[-1])
        self._next_end = min((bl.t_start + bs for bl in self.open.values()), default=math.inf)
        final = self._final() if self.frontier >= self._next_end else []
        return final, RunningBatch(wins, ts, np.array(e_rows), np.array(c_rows), np.array(ok_rows))

    def _touch(self, ks: np.ndarray) -> dict[float, Block]:
        """The open blocks of these indices (created as push would), keyed by the float index."""
        out = {}
        for kk in np.unique(ks).tolist():
            out[kk] = self._block(math.floor(kk))
        for k, bl in self.open.items():
            out.setdefault(float(k), bl)
        return out

    def _run_max(self, ws: float, kb: np.ndarray, e: np.ndarray, t: np.ndarray) -> None:
        """Largest complete running value per block (the earliest of equals), as push keeps it."""
        starts = np.flatnonzero(np.r_[True, kb[1:] != kb[:-1]])
        ends = np.r_[starts[1:], kb.size]
        for s0, s1 in zip(starts.tolist(), ends.tolist()):
            bl = self.open[math.floor(kb[s0])]
            rm = bl.run_max.get(ws)
            i0 = s0
            if rm is None:
                rm = bl.run_max[ws] = (float(e[s0]), float(t[s0]))
                i0 = s0 + 1
            if i0 >= s1 or rm[0] != rm[0]:
                continue
            seg = np.where(np.isnan(e[i0:s1]), -np.inf, e[i0:s1])
            i = i0 + int(np.argmax(seg))
            if e[i] > rm[0]:
                bl.run_max[ws] = (float(e[i]), float(t[i]))

    def close_gap(self, now: float) -> list[Block]:
        """The device has been silent past the hold: add the last sample's full hold, finish blocks."""
        if self.last is None or now <= self.last[0] + self.hold_s:
            return []
        t0, p0 = self.last
        self._segment(t0, t0 + self.hold_s, p0)
        self.last = None
        self.frontier = t0 + self.hold_s
        return self._final()

    def _final(self) -> list[Block]:
        done = [k for k, b in self.open.items() if b.t_start + self.block_s <= self.frontier]
        out = [self.open.pop(k) for k in sorted(done)]
        self._next_end = min((b.t_start + self.block_s for b in self.open.values()), default=math.inf)
        return out

    def flush_all(self) -> list[Block]:
        """Every open block, final or not (end of a record, for tests and exports)."""
        out = [self.open[k] for k in sorted(self.open)]
        return out


def block_row(station_id: int, meter: str, band: str, b: Block, min_coverage: float) -> tuple:
    e = b.e_rms()
    return (station_id, meter, band, b.t_start, b.block_s, b.energy, b.covered_s, b.n,
            None if math.isnan(e) else e, None if b.e_max == -math.inf else b.e_max,
            int(b.coverage() >= min_coverage - 1e-9 and not b.partial), b.n_over)


def save_blocks(conn, station_id: int, meter: str, band: str, blocks, min_coverage: float) -> None:
    """Upsert final blocks and their running-average summaries (idempotent, safe on replay)."""
    if not blocks:
        return
    conn.executemany("INSERT OR REPLACE INTO mon_block VALUES (?,?,?,?,?,?,?,?,?,?,?,?)",
                     [block_row(station_id, meter, band, b, min_coverage) for b in blocks])
    rows = []
    for b in blocks:
        for ws in set(b.run_end) | set(b.run_max):
            e_end, cov = b.run_end.get(ws, (math.nan, 0.0))
            e_max, t_max = b.run_max.get(ws, (None, None))
            rows.append((station_id, meter, band, ws, b.t_start, None if e_end != e_end else math.sqrt(e_end),
                         cov, e_max, t_max))
    conn.executemany("INSERT OR REPLACE INTO mon_running VALUES (?,?,?,?,?,?,?,?,?)", rows)


def last_final_block_end(conn, station_id: int, meter: str) -> float | None:
    """End time of the newest stored block of a meter (replay after a restart starts before it)."""
    r = conn.execute("SELECT max(t_start_utc + block_s) FROM mon_block WHERE station_id=? AND meter=?",
                     (station_id, meter)).fetchone()
    return r[0]


def blocks(conn, station_id: int, meter: str | None = None, band: str = "total",
           t0: float | None = None, t1: float | None = None) -> list[dict]:
    """Stored blocks as dicts, oldest first, optionally filtered by meter and time."""
    q = "SELECT * FROM mon_block WHERE station_id=? AND band=?"
    p: list = [station_id, band]
    if meter is not None:
        q, p = q + " AND meter=?", p + [meter]
    if t0 is not None:
        q, p = q + " AND t_start_utc >= ?", p + [t0]
    if t1 is not None:
        q, p = q + " AND t_start_utc < ?", p + [t1]
    cur = conn.execute(q + " ORDER BY meter, t_start_utc", p)
    cols = [c[0] for c in cur.description]
    return [dict(zip(cols, r)) for r in cur.fetchall()]


def running(conn, station_id: int, meter: str, band: str = "total", t0=None, t1=None) -> list[dict]:
    """Running-average summaries per block (value at the block end, largest complete value inside)."""
    q = "SELECT * FROM mon_running WHERE station_id=? AND meter=? AND band=?"
    p: list = [station_id, meter, band]
    if t0 is not None:
        q, p = q + " AND t_start_utc >= ?", p + [t0]
    if t1 is not None:
        q, p = q + " AND t_start_utc < ?", p + [t1]
    cur = conn.execute(q + " ORDER BY window_s, t_start_utc", p)
    cols = [c[0] for c in cur.description]
    return [dict(zip(cols, r)) for r in cur.fetchall()]
