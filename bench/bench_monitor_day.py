"""Resident memory of the station monitor over a simulated day and more at many meters: where it plateaus.

Usage: python bench/bench_monitor_day.py [--quick] [--meters N] [--hours H] [--rate HZ] [--piece-s S]
       [--no-baseline] [--json]
N meters (default 500, 20 with --quick) of a station file (demo-probe certificate, one alarm rule) are
driven over a SIMULATED clock of H hours (26) through the monitor's own in-process path after
decoding: a real ``Monitor`` opened on a real SQLite station file in a temporary directory (lock,
station and meter records, replay), each meter's invented raw counts (RATE readings/s, 1) put into its
pending queue as ``Ingest._readings`` does, then per piece of S simulated seconds (600) the monitor's
tick work: ``_calibrate_pending_many`` (one calibration per certificate group, health checks,
``Series.push_many``, alarm machines) and ``_commit`` (final blocks and running summaries, alarm
state, meter rows and events in one transaction). The raw readings themselves are not stored (a day
of 500 meters at 1/s is 43 M rows on disk, not in memory; the store's page cache is bounded).
At every simulated hour the process's resident memory (VmRSS of /proc/self/status, tracemalloc off)
is printed; the verdict: a plateau when the RSS grew by less than 2 % over the last 2 simulated
hours, and the peak RSS (ru_maxrss, os.wait4). Each code runs in its own process: the working copy,
then (the baseline) the same with meterlink/station/derived.py's SlidingWindow as of commit DEQUE
(bins in a deque of tuples, read with git show).
"""

from __future__ import annotations

import argparse
import gc
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

import _common

DEQUE = "ce3bd03"           # the last commit with the window bins in a deque of tuples
HEAD = """format = "meterlink-station/1"
[station]
name = "Day station (synthetic)"
database = "{db}"
[assessment]
standard = "icnirp-2020"
tier = "public"
band = ["80 MHz", "4 GHz"]
convention = "power"
interval_s = {interval_s}
[health]
drift_max_ppm = 1e9
[[alarm]]
name = "six-minute high"
unit = "pct_power"
threshold = 50
window_s = 360
"""
METER = """[[meter]]
name = "d{i:04d}"
port = "/dev/null-bench-{i}"
certificate = "demo-probe"
"""
T0 = 1_767_225_600.0        # simulated start, 2026-01-01T00:00Z (a block edge)


def rss_mib() -> float:
    """Resident memory of this process now (VmRSS), MiB."""
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 1024.0
    return float("nan")


def _use_deque_window() -> None:
    """Make derived.Series build the SlidingWindow of commit DEQUE (before any Series exists)."""
    import importlib.util

    from meterlink.station import derived
    src = subprocess.run(["git", "-C", str(_common.ROOT), "show", f"{DEQUE}:meterlink/station/derived.py"],
                         check=True, capture_output=True, text=True).stdout
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "derived_deque.py"
        path.write_text(src)
        spec = importlib.util.spec_from_file_location("derived_deque", path)
        mod = importlib.util.module_from_spec(spec)
        sys.modules["derived_deque"] = mod
        spec.loader.exec_module(mod)
    derived.SlidingWindow = mod.SlidingWindow


def child(code: str, n: int, hours: float, rate_hz: float, piece_s: float) -> None:
    """One run (in its own process): print 'HOUR h rss' lines, then 'DONE {json}'."""
    if code == "deque":
        _use_deque_window()
    from meterlink.station.meterwriter import MeterWriter
    from meterlink.station.monitor import Monitor
    from meterlink.station.stationfile import load_station

    rss0 = rss_mib()
    with tempfile.TemporaryDirectory() as d:
        d = Path(d)
        cfg = d / "station.toml"
        cfg.write_text(HEAD.format(db=d / "station.db", interval_s=1.0 / rate_hz)
                       + "".join(METER.format(i=i) for i in range(n)))
        mon = Monitor(load_station(cfg))
        try:
            for ms in mon.meters:          # as Monitor.run sets them up (no link: the readings come from here)
                ms.writer = MeterWriter(mon.store, ms.session_id, max_rows=10**9, max_age_s=mon.store_s,
                                        max_keep=200_000)
            rng = np.random.default_rng(7)
            per = int(round(piece_s * rate_hz))
            base = np.arange(per) / rate_hz
            phase = rng.uniform(0.0, 2 * np.pi, n)
            seq = np.zeros(n, np.int64)
            pieces = int(round(hours * 3600.0 / piece_s))
            per_hour = 3600.0 / piece_s
            rss_start = rss_mib()
            print(f"HOUR 0 {rss_start:.1f}", flush=True)
            c0, w0 = _common.cpu_s(), time.monotonic()
            for k in range(pieces):
                t_piece = T0 + k * piece_s
                for i, ms in enumerate(mon.meters):
                    t = t_piece + base + rng.uniform(0.0, 0.2 / rate_hz, per)
                    # invented counts: a slow swing per meter with noise on each axis (never frozen)
                    level = 9000.0 + 6000.0 * np.sin(2 * np.pi * (t - T0) / 5400.0 + phase[i])
                    raw = (level[:, None] + rng.integers(-800, 800, (per, 3))).astype(np.int64)
                    ms.pending.append((t, raw))    # Ingest._readings: the calibration queue
                    ms.n_pending += per
                    seq[i] += per
                mon._calibrate_pending_many(mon.meters)
                mon._commit()
                if (k + 1) % per_hour < 1e-9 or k + 1 == pieces:
                    print(f"HOUR {(k + 1) * piece_s / 3600.0:g} {rss_mib():.1f}", flush=True)
            cpu, wall = _common.cpu_s() - c0, time.monotonic() - w0
            gc.collect()
            nseg = sum(len(w._segs) for ms in mon.meters for s in ms.series.values() for w in s.windows.values())
            nblk = mon.conn.execute("SELECT count(*) FROM mon_block").fetchone()[0]
            print("DONE " + json.dumps({"code": code, "cpu_s": cpu, "wall_s": wall, "rss_import_mib": rss0,
                                        "rss_opened_mib": rss_start, "segments": nseg, "blocks_stored": nblk,
                                        "readings": int(seq.sum()),
                                        "db_mib": (d / "station.db").stat().st_size / 2**20}), flush=True)
        finally:
            mon.store.close()
            mon._lock.release()


def run_child(code: str, n: int, hours: float, rate_hz: float, piece_s: float) -> dict:
    """Run one code in its own process; its hourly RSS, summary and peak RSS (ru_maxrss, os.wait4)."""
    argv = [sys.executable, __file__, "--child", code, "--meters", str(n), "--hours", str(hours),
            "--rate", str(rate_hz), "--piece-s", str(piece_s)]
    p = subprocess.Popen(argv, stdout=subprocess.PIPE, text=True)
    curve, done = [], None
    for line in p.stdout:
        if line.startswith("HOUR "):
            _, h, r = line.split()
            curve.append((float(h), float(r)))
            print(f"  {code}: hour {float(h):5.1f}  RSS {float(r):8.1f} MiB", flush=True)
        elif line.startswith("DONE "):
            done = json.loads(line[5:])
        else:
            print(line, end="")
    _, status, ru = os.wait4(p.pid, 0)
    if os.waitstatus_to_exitcode(status) != 0 or done is None:
        sys.exit(f"bench_monitor_day: the {code} run failed (exit {os.waitstatus_to_exitcode(status)})")
    return {**done, "curve": curve, "peak_mib": ru.ru_maxrss / 1024.0}


def verdict(curve: list[tuple[float, float]]) -> tuple[bool, float, float, float]:
    """(plateau, growth over the last 2 simulated hours in % of the RSS, RSS at 24 h, RSS at the end)."""
    h_end, r_end = curve[-1]
    before = [r for h, r in curve if h <= h_end - 2.0 + 1e-9]
    r_2h = before[-1] if before else curve[0][1]
    at24 = [r for h, r in curve if abs(h - 24.0) < 1e-9]
    growth = 100.0 * (r_end - r_2h) / r_end
    return growth < 2.0, growth, (at24[0] if at24 else float("nan")), r_end


def main(argv=None) -> dict:
    ap = _common.parser(__doc__)
    ap.add_argument("--meters", type=int, default=None, help="meters (500; 20 with --quick)")
    ap.add_argument("--hours", type=float, default=26.0, help="simulated hours (26)")
    ap.add_argument("--rate", type=float, default=1.0, help="readings per second per meter (1)")
    ap.add_argument("--piece-s", type=float, default=600.0, help="simulated seconds fed per tick (600)")
    ap.add_argument("--no-baseline", action="store_true", help="skip the deque-of-bins run")
    ap.add_argument("--child", choices=("array", "deque"), help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    n = args.meters if args.meters is not None else (20 if args.quick else 500)
    if args.child:
        child(args.child, n, args.hours, args.rate, args.piece_s)
        return {}
    if n < 1 or args.hours < 2.0 or args.rate <= 0 or args.piece_s <= 0 or 3600.0 % args.piece_s:
        sys.exit("bench_monitor_day: need --meters >= 1, --hours >= 2, --rate > 0 and a --piece-s dividing an hour")
    _common.print_machine()
    load0 = os.getloadavg()
    runs = {"array": run_child("array", n, args.hours, args.rate, args.piece_s)}
    if not args.no_baseline:
        runs["deque"] = run_child("deque", n, args.hours, args.rate, args.piece_s)
    load1 = os.getloadavg()
    print("hour  " + "  ".join(f"{k:>12}" for k in runs) + "   (RSS, MiB)")
    for j, (h, _) in enumerate(runs["array"]["curve"]):
        print(f"{h:4g}  " + "  ".join(f"{r['curve'][j][1]:12.1f}" for r in runs.values()))
    out = {}
    for k, r in runs.items():
        ok, growth, at24, end = verdict(r["curve"])
        r.update(plateau=ok, growth_pct=growth, rss_24h=at24, rss_end=end)
        per_series = (end - r["curve"][0][1]) * 2**20 / n
        r["bytes_per_series"] = per_series
        print(f"{k}: {'plateau' if ok else 'NO plateau'} (RSS {growth:+.2f} % over the last 2 h), RSS {at24:.0f} MiB at "
              f"24 h, {end:.0f} MiB at {args.hours:g} h, peak {r['peak_mib']:.0f} MiB; {per_series / 1024:.0f} KiB per "
              f"meter-series over the opened monitor; {r['segments']} window segments held; "
              f"{r['readings'] / 1e6:.1f} M readings in {r['wall_s']:.0f} s wall, {r['cpu_s']:.0f} s CPU", flush=True)
        out[k] = r
    a = out["array"]
    big = n >= 500 and args.hours >= 26.0
    met = (a["plateau"] and a["peak_mib"] < 1024.0) if big else None
    d = out.get("deque")
    base_txt = (f"window bins in a deque of tuples (git {DEQUE}): peak {d['peak_mib']:.0f} MiB, {d['rss_24h']:.0f} MiB "
                f"at 24 h, {d['rss_end']:.0f} at {args.hours:g} h" if d else "none (--no-baseline)")
    return _common.report(
        "monitor_day",
        f"{n} meters x {args.rate:g}/s over a simulated {args.hours:g} h: peak RSS {a['peak_mib']:.0f} MiB, "
        f"{a['rss_24h']:.0f} MiB at 24 h, {a['rss_end']:.0f} at {args.hours:g} h "
        f"({'plateau' if a['plateau'] else 'no plateau'}, {a['growth_pct']:+.1f} % over the last 2 h)",
        base_txt,
        (a["peak_mib"] / d["peak_mib"]) if d else float("nan"),
        f"peak RSS {a['peak_mib'] / d['peak_mib']:.2f}x" if d else "-",
        "plateau (< 2 % in the last 2 h), peak < 1 GiB at 500 meters", met, args.json, peak_mb=a["peak_mib"],
        meters=n, hours=args.hours, rate_hz=args.rate, piece_s=args.piece_s,
        load_avg_start=[round(x, 2) for x in load0], load_avg_end=[round(x, 2) for x in load1],
        runs={k: {kk: v for kk, v in r.items()} for k, r in out.items()})


if __name__ == "__main__":
    main()
