"""Run every benchmark, each in its own process (so peak memory is its own), and print a summary table.

Usage: python bench/run_all.py [--quick] [--only NAME ...]
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
BENCHES = ["bench_parse", "bench_ingest", "bench_averaging", "bench_stats", "bench_report", "bench_monitor",
           "bench_many_meters", "bench_cli", "bench_predict", "bench_central",
           "bench_selective", "bench_streaming", "bench_pages", "bench_window_memory",
           "bench_monitor_day"]
TAG = "BENCH_JSON "


def machine() -> str:
    """CPU model, cores, load average and Python version, as bench/_common prints them with each run."""
    sys.path.insert(0, str(HERE))
    import _common
    return _common.machine_text()


def _rows(rec: dict) -> dict:
    return {"name": rec.get("name", "?"), "figure": rec.get("figure", ""), "baseline": rec.get("baseline", ""),
            "ratio": rec.get("ratio_text", ""), "target": rec.get("target", ""), "met": rec.get("met"),
            "peak": rec.get("peak_rss_mb"), "machine": rec.get("machine")}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="smaller runs of each benchmark")
    ap.add_argument("--only", nargs="*", default=None, help="run only these (e.g. bench_parse)")
    ap.add_argument("--json-out", metavar="FILE", help="also write every record (one per target) to this JSON file")
    args = ap.parse_args(argv)
    results, failed = [], []
    start_machine = machine()
    print(f"machine at start: {start_machine}{' (quick run)' if args.quick else ''}", flush=True)
    for name in args.only or BENCHES:
        cmd = [sys.executable, str(HERE / f"{name}.py"), "--json"] + (["--quick"] if args.quick else [])
        t = time.monotonic()
        p = subprocess.run(cmd, capture_output=True, text=True, cwd=HERE.parent)
        recs = []
        for line in p.stdout.splitlines():
            if line.startswith(TAG):           # every target of the script (several per script)
                recs.append(json.loads(line[len(TAG):]))
            else:
                print(line)
        if p.returncode != 0 or not recs:
            err = (p.stderr.strip().splitlines() or ["no output"])[-1]
            print(f"[{name}] FAILED (exit {p.returncode}): {err}")
            failed.append(name)
            recs.append({"name": name, "figure": f"FAILED: {err}", "ratio_text": "failed", "target": "",
                         "met": False, "peak_rss_mb": 0})
        for r in recs:
            r["script"] = name
            r["script_elapsed_s"] = round(time.monotonic() - t, 1)
        results.extend(recs)
    print(f"\nmachine at start: {start_machine}{' (quick run)' if args.quick else ''}")
    print(f"machine at end:   {machine()}")
    print(f"{'target':<18} {'figure':<70} {'baseline':<52} {'ratio':<34} {'peak':>8}  {'goal':<40} verdict")
    for rec in results:
        r = _rows(rec)
        v = "n/a" if r["met"] is None else ("met" if r["met"] else "NOT MET")
        peak = f"{r['peak']:.0f} MiB" if isinstance(r["peak"], (int, float)) else "-"
        print(f"{r['name'][:18]:<18} {r['figure'][:70]:<70} {r['baseline'][:52]:<52} {r['ratio'][:34]:<34} "
              f"{peak:>8}  {r['target'][:40]:<40} {v}")
    if args.json_out:
        Path(args.json_out).write_text(json.dumps({"machine_start": start_machine, "machine_end": machine(),
                                                   "quick": args.quick, "results": results}, indent=2, default=str))
    return 1 if failed else 0  # a bench that did not run


if __name__ == "__main__":
    raise SystemExit(main())
