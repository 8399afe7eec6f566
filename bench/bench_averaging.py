"""Time meterlink.physics.averaging.running_average over N days of 1 Hz data against a lean numpy
cumulative-sum running mean of E^2 (the baseline), on the same data in the same run.

Usage: python bench/bench_averaging.py [--quick] [--days N] [--window S] [--repeat R] [--jitter S] [--gaps N] [--json]
The baseline is the least work the result takes on regular, gap-free samples: E^2 written into one
preallocated float64 array, cumsum in place, one subtraction into the output, divide and root in place
(two arrays of the input's length, no other copies). It keeps no coverage and no precision
safeguard; running_average handles irregular sampling, gaps, coverage and partial windows and keeps
full precision over long records. --jitter S moves each sample time by up to +-S seconds and
--gaps N cuts N ten-minute gaps into the record (nearly even records; the baseline still runs on the
even ones, as it cannot take anything else). Times are medians of several runs taken in turn (tracemalloc off);
memory is measured in a separate process per function (peak RSS during the call, with the peak reset
through /proc/self/clear_refs after the inputs are built, so inputs are not counted twice).
"""

from __future__ import annotations

import subprocess
import sys
import time

import numpy as np

import _common
from meterlink.physics.averaging import running_average


def baseline(e_v_per_m: np.ndarray, n_window: int) -> np.ndarray:
    """Running RMS over n_window samples (1 s each) by one in-place cumulative sum of E^2."""
    c = np.empty(e_v_per_m.size + 1)
    c[0] = 0.0
    np.multiply(e_v_per_m, e_v_per_m, out=c[1:])
    np.cumsum(c[1:], out=c[1:])
    out = np.subtract(c[n_window:], c[:-n_window])
    out /= n_window
    np.sqrt(out, out=out)
    return out


def data(days: float, jitter_s: float = 0.0, gaps: int = 0):
    n = int(days * 86400)
    rng = np.random.default_rng(20240601)
    t = np.arange(n, dtype=np.float64) + 1.7e9
    if jitter_s:
        t += np.random.default_rng(7).uniform(-jitter_s, jitter_s, n)
    for k in np.sort(np.random.default_rng(8).integers(1, n, gaps)):
        t[k:] += 600.0
    e = rng.standard_normal(n)
    e *= e
    e *= 0.5
    e += 2.0                                           # invented positive field, V/m
    return t, e


def _rss_kib(field: str) -> int:
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith(field + ":"):
                return int(line.split()[1])
    return 0


def memory_child(which: str, days: float, window: float, jitter_s: float = 0.0, gaps: int = 0) -> None:
    """Print the inputs' RSS and the peak RSS during one call (KiB), in this fresh process."""
    t, e = data(days, jitter_s, gaps)
    before = _rss_kib("VmRSS")
    try:
        with open("/proc/self/clear_refs", "w") as f:
            f.write("5")                               # reset VmHWM to the current RSS
    except OSError:
        pass
    out = baseline(e, int(window)) if which == "baseline" else running_average(t, e, window)
    print(before, _rss_kib("VmHWM"), out is not None)


def child_memory_mib(which: str, days: float, window: float, jitter_s: float = 0.0,
                     gaps: int = 0) -> tuple[float, float]:
    """(peak RSS during the call, the part above the inputs) of one call in its own process, MiB."""
    p = subprocess.run([sys.executable, __file__, "--memory-child", which, str(days), str(window),
                        str(jitter_s), str(gaps)],
                       capture_output=True, text=True, check=True, cwd=_common.ROOT)
    before, peak, _ = p.stdout.split()
    return int(peak) / 1024.0, (int(peak) - int(before)) / 1024.0


def interleaved_cpu(fn, base, repeat: int):
    """As _common.interleaved (one untimed warm-up each, then fn, base, fn, base, ...), timing both the
    wall clock and this process's CPU time: on a shared, loaded machine the CPU time shows the work done
    apart from waiting for a core. Returns (fn wall, base wall, fn CPU, base CPU) timings."""
    _common._untraced()                                # tracemalloc off
    fn()
    base()
    acc = {k: [] for k in ("fw", "bw", "fc", "bc")}
    for _ in range(repeat):
        for f, kw, kc in ((fn, "fw", "fc"), (base, "bw", "bc")):
            c, w = _common.cpu_s(), time.perf_counter()
            f()
            acc[kw].append(time.perf_counter() - w)
            acc[kc].append(_common.cpu_s() - c)
    return tuple(_common._stats(acc[k]) for k in ("fw", "bw", "fc", "bc"))


def main(argv=None) -> dict:
    ap = _common.parser(__doc__)
    ap.add_argument("--days", type=float, default=None, help="record length in days (default 365; 30 with --quick)")
    ap.add_argument("--window", type=float, default=360.0, help="averaging window in s (default 360)")
    ap.add_argument("--repeat", type=int, default=None, help="runs of each (default 5; 3 with --quick)")
    ap.add_argument("--jitter", type=float, default=0.0, help="sample times moved by up to +-S s (default 0)")
    ap.add_argument("--gaps", type=int, default=0, help="ten-minute gaps cut into the record (default 0)")
    args = ap.parse_args(argv)
    days = args.days if args.days is not None else (30.0 if args.quick else 365.0)
    repeat = args.repeat or (3 if args.quick else 5)
    _common.print_machine()
    t, e = data(days, args.jitter, args.gaps)
    n = t.size
    nw = int(args.window)
    base = baseline(e, nw)
    ours = running_average(t, e, args.window)
    # Windows ending at sample k (k >= nw) hold samples k-nw .. k-1: the baseline's entry k-nw.
    even = not (args.jitter or args.gaps)
    diff = float(np.max(np.abs(ours.e_rms_v_per_m[nw:] - base[:n - nw]))) if n > nw and even else float("nan")
    del base, ours
    r_ours, r_base, c_ours, c_base = interleaved_cpu(lambda: running_average(t, e, args.window),
                                                    lambda: baseline(e, nw), repeat)
    cpu_ratio = c_ours["median"] / c_base["median"]
    m_ours, m_ours_extra = child_memory_mib("ours", days, args.window, args.jitter, args.gaps)
    m_base, m_base_extra = child_memory_mib("baseline", days, args.window)
    ratio = r_ours["median"] / r_base["median"]
    return _common.report(
        "averaging", f"running_average of {n:,} samples ({days:g} days at 1 Hz"
        f"{f', jitter +-{args.jitter:g} s' if args.jitter else ''}{f', {args.gaps} gaps' if args.gaps else ''}"
        f", window {args.window:g} s): "
        f"{_common.timing_text(r_ours)}; {m_ours_extra:.0f} MiB above the inputs (outputs included)",
        f"lean in-place numpy cumulative sum {_common.timing_text(r_base)}, {m_base_extra:.0f} MiB above the inputs",
        ratio, f"{ratio:.2f}x the baseline's time (CPU time {_common.timing_text(c_ours)} against "
        f"{_common.timing_text(c_base)}: {cpu_ratio:.2f}x); max |difference| {diff:.3g} V/m",
        "<= 3x the lean cumulative sum's time, < 1 GiB above the inputs (one year)",
        (ratio <= 3.0 and m_ours_extra < 1024) if days >= 365 else None, args.json, peak_mb=m_ours,
        cpu_ratio=cpu_ratio, cpu_s=c_ours["median"], baseline_cpu_s=c_base["median"],
        days=days, jitter_s=args.jitter, gaps=args.gaps, seconds=r_ours["median"], baseline_s=r_base["median"], runs=r_ours["runs"],
        baseline_runs=r_base["runs"], extra_mib=m_ours_extra, baseline_extra_mib=m_base_extra,
        baseline_peak_mib=m_base)


if __name__ == "__main__":
    if len(sys.argv) > 1 and sys.argv[1] == "--memory-child":
        memory_child(sys.argv[2], float(sys.argv[3]), float(sys.argv[4]), float(sys.argv[5]), int(sys.argv[6]))
    else:
        main()
