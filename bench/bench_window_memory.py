"""Memory held by the monitor's running-average windows, and CPU per Series.push_many call, before and
after the windows kept merged bins instead of one segment per reading, and with the bins in a deque of
tuples (the first bins) against the flat array of float64 triples held now.

Usage: python bench/bench_window_memory.py [--quick] [--hours H] [--calls N] [--json]
One meter and band (a derived.Series with the default 360, 1800 and 86400-s windows) is fed a
simulated day of 10 readings/s (invented field, jittered times) in 10-s pieces, as the 500-meter
monitor feeds it; "before" is meterlink/station/derived.py as of commit BEFORE (read with git show,
one segment per reading), "deque" as of commit DEQUE (bins held as a deque of tuples), "after" is the
working copy. Memory: tracemalloc, bytes allocated and still
held by the Series after the day (the input arrays are not counted) per reading fed. CPU: the two
series, all holding the full day, are then fed the next readings one 10-s piece at a time, in
turn (a block of calls of one, then of the next, the order rotating), process CPU time per call,
median over blocks.
"""

from __future__ import annotations

import gc
import importlib.util
import statistics
import subprocess
import sys
import tempfile
import time
import tracemalloc
from pathlib import Path

import numpy as np

import _common
from meterlink.station import derived

BEFORE = "a945b24"          # the last commit with one held segment per reading
DEQUE = "ce3bd03"           # the last commit with the bins in a deque of tuples
RATE_HZ = 10.0
PIECE_S = 10.0


def _before_module(commit: str = BEFORE, name: str = "derived_before"):
    """meterlink/station/derived.py as of commit, imported as module name (read with git show)."""
    try:
        src = subprocess.run(["git", "-C", str(_common.ROOT), "show", f"{commit}:meterlink/station/derived.py"],
                             check=True, capture_output=True, text=True).stdout
    except (OSError, subprocess.CalledProcessError) as e:
        sys.exit(f"bench_window_memory: cannot read the old code from git ({commit}): {e}")
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / f"{name}.py"
        path.write_text(src)
        spec = importlib.util.spec_from_file_location(name, path)
        mod = importlib.util.module_from_spec(spec)
        sys.modules[name] = mod
        spec.loader.exec_module(mod)
    return mod


def readings(seconds: float, t0: float, seed: int):
    n = int(seconds * RATE_HZ)
    rng = np.random.default_rng(seed)
    t = t0 + (np.arange(n) + rng.uniform(-0.2, 0.2, n)) / RATE_HZ
    e = 2.0 + np.sin((t - t0) / 900.0) + rng.uniform(0.0, 0.5, n)     # invented field, V/m
    return t, e


def feed(series, t, e):
    step = int(PIECE_S * RATE_HZ)
    for k in range(0, t.size, step):
        series.push_many(t[k:k + step], e[k:k + step])


def held_bytes(mod, t, e) -> tuple[int, object, float]:
    """(bytes still allocated by a Series fed t, e; the Series; CPU s of the feed, traced)."""
    gc.collect()
    tracemalloc.start()
    base = tracemalloc.get_traced_memory()[0]
    c0 = time.process_time()
    s = mod.Series(3.0 / RATE_HZ)
    feed(s, t, e)
    cpu = time.process_time() - c0
    gc.collect()
    held = tracemalloc.get_traced_memory()[0] - base
    tracemalloc.stop()
    return held, s, cpu


def main(argv=None) -> dict:
    ap = _common.parser(__doc__)
    ap.add_argument("--hours", type=float, default=None, help="simulated hours fed before measuring (24)")
    ap.add_argument("--calls", type=int, default=None, help="push_many calls timed per code (2000)")
    args = ap.parse_args(argv)
    hours = args.hours or (2.0 if args.quick else 24.0)
    calls = args.calls or (400 if args.quick else 2000)
    _common.print_machine()
    before = _before_module()
    deque_mod = _before_module(DEQUE, "derived_deque")
    t0 = 1.7e9
    t, e = readings(hours * 3600.0, t0, 1)
    n = t.size
    mem = {}
    series = {}
    names = ("before", "deque", "after")
    for name, mod in (("before", before), ("deque", deque_mod), ("after", derived)):
        held, s, _ = held_bytes(mod, t, e)
        mem[name] = held
        series[name] = s
        segs = {int(ws): len(w._segs) for ws, w in s.windows.items()}
        print(f"{name}: {held / n:.1f} bytes per reading held after {hours:g} h at {RATE_HZ:g}/s "
              f"({n} readings, {held / 2**20:.2f} MiB); segments held per window {segs}", flush=True)
    # the same day in both: their running values agree within the stated bound
    tn, en = readings(calls * PIECE_S, t[-1] + 1.0 / RATE_HZ, 2)
    step = int(PIECE_S * RATE_HZ)
    pieces = [(tn[k:k + step], en[k:k + step]) for k in range(0, tn.size, step)]
    block = 20
    cpu = {k: [] for k in names}
    worst = 0.0
    gc.collect()
    for j in range(0, len(pieces), block):
        got = {}
        r = (j // block) % 3
        for name in names[r:] + names[:r]:
            s = series[name]
            c0 = time.process_time()
            out = [s.push_many(a, b)[1].e_rms_v_per_m for a, b in pieces[j:j + block]]
            cpu[name].append((time.process_time() - c0) / len(out))
            got[name] = np.concatenate(out, axis=1)
        rel = np.abs(got["after"] / got["before"] - 1.0)
        worst = max(worst, float(np.nanmax(rel)))
        same = np.array_equal(got["after"], got["deque"], equal_nan=True)   # the same bins, held otherwise
        if not same:
            sys.exit("bench_window_memory: the array-held bins give other running values than the deque's")
    med = {k: statistics.median(v) for k, v in cpu.items()}
    mean = {k: statistics.fmean(v) for k, v in cpu.items()}
    for k in names:
        v = sorted(cpu[k])
        print(f"{k}: {med[k] * 1e6:.0f} us CPU per push_many call of {step} readings "
              f"(median of {len(v)} blocks of {block}, range {v[0] * 1e6:.0f}-{v[-1] * 1e6:.0f} us; "
              f"mean {mean[k] * 1e6:.0f} us, with the periodic re-sums)", flush=True)
    print(f"running values after/before: largest relative difference {worst:.2e} "
          f"(stated bound: bin_s/window_s x p_max/p_mean = 1/3600 x p_max/p_mean); after/deque: identical")
    mem_ratio = mem["after"] / mem["before"]
    cpu_ratio = med["after"] / med["before"]
    deque_cpu = med["after"] / med["deque"]
    print(f"against the deque of bins (git {DEQUE}): memory {mem['after'] / mem['deque']:.3f}x "
          f"({mem['deque'] / 2**20:.2f} MiB -> {mem['after'] / 2**20:.2f} MiB per series), CPU per call {deque_cpu:.2f}x")
    return _common.report(
        "window_memory",
        f"{mem['after'] / n:.2f} B per reading held after {hours:g} h at 10/s (was {mem['before'] / n:.0f} B); "
        f"{med['after'] * 1e6:.0f} us CPU per push_many call (was {med['before'] * 1e6:.0f} us; "
        f"deque of bins {mem['deque'] / n:.2f} B, {med['deque'] * 1e6:.0f} us)",
        f"the same Series before the change (git {BEFORE}), same readings, same run",
        cpu_ratio,
        f"memory {mem_ratio:.4f}x, CPU per call {cpu_ratio:.2f}x (vs deque {deque_cpu:.2f}x)",
        "memory bounded by bins, CPU per call <= 1.1x",
        cpu_ratio <= 1.1,
        args.json,
        bytes_per_reading_before=mem["before"] / n, bytes_per_reading_after=mem["after"] / n,
        bytes_per_reading_deque=mem["deque"] / n, bytes_per_series_deque=mem["deque"],
        bytes_per_series_after=mem["after"], cpu_us_deque=med["deque"] * 1e6, cpu_ratio_vs_deque=deque_cpu,
        cpu_us_before=med["before"] * 1e6, cpu_us_after=med["after"] * 1e6,
        cpu_us_mean_before=mean["before"] * 1e6, cpu_us_mean_after=mean["after"] * 1e6, max_rel_diff=worst)


if __name__ == "__main__":
    main()
