"""Shared bits of the benchmarks: the result record, peak memory, and the --quick/--json options."""

from __future__ import annotations

import argparse
import json
import platform
import resource
import sys
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


def report(name: str, figure: str, baseline: str, ratio: float, ratio_text: str, target: str, met: bool | None,
           as_json: bool, peak_mb: float | None = None, **extra) -> dict:
    """Print one benchmark's result (and a tagged JSON line for run_all); returns the record."""
    rec = {"name": name, "figure": figure, "baseline": baseline, "ratio": ratio, "ratio_text": ratio_text,
           "target": target, "met": met, "peak_rss_mb": round(peak_rss_mb() if peak_mb is None else peak_mb, 1),
           "python": platform.python_version(), **extra}
    verdict = "n/a" if met is None else ("MET" if met else "NOT MET")
    print(f"[{name}] {figure}")
    print(f"  baseline: {baseline}")
    print(f"  ratio: {ratio_text}; peak RSS {rec['peak_rss_mb']:.0f} MiB")
    print(f"  target: {target} -> {verdict}")
    if as_json:
        print(JSON_TAG + json.dumps(rec, default=str), flush=True)
    return rec
