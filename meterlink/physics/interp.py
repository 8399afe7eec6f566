"""Shape-preserving piecewise cubic Hermite interpolation (PCHIP) in plain numpy.

The detector linearisation must be monotone between certificate points; this is the classic
monotone cubic of Fritsch & Carlson (SIAM J. Numer. Anal. 17(2), 1980) with the weighted
harmonic-mean slopes and the one-sided three-point end slopes described in C. Moler, "Numerical
Computing with MATLAB" (2004), section 3.4 ("pchip"). It gives the same curve as
scipy.interpolate.PchipInterpolator (the tests compare the two) without importing
scipy.interpolate, which roughly doubles a monitoring station's resident memory.
"""

from __future__ import annotations

import numpy as np


def _edge_slope(h0: float, h1: float, m0: float, m1: float) -> float:
    """One-sided three-point end slope, kept shape-preserving (Moler 2004, pchip)."""
    d = ((2.0 * h0 + h1) * m0 - h0 * m1) / (h0 + h1)
    if np.sign(d) != np.sign(m0):
        return 0.0
    if np.sign(m0) != np.sign(m1) and abs(d) > abs(3.0 * m0):
        return 3.0 * m0
    return d


class MonotoneCubic:
    """y(x) through the points (x strictly increasing), monotone wherever the data are; NaN outside."""

    def __init__(self, x, y):
        x = np.asarray(x, dtype=float)
        y = np.asarray(y, dtype=float)
        if x.ndim != 1 or x.shape != y.shape or x.size < 2 or np.any(np.diff(x) <= 0):
            raise ValueError("x must be strictly increasing with at least two points, y the same length")
        h = np.diff(x)
        m = np.diff(y) / h
        d = np.empty_like(x)
        if x.size == 2:
            d[:] = m[0]
        else:
            w1 = 2.0 * h[1:] + h[:-1]
            w2 = h[1:] + 2.0 * h[:-1]
            same = (np.sign(m[:-1]) * np.sign(m[1:])) > 0
            with np.errstate(divide="ignore", invalid="ignore", over="ignore"):  # tiny slopes: inv -> inf, d -> 0
                inv = (w1 / m[:-1] + w2 / m[1:]) / (w1 + w2)
                d[1:-1] = np.where(same, 1.0 / inv, 0.0)
            d[0] = _edge_slope(h[0], h[1], m[0], m[1])
            d[-1] = _edge_slope(h[-1], h[-2], m[-1], m[-2])
        self.x, self.y, self.d, self.h = x, y, d, h
        # the same cubic per interval in power form, y = c0 + t (c1 + t (c2 + t c3)) with t in [0, 1]:
        # four gathers and a Horner sum per query instead of five gathers and the Hermite basis
        y0, y1, hd0, hd1 = y[:-1], y[1:], h * d[:-1], h * d[1:]
        self._c = (y0, hd0, 3 * (y1 - y0) - 2 * hd0 - hd1, 2 * (y0 - y1) + hd0 + hd1)

    def __call__(self, xq):
        xq = np.asarray(xq, dtype=float)
        q = xq.reshape(-1)
        k = np.searchsorted(self.x, q, side="right") - 1
        np.clip(k, 0, self.x.size - 2, out=k)
        t = q - self.x.take(k)
        t /= self.h.take(k)
        c0, c1, c2, c3 = self._c
        out = c3.take(k)  # Horner, in place: this runs for every reading of every axis
        out *= t
        out += c2.take(k)
        out *= t
        out += c1.take(k)
        out *= t
        out += c0.take(k)
        inside = (q >= self.x[0]) & (q <= self.x[-1])
        if not inside.all():
            out[~inside] = np.nan
        return out.reshape(xq.shape)
