"""Time meterlink.physics.averaging.running_average over N days of 1 Hz data against a plain numpy
cumulative-sum running mean of E^2 (the baseline), on the same data in the same run.

Usage: python bench/bench_averaging.py [--quick] [--days N] [--window S] [--json]
The baseline assumes regular, gap-free sampling and keeps no coverage; running_average handles
irregular sampling, gaps and coverage and keeps full precision over long records.
"""

from __future__ import annotations

import time
import tracemalloc

import numpy as np

import _common
from meterlink.physics.averaging import running_average


def baseline(e_v_per_m: np.ndarray, n_window: int) -> np.ndarray:
    """Running RMS over n_window samples by one cumulative sum of E^2 (1 s per sample)."""
    c = np.concatenate(([0.0], np.cumsum(e_v_per_m * e_v_per_m)))
    return np.sqrt((c[n_window:] - c[:-n_window]) / n_window)


def _timed(fn, *args, **kw):
    tracemalloc.start()
    t0 = time.perf_counter()
    out = fn(*args, **kw)
    dt = time.perf_counter() - t0
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    return out, dt, peak


def main(argv=None) -> dict:
    ap = _common.parser(__doc__)
    ap.add_argument("--days", type=float, default=None, help="record length in days (default 365; 30 with --quick)")
    ap.add_argument("--window", type=float, default=360.0, help="averaging window in s (default 360)")
    args = ap.parse_args(argv)
    days = args.days if args.days is not None else (30.0 if args.quick else 365.0)
    n = int(days * 86400)
    rng = np.random.default_rng(20240601)
    t = np.arange(n, dtype=np.float64) + 1.7e9
    e = 2.0 + 0.5 * rng.standard_normal(n) ** 2   # invented positive field, V/m
    nw = int(args.window)

    base, t_base, m_base = _timed(baseline, e, nw)
    ours, t_ours, m_ours = _timed(running_average, t, e, args.window)
    # Windows ending at sample k (k >= nw) hold samples k-nw .. k-1: the baseline's entry k-nw.
    diff = np.max(np.abs(ours.e_rms_v_per_m[nw:] - base[:n - nw])) if n > nw else float("nan")
    ratio = t_ours / t_base
    return _common.report(
        "averaging", f"running_average of {n:,} samples ({days:g} days at 1 Hz, window {args.window:g} s) in "
        f"{t_ours:.2f} s, peak traced {m_ours / 2**20:.0f} MiB (outputs included, inputs excluded)",
        f"numpy cumulative-sum running mean {t_base:.2f} s, peak traced {m_base / 2**20:.0f} MiB",
        ratio, f"{ratio:.2f}x the baseline's time, {m_ours / max(m_base, 1):.2f}x its memory; max |difference| "
        f"{diff:.3g} V/m", "<= 3x the cumulative-sum time and < 1 GiB allocated by running_average (one year)",
        (ratio <= 3.0 and m_ours < 2**30) if days >= 365 else None, args.json, days=days, traced_peak_mib=m_ours / 2**20)


if __name__ == "__main__":
    main()
