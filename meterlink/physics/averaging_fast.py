"""Fused one-pass running average at the sample times, in cache-sized chunks (pure).

The same sampling model and results as the general path in :mod:`meterlink.physics.averaging`
(held samples, holds capped at ``hold``, gaps never filled, coverage, partial windows), computed
for windows (t_k - window_s, t_k] ending at every sample in one forward pass: each chunk of
``chunk_blocks`` blocks checks its samples, forms p*dt, its block cumulative sums and the
compensated block offsets, and writes its windows' mean, coverage and flags while the chunk is
still in cache. On a regular stretch the window start is a constant index offset (checked
exactly, no search); with jittered times it is that offset or one sample before (checked exactly,
no search); after a gap, only the windows off by more are searched. Anything it does not handle (invalid input, a
window spanning more than ``span_max`` samples) makes it return None: the caller then takes the
general path, which also gives the error messages.

Precision: within a block the cumulative sum restarts (as in the general path); block offsets
are a compensated (two-float) sum, taken relative to the first block of the chunk's span, so a
window's error is a few ulps of max(p) times (span duration / window), whatever the record length.
"""

from __future__ import annotations

import numpy as np


def _neumaier(tot, hi, lo, b0: int, s_hi: float, s_lo: float):
    """Extend the compensated prefix sums hi/lo (entry b = sum of blocks before b) from block b0."""
    for k, v in enumerate(tot.tolist()):
        u = s_hi + v
        s_lo += (s_hi - u) + v if abs(s_hi) >= abs(v) else (v - u) + s_hi
        s_hi = u
        hi[b0 + k + 1], lo[b0 + k + 1] = s_hi, s_lo
    return s_hi, s_lo


class _Work:
    """Work arrays reused from chunk to chunk (same memory, so it stays in cache; no allocation)."""

    def __init__(self):
        self.arrays: dict = {}

    def __call__(self, name: str, size: int, dtype=np.float64) -> np.ndarray:
        a = self.arrays.get(name)
        if a is None or a.size < size:
            a = self.arrays[name] = np.empty(size, dtype=dtype)
        return a[:size]


def _near_even(t, q, ia: int, s0: int, flags) -> int:
    """sh (ia or ia + 1) such that each window j starts at sample sh + j or sh + j - 1 (exactly
    checked), or -1 when there is none. flags: a bool work array of q's size."""
    c = q.size
    sh = ia + 1 if np.greater_equal(q, t[ia + 1:ia + 1 + c], out=flags).any() else ia
    if (sh - 1 >= s0 and sh + 1 + c <= t.size
            and bool(np.less(q, t[sh + 1:sh + 1 + c], out=flags).all())
            and bool(np.greater_equal(q, t[sh - 1:sh - 1 + c], out=flags).all())):
        return sh
    return -1


def _start_samples(t, q, ia: int, k1: int):
    """Index of the last sample at or before each sorted q (all in t[ia:k1]): the constant offset
    ia + j corrected by one sample where exact comparisons allow (jittered sample times), a binary
    search only for the windows where that does not hold (after a gap, or at a change of rate)."""
    c = q.size
    if ia + 2 + c > t.size:
        return np.searchsorted(t[ia:k1], q, side="right") + (ia - 1)
    up = t[ia + 1:ia + 1 + c] <= q              # one sample later
    dn = t[ia:ia + c] > q                       # one sample earlier (never for j = 0)
    bad = up & (t[ia + 2:ia + 2 + c] <= q)      # more than one sample later
    bad[1:] |= dn[1:] & (t[ia:ia + c - 1] > q[1:])
    i = np.arange(ia, ia + c)
    i += up
    i -= dn
    if bad.any():
        j = np.flatnonzero(bad)
        i[j] = np.searchsorted(t[ia:k1], q[j], side="right") + (ia - 1)
    return i


def running_at_samples(t, x, square: bool, window_s: float, min_coverage: float, hold: float,
                       last_hold: float, cover_tol: float, block: int, chunk_blocks: int,
                       span_max: int):
    """(mean, coverage, complete, partial) of the windows ending at each sample, or None.

    mean is the RMS (square) or the linear mean, NaN where nothing is covered."""
    n, B = t.size, block
    if n < 2 or not np.isfinite(t[0]):
        return None
    t0 = float(t[0])
    t_end = float(t[-1]) + last_hold
    cover_eps = 16.0 * np.finfo(np.float64).eps * (t_end - t0 + abs(t0))
    thr = min_coverage - cover_tol
    mean = np.empty(n)
    cov = np.empty(n)
    complete = np.empty(n, dtype=bool)
    partial = np.empty(n, dtype=bool)
    nblk = -(-n // B)
    off_hi = np.zeros(nblk + 1)
    off_lo = np.zeros(nblk + 1)
    s_hi = s_lo = 0.0
    done = 0                                     # blocks whose offsets are known
    C = chunk_blocks * B
    work = _Work()
    for k0 in range(0, n, C):
        k1 = min(k0 + C, n)
        q0 = np.subtract(t[k0:k1], window_s, out=work("q0", k1 - k0))
        # Searches look only at samples already checked (t[k0] is checked below; a NaN there
        # gives k0 - 1 here, and the check then refuses the chunk).
        i_first = int(np.searchsorted(t[:k0], q0[0], side="right")) - 1
        s0 = (max(i_first, 0) // B) * B
        e0 = min(((k1 - 1) // B + 1) * B, n)
        L = e0 - s0
        if L > span_max:
            return None
        nb = -(-L // B)
        bs = s0 // B
        # Hold durations d = min(dt, hold) (the last sample: last_hold); checks on the way.
        m1 = L if e0 < n else L - 1
        d = work("d", L)
        np.subtract(t[s0 + 1:s0 + 1 + m1], t[s0:s0 + m1], out=d[:m1])
        if m1 < L:
            d[-1] = last_hold
        dmin = float(d.min())
        dmax = float(d.max())
        if not (dmin >= 0.0 and dmax < np.inf):
            return None                          # non-finite or decreasing times
        gaps = dmax > hold
        if gaps:
            gx = np.zeros(L + 1)                 # gx[j]: gap seconds before span index j
            ex = d - hold
            np.maximum(ex, 0.0, out=ex)
            np.cumsum(ex, out=gx[1:])
            np.minimum(d, hold, out=d)
        p = work("p", L)
        if square:
            np.multiply(x[s0:e0], x[s0:e0], out=p)
        else:
            p[:] = x[s0:e0]
            if not float(p.min()) >= 0.0:
                return None
        w = work("w", nb * B)
        w[L:] = 0.0
        np.multiply(p, d, out=w[:L])
        w2 = w.reshape(nb, B)
        loc = work("loc", nb * B).reshape(nb, B)
        loc[:, 0] = 0.0
        np.cumsum(w2[:, :-1], axis=1, out=loc[:, 1:])
        tot = loc[:, -1] + w2[:, -1]
        if not np.all(np.isfinite(tot)):
            return None                          # a NaN or infinite value (or an overflow)
        if done < bs + nb:
            s_hi, s_lo = _neumaier(tot[done - bs:], off_hi, off_lo, done, s_hi, s_lo)
            done = bs + nb
        # Offsets relative to the span's first block (compensated), added to each block's row.
        rel = (off_hi[bs:bs + nb] - off_hi[bs]) + (off_lo[bs:bs + nb] - off_lo[bs])
        loc += rel[:, None]
        G = loc.ravel()                          # G[j] = integral of p from t[s0] to t[s0 + j]
        del w, w2, loc
        j1 = slice(k0 - s0, k1 - s0)
        mv, cv = mean[k0:k1], cov[k0:k1]
        energy = work("energy", k1 - k0)
        covered = work("covered", k1 - k0)
        tmp = work("tmp", k1 - k0)
        # Windows starting before the first sample (record start): nothing to subtract.
        nbef = int(np.searchsorted(q0, t0, side="left"))
        if nbef:
            energy[:nbef] = G[k0 - s0:k0 - s0 + nbef]    # s0 == 0 here
            np.subtract(t[k0:k0 + nbef], t0, out=covered[:nbef])
            if gaps:
                covered[:nbef] -= gx[k0:k0 + nbef]
        ka = k0 + nbef
        if ka < k1:
            c = k1 - ka
            qa = q0[nbef:]
            ia = int(np.searchsorted(t[:ka], qa[0], side="right")) - 1
            ja = slice(ia - s0, ia - s0 + c)
            # Constant offset: t[ia + j] <= qa[j] < t[ia + j + 1] for every j (exactly checked).
            if dmin > 0.0 and np.array_equal(qa, t[ia:ia + c]):
                part, pmax, regular = None, 0.0, True     # starts exactly at samples
            else:
                part = np.subtract(qa, t[ia:ia + c], out=work("part", c))
                pmax = float(part.max())
                regular = (float(part.min()) >= 0.0
                           and float(np.subtract(qa, t[ia + 1:ia + 1 + c], out=tmp[:c]).max()) < 0.0)
            jb = slice(nbef, c + nbef)
            if regular:
                # Start index ia + j for the j-th window: slices, no search.
                np.subtract(G[j1][nbef:], G[ja], out=energy[jb])
                np.subtract(t[ka:k1], t[ia:ia + c], out=covered[jb])
                if pmax > 0.0:
                    if gaps:
                        np.minimum(part, d[ja], out=part)
                    covered[jb] -= part
                    part *= p[ja]
                    energy[jb] -= part
                if gaps:
                    covered[jb] -= gx[ka - s0:k1 - s0]
                    covered[jb] += gx[ja]
            elif not gaps and (sh := _near_even(t, qa, ia, s0, work("b", c, bool))) >= 0:
                # Jittered times, no gap: window j starts at sample b = sh + j or at b - 1. Held
                # without gaps, G[b] - G[b - 1] is p[b - 1] * (t[b] - t[b - 1]), so the integral to
                # qa is G[b] + p' * (qa - t[b]) with p' = p[b - 1] where qa < t[b], else p[b].
                js = slice(sh - s0, sh - s0 + c)
                # p' by arithmetic (a masked copy is several times slower): f * p[b - 1] + (1 - f) * p[b]
                # with f = 1.0 where qa < t[b], else 0.0 (exact: products by 0 and 1, sums with 0).
                f = np.less(qa, t[sh:sh + c], out=work("f", c))
                pp = np.multiply(f, p[sh - 1 - s0:sh - 1 - s0 + c], out=tmp[:c])
                np.subtract(1.0, f, out=f)
                f *= p[js]
                pp += f
                np.subtract(qa, t[sh:sh + c], out=part)
                part *= pp
                np.subtract(G[j1][nbef:], G[js], out=energy[jb])
                energy[jb] -= part
                np.subtract(t[ka:k1], qa, out=covered[jb])
            else:
                i0 = _start_samples(t, qa, ia, k1)
                ti = np.take(t, i0, out=work("ti", c))
                i0 -= s0                         # span index of each window's start sample
                np.subtract(qa, ti, out=part)    # >= 0, and below t[i0 + 1] - ti
                g = tmp[:c]
                if gaps:
                    np.minimum(part, np.take(d, i0, out=g), out=part)
                np.subtract(t[ka:k1], ti, out=covered[jb])
                covered[jb] -= part
                part *= np.take(p, i0, out=g)
                np.subtract(G[j1][nbef:], np.take(G, i0, out=g), out=energy[jb])
                energy[jb] -= part
                if gaps:
                    covered[jb] -= gx[ka - s0:k1 - s0]
                    covered[jb] += gx[i0]
        if float(energy.min()) < 0.0:          # rounding of a difference (clamps cost a pass)
            np.maximum(energy, 0.0, out=energy)
        if float(covered.min()) <= cover_eps:
            covered[covered <= cover_eps] = 0.0
            with np.errstate(invalid="ignore", divide="ignore"):
                np.divide(energy, covered, out=mv)
            mv[covered == 0.0] = np.nan
        else:
            np.divide(energy, covered, out=mv)
        if square:
            np.sqrt(mv, out=mv)
        np.divide(covered, window_s, out=cv)
        if float(cv.max()) > 1.0:
            np.minimum(cv, 1.0, out=cv)
        pv = partial[k0:k1]
        if q0[0] < t0 - cover_eps:
            np.less(q0, t0 - cover_eps, out=pv)
            np.greater_equal(cv, thr, out=complete[k0:k1])
            complete[k0:k1] &= ~pv
        else:
            pv[:] = False
            np.greater_equal(cv, thr, out=complete[k0:k1])
    return mean, cov, complete, partial
