"""Shared bits of the benchmarks: the result record, the machine line (CPU model, cores, load average),
medians of repeated runs with their spread (tracemalloc off), peak memory measured in a separate
process, and the --quick/--json options."""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import statistics
import subprocess
import sys
import time
import tracemalloc
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

JSON_TAG = "BENCH_JSON "


def parser(doc: str) -> argparse.ArgumentParser:
    ap = argparse.ArgumentParser(description=(doc or "").strip().splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="a smaller run (seconds, not minutes)")
    ap.add_argument("--json", action="store_true", help="also print the result as one tagged JSON line")
    return ap


def peak_rss_mb() -> float:
    """Peak resident memory of this process so far, MiB (Linux reports ru_maxrss in KiB)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def cpu_s() -> float:
    """User + system CPU seconds of this process so far."""
    r = resource.getrusage(resource.RUSAGE_SELF)
    return r.ru_utime + r.ru_stime


def cpu_model() -> str:
    """The CPU model name from /proc/cpuinfo ("?" where there is none)."""
    try:
        with open("/proc/cpuinfo") as f:
            for line in f:
                if line.startswith("model name"):
                    return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or "?"


def machine() -> dict:
    """CPU model, cores, load average (1, 5, 15 min) and Python version, as of now."""
    try:
        load = [round(x, 2) for x in os.getloadavg()]
    except OSError:
        load = None
    return {"cpu": cpu_model(), "cores": os.cpu_count(), "load_avg": load, "python": platform.python_version()}


def machine_text(m: dict | None = None) -> str:
    m = m or machine()
    load = "?" if m["load_avg"] is None else " ".join(f"{x:.2f}" for x in m["load_avg"])
    return f"{m['cores']} CPU(s), {m['cpu']}, load average {load}, Python {m['python']}"


def print_machine() -> None:
    print(f"machine: {machine_text()}", flush=True)


def _stats(runs: list[float]) -> dict:
    q = statistics.quantiles(runs, n=4) if len(runs) >= 2 else [runs[0]] * 3
    return {"median": statistics.median(runs), "min": min(runs), "max": max(runs), "q1": q[0], "q3": q[2],
            "n": len(runs), "runs": [round(x, 6) for x in runs]}


def _untraced() -> None:
    if tracemalloc.is_tracing():     # tracing slows allocation-heavy code several-fold: never time with it on
        tracemalloc.stop()


def timed(fn, repeat: int, warmup: int = 0) -> dict:
    """Wall time of fn() over ``repeat`` runs (after ``warmup`` untimed ones): median, min, max, quartiles."""
    _untraced()
    for _ in range(warmup):
        fn()
    runs = []
    for _ in range(repeat):
        t = time.perf_counter()
        fn()
        runs.append(time.perf_counter() - t)
    return _stats(runs)


def interleaved(fn, base, repeat: int) -> tuple[dict, dict]:
    """Time fn and its baseline alternately (fn, base, fn, base, ...), so that load drifting during the run
    hits both alike; returns (fn's timing, base's timing) as :func:`timed`. One untimed warm-up run each."""
    _untraced()
    fn()
    base()
    a, b = [], []
    for _ in range(repeat):
        for f, acc in ((fn, a), (base, b)):
            t = time.perf_counter()
            f()
            acc.append(time.perf_counter() - t)
    return _stats(a), _stats(b)


def rotated(fns: dict, repeat: int) -> dict:
    """Time several callables in turn (a, b, c, a, b, c, ...) after one untimed warm-up each; returns
    {name: timing as :func:`timed`}. Load changing during the run hits all of them alike."""
    _untraced()
    for f in fns.values():
        f()
    acc: dict = {k: [] for k in fns}
    for _ in range(repeat):
        for k, f in fns.items():
            t = time.perf_counter()
            f()
            acc[k].append(time.perf_counter() - t)
    return {k: _stats(v) for k, v in acc.items()}


def timing_text(r: dict, unit: str = "auto") -> str:
    """'1.23 s (median of 5, 1.20-1.31)' or in ms below a second."""
    ms = unit == "ms" or (unit == "auto" and r["median"] < 1.0)
    k, u, f = (1000.0, "ms", ".0f" if r["median"] >= 0.1 else ".1f") if ms else (1.0, "s", ".2f")
    return (f"{r['median'] * k:{f}} {u} (median of {r['n']}, range {r['min'] * k:{f}}-{r['max'] * k:{f}})")


def child_peak_rss_mib(argv: list[str], **kw) -> float:
    """Peak resident memory (ru_maxrss) of one run of argv in its own process, MiB: memory is measured
    apart from the timed runs, so neither disturbs the other."""
    p = subprocess.Popen(argv, stdout=subprocess.DEVNULL, **kw)
    _, status, ru = os.wait4(p.pid, 0)
    p.returncode = os.waitstatus_to_exitcode(status)
    if p.returncode != 0:
        raise RuntimeError(f"memory run failed (exit {p.returncode}): {' '.join(map(str, argv))}")
    return ru.ru_maxrss / 1024.0


def report(name: str, figure: str, baseline: str, ratio: float, ratio_text: str, target: str, met: bool | None,
           as_json: bool, peak_mb: float | None = None, **extra) -> dict:
    """Print one benchmark's result (and a tagged JSON line for run_all); returns the record."""
    rec = {"name": name, "figure": figure, "baseline": baseline, "ratio": ratio, "ratio_text": ratio_text,
           "target": target, "met": met, "peak_rss_mb": round(peak_rss_mb() if peak_mb is None else peak_mb, 1),
           "python": platform.python_version(), "machine": machine(), **extra}
    verdict = "n/a" if met is None else ("MET" if met else "NOT MET")
    print(f"[{name}] {figure}")
    print(f"  baseline: {baseline}")
    print(f"  ratio: {ratio_text}; peak RSS {rec['peak_rss_mb']:.0f} MiB")
    print(f"  target: {target} -> {verdict}")
    print(f"  machine: {machine_text(rec['machine'])}")
    if as_json:
        print(JSON_TAG + json.dumps(rec, default=str), flush=True)
    return rec
