"""Start-up time of `meterlink --help` against a bare `python -c pass`, and which heavy modules it loads.

Each is run 7 times in a fresh interpreter (the same venv Python); the median wall time counts.
"""

from __future__ import annotations

import statistics
import subprocess
import sys
import time

import _common

HEAVY = ("numpy", "scipy", "rich", "serial", "sqlite3", "sqlite_utils", "matplotlib")
PROBE = ("import sys, runpy; sys.argv = ['meterlink', '--help']\n"
         "try:\n    runpy.run_module('meterlink', run_name='__main__')\nexcept SystemExit:\n    pass\n"
         f"print(','.join(m for m in {HEAVY!r} if m in sys.modules), file=sys.stderr)")


def median_wall(cmd: list[str], n: int) -> float:
    times = []
    for _ in range(n):
        t = time.perf_counter()
        subprocess.run(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, check=True, cwd=_common.ROOT)
        times.append(time.perf_counter() - t)
    return statistics.median(times)


def main(argv=None) -> dict:
    args = _common.parser(__doc__).parse_args(argv)
    n = 3 if args.quick else 7
    bare = median_wall([sys.executable, "-c", "pass"], n)
    cli = median_wall([sys.executable, "-m", "meterlink", "--help"], n)
    heavy = subprocess.run([sys.executable, "-c", PROBE], capture_output=True, text=True, cwd=_common.ROOT)
    loaded = heavy.stderr.strip().splitlines()[-1] if heavy.stderr.strip() else ""
    return _common.report(
        "cli", f"meterlink --help {cli * 1000:.0f} ms (median of {n}); heavy modules loaded: {loaded or 'none'}",
        f"python -c pass {bare * 1000:.0f} ms", cli / bare, f"{cli / bare:.1f}x the bare interpreter",
        "< 0.5 s, no numpy/rich/serial at start-up", cli < 0.5 and not loaded, args.json,
        help_s=cli, bare_s=bare, heavy_loaded=loaded)


if __name__ == "__main__":
    main()
