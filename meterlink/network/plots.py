"""Plots of the pages drawn on the server as inline SVG: the min/max envelope of 6-minute values per bucket.

Nothing is fetched by the browser; every piece of text in the drawing is escaped here, the numbers are
formatted by this module, so the markup is safe to embed as it is.
"""

from __future__ import annotations

import datetime as dt
import math
from html import escape

from markupsafe import Markup

W, H = 720, 220                       # drawing size in user units
L, R, T, B = 58, 12, 14, 34           # margins: axis labels left and bottom


def _nice_top(v: float) -> float:
    """A round upper bound for the value axis at or above v (1, 2, 2.5, 5 times a power of ten)."""
    if v <= 0 or not math.isfinite(v):
        return 1.0
    e = 10 ** math.floor(math.log10(v))
    for m in (1, 2, 2.5, 5, 10):
        if m * e >= v:
            return m * e
    return 10 * e


def _fmt(v: float) -> str:
    return f"{v:.3g}"


def envelope_svg(points: list[tuple], t0: float, t1: float, bucket_s: float, unit: str, title: str,
                 reference: float | None = None) -> Markup:
    """An SVG of buckets (t, lo, hi), each bucket_s long, between t0 and t1: a filled band from lo to hi
    drawn as steps, a line along hi, and a dashed line at ``reference`` (100 % of the reference level)
    when it is within reach of the data."""
    pw, ph = W - L - R, H - T - B
    hi_v = max((p[2] for p in points), default=0.0)
    near_ref = reference is not None and hi_v >= 0.5 * reference      # show the reference line only when near
    top = _nice_top(max(hi_v, reference) * 1.05 if near_ref else max(hi_v * 1.1, 1e-12))
    span = max(t1 - t0, 1.0)
    width = bucket_s

    def x(t):
        return L + pw * (t - t0) / span

    def y(v):
        return T + ph * (1.0 - min(max(v / top, 0.0), 1.0))

    out = [f'<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 {W} {H}" class="plot" role="img" '
           f'aria-label="{escape(title)}"><title>{escape(title)}</title>',
           f'<rect x="{L}" y="{T}" width="{pw}" height="{ph}" fill="#fbfcfc" stroke="#b9c5c8"/>']
    for i in range(5):                                   # value grid and labels
        v = top * i / 4
        out.append(f'<line x1="{L}" x2="{L + pw}" y1="{y(v):.1f}" y2="{y(v):.1f}" stroke="#e3e9ea"/>'
                   f'<text x="{L - 6}" y="{y(v) + 4:.1f}" text-anchor="end" font-size="11">{_fmt(v)}</text>')
    out.append(f'<text x="12" y="{T + ph / 2:.0f}" font-size="11" transform="rotate(-90 12 {T + ph / 2:.0f})" '
               f'text-anchor="middle">{escape(unit)}</text>')
    ticks = 6
    for i in range(ticks + 1):                           # time labels, UTC
        t = t0 + span * i / ticks
        d = dt.datetime.fromtimestamp(t, dt.timezone.utc)
        lab = d.strftime("%H:%M") if span <= 2 * 86400 else d.strftime("%m-%d")
        anchor = "start" if i == 0 else "end" if i == ticks else "middle"
        out.append(f'<text x="{x(t):.1f}" y="{H - B + 16}" text-anchor="{anchor}" font-size="11">{lab}</text>')
    out.append(f'<text x="{L + pw}" y="{H - 3}" text-anchor="end" font-size="10" fill="#55666b">UTC, '
               f'{dt.datetime.fromtimestamp(t0, dt.timezone.utc):%Y-%m-%d %H:%M} to '
               f'{dt.datetime.fromtimestamp(t1, dt.timezone.utc):%Y-%m-%d %H:%M}</text>')
    # runs of adjacent buckets: a gap in the data stays a gap in the drawing
    runs: list[list[tuple]] = []
    for p in points:
        if runs and p[0] - runs[-1][-1][0] <= 1.5 * width:
            runs[-1].append(p)
        else:
            runs.append([p])
    for run in runs:
        upper = [xy for t, _, hi, *_ in run for xy in ((x(t), y(hi)), (x(min(t + width, t1)), y(hi)))]
        lower = [xy for t, lo, *_ in run for xy in ((x(t), y(lo)), (x(min(t + width, t1)), y(lo)))]
        poly = " ".join(f"{a:.1f},{b:.1f}" for a, b in upper + lower[::-1])
        line = " ".join(f"{a:.1f},{b:.1f}" for a, b in upper)
        out.append(f'<polygon points="{poly}" fill="#9cc7cf" stroke="none"/>'
                   f'<polyline points="{line}" fill="none" stroke="#1f5c66" stroke-width="1.2"/>')
    if reference is not None and reference <= top:
        out.append(f'<line x1="{L}" x2="{L + pw}" y1="{y(reference):.1f}" y2="{y(reference):.1f}" stroke="#b3261e" '
                   f'stroke-dasharray="6 4"/><text x="{L + pw - 4}" y="{y(reference) - 4:.1f}" text-anchor="end" '
                   f'font-size="11" fill="#b3261e">reference level</text>')
    elif reference is not None:             # the values are far below it: say where the line would be
        out.append(f'<text x="{L + pw - 4}" y="{T + 14}" text-anchor="end" font-size="11" fill="#b3261e">'
                   f'reference level ({_fmt(reference)}) is above this scale</text>')
    if not points:
        out.append(f'<text x="{L + pw / 2}" y="{T + ph / 2}" text-anchor="middle" font-size="13" fill="#55666b">'
                   f'no 6-minute values in this period</text>')
    out.append("</svg>")
    return Markup("".join(out))
