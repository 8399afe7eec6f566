"""Time meterlink.averaging.running_average over N days of 1 Hz data against a plain numpy
cumulative-sum running mean of E^2 (the baseline), on the same data in the same run.

Usage: python bench/bench_averaging.py [--days N] [--window S]
The baseline assumes regular, gap-free sampling and keeps no coverage; running_average handles
irregular sampling, gaps and coverage and keeps full precision over long records.
"""

from __future__ import annotations

import argparse
import pathlib
import sys
import time
import tracemalloc

import numpy as np

sys.path.insert(0, str(pathlib.Path(__file__).resolve().parents[1]))

from meterlink.averaging import running_average  # noqa: E402


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


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--days", type=float, default=365.0, help="record length in days (default 365)")
    ap.add_argument("--window", type=float, default=360.0, help="averaging window in s (default 360)")
    args = ap.parse_args(argv)
    n = int(args.days * 86400)
    rng = np.random.default_rng(20240601)
    t = np.arange(n, dtype=np.float64) + 1.7e9
    e = 2.0 + 0.5 * rng.standard_normal(n) ** 2   # invented positive field, V/m
    nw = int(args.window)

    base, t_base, m_base = _timed(baseline, e, nw)
    ours, t_ours, m_ours = _timed(running_average, t, e, args.window)
    # Windows ending at sample k (k >= nw) hold samples k-nw .. k-1: the baseline's entry k-nw.
    diff = np.max(np.abs(ours.e_rms_v_per_m[nw:] - base[:n - nw])) if n > nw else float("nan")
    print(f"samples: {n:,} ({args.days:g} days at 1 Hz), window {args.window:g} s")
    print(f"baseline cumsum running mean: {t_base:8.3f} s, peak {m_base / 2**20:8.1f} MiB")
    print(f"running_average:              {t_ours:8.3f} s, peak {m_ours / 2**20:8.1f} MiB "
          "(outputs included, inputs excluded)")
    print(f"ratio running_average / baseline: {t_ours / t_base:.2f}x time, "
          f"{m_ours / max(m_base, 1):.2f}x memory; max |difference| {diff:.3g} V/m")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
