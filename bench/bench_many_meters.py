"""500 meters at 10 readings/s on one monitor process: its share of a core, CPU per reading, loss.

The meters come from bench/loadgen.py processes (several, apart from the monitor, so their CPU is
not counted) on real ptys; the monitor runs as `meterlink monitor` in its own process and is
stopped with SIGTERM. After a settling time the monitor's CPU (from /proc) and the readings
stored (from the span index) are sampled over several intervals: the figures are their median
with min..max. Loss: every meter's stored readings against its generator's truth (missing, extra
or altered readings between the first and last stored; must be 0). Baseline, in this same run:
the library's batched path in-process (feed_batched -> calibrate_axes -> add_reading_arrays ->
push_many, bench/bench_ingest.py) on 100,000 readings, CPU per reading. The soft limit of open
files is raised (the monitor inherits it) to twice the meters plus some; the figure says which.
A second CPU figure covers the whole run, from every meter streaming to the monitor's exit (its last
commit included, os.wait4), per reading stored: a monitor starved of CPU on a busy machine falls
behind, and CPU per reading offered would then flatter it.
"""

from __future__ import annotations

import os
import resource
import statistics
import tempfile
from pathlib import Path

import numpy as np

import _common
from bench_ingest import ingest
from meterlink.device.protocol import Axes, encode_message
from meterlink.physics.certificate import load_certificate
from station_load import run_station


def baseline_us_per_reading(n: int = 100_000, rounds: int = 3) -> list[float]:
    """CPU per reading of the in-process batched path (with blocks and running averages), per round."""
    rng = np.random.default_rng(0)
    counts = rng.integers(3000, 30000, size=(n, 3))
    wire = b"".join(encode_message(Axes(0, 0, *map(int, c)), i, i * 100) for i, c in enumerate(counts))
    cert = load_certificate("demo-probe")
    out = []
    with tempfile.TemporaryDirectory() as d:
        ingest(Path(d) / "warm.db", wire[: len(wire) // 20], cert, n // 20, True)
        for r in range(rounds):
            c0 = _common.cpu_s()
            ingest(Path(d) / f"b{r}.db", wire, cert, n, True)
            out.append(1e6 * (_common.cpu_s() - c0) / n)
    return out



def main(argv=None) -> dict:
    ap = _common.parser(__doc__)
    ap.add_argument("--meters", type=int, default=500)
    ap.add_argument("--intervals", type=int, default=3, help="measured intervals (>= 3 for a median)")
    args = ap.parse_args(argv)
    interval_s = 15.0 if args.quick else 30.0
    base = baseline_us_per_reading(20_000 if args.quick else 100_000)
    load0 = os.getloadavg()
    with tempfile.TemporaryDirectory() as d:
        r = run_station(d, args.meters, intervals=max(3, args.intervals), interval_s=interval_s,
                        settle_s=5.0 if args.quick else 15.0)
    load1 = os.getloadavg()
    # per reading offered (meters x 10/s over the interval): the monitor stores each meter's rows every
    # few seconds, so the count stored within one interval swings; the total stored says whether it kept up
    us = [1e6 * s["cpu_s"] / s["offered"] for s in r["samples"]]
    pct = [100.0 * s["cpu_s"] / s["wall_s"] for s in r["samples"]]
    rate = [s["readings"] / s["wall_s"] for s in r["samples"]]
    us_med, pct_med, rate_med, base_med = (statistics.median(x) for x in (us, pct, rate, base))
    kept_up = sum(s["readings"] for s in r["samples"]) / sum(s["offered"] for s in r["samples"])
    whole = r.get("whole_run")
    us_whole = 1e6 * whole["cpu_s"] / whole["readings"] if whole and whole["readings"] else float("nan")
    ratio = us_med / base_med
    ok = (r["loss"] == 0 and r["monitor_rc"] == 0 and r["integrity"] == "ok" and us_med < 30.0
          and pct_med < 25.0 and kept_up > 0.95 and us_whole < 30.0)
    soft, hard = resource.getrlimit(resource.RLIMIT_NOFILE)
    return _common.report(
        "many_meters", f"{r['n']} meters x 10 readings/s on one monitor process: {rate_med:,.0f} readings/s stored "
        f"(median of {len(us)} intervals of {interval_s:.0f} s; {100 * kept_up:.0f} % of those offered); monitor CPU {pct_med:.1f} % of one core "
        f"({min(pct):.1f}..{max(pct):.1f}), {us_med:.1f} us per reading offered ({min(us):.1f}..{max(us):.1f}); "
        f"whole run to the monitor's exit: {us_whole:.1f} us CPU per reading stored "
        f"({whole['readings'] if whole else 0:,} readings); "
        f"loss against the truth {r['loss']} (missing+extra+altered); fd soft limit {r['fd_soft_limit']}; "
        f"load average {load0[0]:.1f} -> {load1[0]:.1f} on {os.cpu_count()} x {_common.cpu_model()}",
        f"batched path in-process (decode, calibrate, store, blocks) {base_med:.2f} us/reading "
        f"({min(base):.2f}..{max(base):.2f}, {len(base)} rounds)",
        ratio, f"{ratio:.1f}x the batched path's CPU per reading",
        "< 30 us/reading end to end, < 25 % of one core at 500 meters x 10/s, no loss", ok, args.json,
        peak_mb=r.get("hwm_mib"), meters=r["n"], us_per_reading=us_med, us_per_reading_all=us, cpu_pct=pct_med,
        cpu_pct_all=pct, readings_per_s=rate_med, baseline_us_per_reading=base_med, baseline_all=base,
        kept_up=kept_up, us_per_reading_stored_whole_run=us_whole, whole_run=whole, loss=r["loss"], monitor_rc=r["monitor_rc"], integrity=r["integrity"], fd_soft_limit=soft,
        fd_hard_limit=hard, load_avg_before=load0, load_avg_after=load1, events=r["events"],
        sent=sum(r["sent"]), unsent_bytes=sum(r["unsent_bytes"]))


if __name__ == "__main__":
    main()
