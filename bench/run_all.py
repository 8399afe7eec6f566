"""Run every benchmark, each in its own process (so peak memory is its own), and print a summary table.

Usage: python bench/run_all.py [--quick] [--only NAME ...]
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
BENCHES = ["bench_parse", "bench_ingest", "bench_averaging", "bench_stats", "bench_report", "bench_monitor",
           "bench_many_meters", "bench_cli"]
TAG = "BENCH_JSON "


def machine() -> str:
    cpu = "?"
    try:
        for line in open("/proc/cpuinfo"):
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    return f"{os.cpu_count()} CPU(s), {cpu}, Python {platform.python_version()}"


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="smaller runs of each benchmark")
    ap.add_argument("--only", nargs="*", default=None, help="run only these (e.g. bench_parse)")
    args = ap.parse_args(argv)
    results = []
    for name in args.only or BENCHES:
        cmd = [sys.executable, str(HERE / f"{name}.py"), "--json"] + (["--quick"] if args.quick else [])
        t = time.monotonic()
        p = subprocess.run(cmd, capture_output=True, text=True, cwd=HERE.parent)
        rec = None
        for line in p.stdout.splitlines():
            if line.startswith(TAG):
                rec = json.loads(line[len(TAG):])
            else:
                print(line)
        if rec is None:
            print(f"[{name}] FAILED (exit {p.returncode}): {p.stderr.strip().splitlines()[-1:]}")
            rec = {"name": name, "ratio_text": "failed", "target": "", "met": False, "peak_rss_mb": 0}
        rec["elapsed_s"] = time.monotonic() - t
        results.append(rec)
    print(f"\nmachine: {machine()}{' (quick run)' if args.quick else ''}")
    print(f"{'benchmark':<12} {'result (ratio to baseline)':<62} {'peak RSS':>9}  {'target':<44} verdict")
    for r in results:
        v = "n/a" if r.get("met") is None else ("met" if r["met"] else "NOT MET")
        print(f"{r['name']:<12} {r['ratio_text'][:62]:<62} {r['peak_rss_mb']:>5.0f} MiB  {r['target'][:44]:<44} {v}")
    return 1 if any(r.get("ratio_text") == "failed" for r in results) else 0  # a bench that did not run


if __name__ == "__main__":
    raise SystemExit(main())
