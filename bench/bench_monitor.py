"""The monitor's footprint: resident memory and CPU per reading, two simulated meters at 10 readings/s.

Real time (simulator speed 1, interval 100 ms). The monitor runs as `meterlink monitor` in its own
process, the meters in another (bench/sim_farm.py). CPU is counted after a 5 s settling time;
RSS is the monitor's peak (VmHWM). Baseline: one core (100 %).
"""

from __future__ import annotations

import sqlite3
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import _common
from farm import Farm, proc_cpu_s, proc_rss_mb

STATION = """format = "meterlink-station/1"
[station]
name = "Bench Knoll (synthetic)"
database = "{db}"
[assessment]
standard = "icnirp-2020"
tier = "public"
band = ["80 MHz", "4 GHz"]
convention = "power"
interval_s = 0.1
[[meter]]
name = "a"
port = "{p0}"
certificate = "demo-probe"
[[meter]]
name = "b"
port = "{p1}"
certificate = "demo-probe"
"""


def count(db: Path) -> int:
    try:
        with sqlite3.connect(db, timeout=5) as c:
            return c.execute("select count(*) from readings").fetchone()[0]
    except sqlite3.Error:
        return 0


def main(argv=None) -> dict:
    args = _common.parser(__doc__).parse_args(argv)
    run_s = 12.0 if args.quick else 25.0
    with tempfile.TemporaryDirectory() as d:
        d = Path(d)
        with Farm(2, d, speed=1.0, scenario="station") as farm:
            cfg = d / "station.toml"
            cfg.write_text(STATION.format(db=d / "mon.db", p0=farm.ports[0], p1=farm.ports[1]))
            mon = subprocess.Popen([sys.executable, "-m", "meterlink", "monitor", "--config", str(cfg), "--quiet"],
                                   cwd=_common.ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
            try:
                time.sleep(5.0)  # settling: imports, handshakes (a measurement interval, not synchronisation)
                c0, n0, t0 = proc_cpu_s(mon.pid), count(d / "mon.db"), time.monotonic()
                time.sleep(run_s)
                c1, n1, t1 = proc_cpu_s(mon.pid), count(d / "mon.db"), time.monotonic()
                rss, hwm = proc_rss_mb(mon.pid)
            finally:
                mon.terminate()
                mon.wait(30)
    cpu_pct = 100.0 * (c1 - c0) / (t1 - t0)
    n = max(n1 - n0, 1)
    return _common.report(
        "monitor", f"2 meters x 10 readings/s for {t1 - t0:.0f} s: {n1 - n0} readings stored; CPU {cpu_pct:.2f} % "
        f"of one core ({1e6 * (c1 - c0) / n:.0f} us/reading); RSS {rss:.0f} MiB (peak {hwm:.0f} MiB)",
        "one core = 100 %", cpu_pct, f"{cpu_pct:.2f} % of one core", "< 100 MB resident and < 2 % of one core",
        hwm < 100 and cpu_pct < 2.0, args.json, peak_mb=hwm, readings=n1 - n0, cpu_pct=cpu_pct, rss_mib=rss)


if __name__ == "__main__":
    main()
