"""Whole-process start-up of `meterlink limits 900MHz`, `meterlink sessions` and `meterlink --help`, run
repeatedly in fresh interpreters (hyperfine-like: warm-up runs, then the commands and the baseline taken in
turn), against a bare `python -c pass` of the same venv Python; also which heavy modules each loads.

The `limits` command is also run through the console script pip generates for `meterlink` (the
[project.scripts] entry point, beside the venv's python), to show the entry point adds nothing to
`python -m meterlink`: the script imports meterlink.cli directly, no importlib.metadata look-up.

Baseline: `python -c pass`, the floor every Python command pays (interpreter and site start-up). A
`python -c 'import numpy'` baseline would hide exactly the cost that lazy imports avoid, so it is not used.
Each child's CPU time (user + system, from its rusage) is printed beside the wall time: on a loaded machine it
shows what the command costs without the wait for a core. The children run with bytecode caching allowed (PYTHONDONTWRITEBYTECODE removed from their environment),
as an installed meterlink runs; the warm-up runs write the caches. `sessions` reads an empty database
created by the Store (its cost is start-up, not the query).
"""

from __future__ import annotations

import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import _common

HEAVY = ("numpy", "scipy", "rich", "serial", "sqlite3", "sqlite_utils", "matplotlib")
TARGET_S = 0.150


def loaded(argv: list[str], env: dict) -> list[str]:
    """Heavy top-level modules a `python -m meterlink ...` process imports (python -X importtime)."""
    p = subprocess.run([sys.executable, "-X", "importtime", "-m", "meterlink", *argv], capture_output=True,
                       text=True, cwd=_common.ROOT, env=env)
    names = {line.rsplit("|", 1)[1].strip() for line in p.stderr.splitlines() if line.startswith("import time:")}
    return [m for m in HEAVY if m in names]


def run_in_turn(cmds: dict[str, list[str]], n: int, warmup: int, env: dict) -> tuple[dict, dict]:
    """Wall time and CPU time (user + system, the child's rusage) of each command, taken in turn n times
    after ``warmup`` untimed rounds. The CPU time is the steadier figure on a loaded machine: time spent
    waiting for a core is not in it."""
    times: dict[str, list[float]] = {k: [] for k in cmds}
    cpu: dict[str, list[float]] = {k: [] for k in cmds}
    for i in range(warmup + n):
        for k, cmd in cmds.items():
            t = time.perf_counter()
            p = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, cwd=_common.ROOT, env=env)
            _, status, ru = os.wait4(p.pid, 0)
            wall = time.perf_counter() - t
            p.returncode = os.waitstatus_to_exitcode(status)
            if p.returncode != 0:
                raise RuntimeError(f"{' '.join(cmd)} failed (exit {p.returncode})")
            if i >= warmup:
                times[k].append(wall)
                cpu[k].append(ru.ru_utime + ru.ru_stime)
    return ({k: _common._stats(v) for k, v in times.items()}, {k: _common._stats(v) for k, v in cpu.items()})


def main(argv=None) -> list[dict]:
    args = _common.parser(__doc__).parse_args(argv)
    n = 10 if args.quick else 30
    env = {k: v for k, v in os.environ.items() if k != "PYTHONDONTWRITEBYTECODE"}
    _common.print_machine()
    from meterlink.storage.store import Store
    with tempfile.TemporaryDirectory() as d:
        db = Path(d) / "empty.db"
        Store(db).close()
        py = [sys.executable]
        cmds = {"bare": py + ["-c", "pass"],
                "limits": py + ["-m", "meterlink", "limits", "900MHz"],
                "sessions": py + ["-m", "meterlink", "sessions", "--db", str(db)],
                "help": py + ["-m", "meterlink", "--help"]}
        script = Path(sys.executable).with_name("meterlink")
        if script.is_file():        # installed (pip install -e . or a wheel): the generated entry point
            cmds["script"] = [str(script), "limits", "900MHz"]
        r, c = run_in_turn(cmds, n, 3, env)
        heavy = {k: loaded(cmds[k][3:], env) for k in ("limits", "sessions", "help")}
        peak = {k: _common.child_peak_rss_mib(cmds[k], cwd=_common.ROOT, env=env) for k in heavy}
    bare = r["bare"]
    out = []
    for k, what, target, limit in (("limits", "meterlink limits 900MHz", "< 150 ms whole process", TARGET_S),
                                   ("sessions", "meterlink sessions (empty database)", "< 150 ms whole process",
                                    TARGET_S),
                                   ("help", "meterlink --help", "< 0.5 s, no numpy/rich/serial", 0.5)):
        ratio = r[k]["median"] / bare["median"]
        met = r[k]["median"] < limit and (k != "help" or not heavy[k])
        out.append(_common.report(
            f"cli_{k}", f"{what}: {_common.timing_text(r[k], 'ms')}, CPU {c[k]['median'] * 1000:.0f} ms; heavy modules "
            f"loaded: {', '.join(heavy[k]) or 'none'}", f"python -c pass {_common.timing_text(bare, 'ms')}, CPU "
            f"{c['bare']['median'] * 1000:.0f} ms", ratio,
            f"{ratio:.1f}x the bare interpreter ({(r[k]['median'] - bare['median']) * 1000:.0f} ms more)", target, met,
            args.json, peak_mb=peak[k], seconds=r[k]["median"], baseline_s=bare["median"], runs=r[k]["runs"],
            baseline_runs=bare["runs"], heavy_loaded=heavy[k], cpu_s=c[k]["median"], cpu_runs=c[k]["runs"],
            baseline_cpu_s=c["bare"]["median"]))
    if "script" in r:
        ratio = r["script"]["median"] / r["limits"]["median"]
        out.append(_common.report(
            "cli_script", f"the console script `meterlink limits 900MHz`: {_common.timing_text(r['script'], 'ms')}, "
            f"CPU {c['script']['median'] * 1000:.0f} ms", f"python -m meterlink limits 900MHz (same run) "
            f"{_common.timing_text(r['limits'], 'ms')}, CPU {c['limits']['median'] * 1000:.0f} ms", ratio,
            f"{ratio:.2f}x python -m meterlink", "<= 1.1x python -m meterlink (nothing extra for the entry point)",
            ratio <= 1.1, args.json, seconds=r["script"]["median"], baseline_s=r["limits"]["median"],
            runs=r["script"]["runs"], baseline_runs=r["limits"]["runs"], cpu_s=c["script"]["median"],
            baseline_cpu_s=c["limits"]["median"]))
    return out


if __name__ == "__main__":
    main()
