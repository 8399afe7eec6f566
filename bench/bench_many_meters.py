"""Eight (or more) simulated meters recorded at once by one host process: no reading lost, CPU measured.

The meters run in a separate process (bench/sim_farm.py), so the CPU figure is the host's alone.
Loss is checked against each simulator's truth log: every reading the device sent, between the
first and last stored, must be stored once with its counts and tick.
"""

from __future__ import annotations

import tempfile

import _common
from many import record_many


def main(argv=None) -> dict:
    ap = _common.parser(__doc__)
    ap.add_argument("--meters", type=int, default=8)
    args = ap.parse_args(argv)
    # device time per meter: 1 reading per device second; speed 10 = 10 readings/s per meter
    duration = 60.0 if args.quick else 300.0
    with tempfile.TemporaryDirectory() as d:
        r = record_many(d, n=args.meters, speed=10.0, interval_ms=1000, duration_s=duration)
    missing = sum(c["missing"] + c["duplicates"] + c["extra"] for c in r["checks"] if c)
    ok = not r["errors"] and all(r["checks"]) and missing == 0 and r["integrity"] == "ok"
    rate = r["readings"] / r["wall_s"]
    cpu_pct = 100.0 * r["host_cpu_s"] / r["wall_s"]
    us_per = 1e6 * r["host_cpu_s"] / max(r["readings"], 1)
    return _common.report(
        "many_meters", f"{r['n']} meters, {r['readings']:,} readings in {r['wall_s']:.1f} s ({rate:.0f}/s); "
        f"missing/duplicate/altered {missing}; host CPU {cpu_pct:.1f} % of one core ({us_per:.0f} us/reading)",
        f"simulator process CPU {100 * r['farm_cpu_s'] / r['wall_s']:.0f} % of one core (not counted)",
        cpu_pct, f"host {cpu_pct:.1f} % of one core", ">= 8 meters, no loss", ok and r["n"] >= 8, args.json,
        meters=r["n"], readings=r["readings"], missing=missing, host_cpu_pct=cpu_pct, us_per_reading=us_per,
        errors=r["errors"], stop_reasons=r["stop_reasons"])


if __name__ == "__main__":
    main()
