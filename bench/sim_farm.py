"""Serve N simulated meters on ptys from one process, apart from the host being measured.

Prints one JSON line {"ports": [...], "truth": [...]} once all are up, runs until its standard
input closes (or SIGTERM), then stops them and prints {"stats": [...]}. Used by bench_many_meters,
bench_monitor and tests/test_many_meters.py, so the host's CPU figures exclude the simulators.
"""

from __future__ import annotations

import argparse
import json
import signal
import sys
import threading
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from meterlink.simulators.pty_meter import SimulatedMeter  # noqa: E402


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=8)
    ap.add_argument("--speed", type=float, default=1.0)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--scenario", default="demo")
    ap.add_argument("--truth-dir", required=True)
    args = ap.parse_args(argv)
    truth = [str(Path(args.truth_dir) / f"truth{i}.jsonl") for i in range(args.n)]
    sims = [SimulatedMeter(args.scenario, sensor="probe", seed=args.seed + i, speed=args.speed, truth_path=truth[i])
            for i in range(args.n)]
    done = threading.Event()
    signal.signal(signal.SIGTERM, lambda *_: done.set())
    try:
        for s in sims:
            s.start()
        print(json.dumps({"ports": [s.port for s in sims], "truth": truth}), flush=True)
        threading.Thread(target=lambda: (sys.stdin.read(), done.set()), daemon=True).start()
        done.wait()
        stats = [s.stats for s in sims]
    finally:
        for s in sims:
            s.stop()
    print(json.dumps({"stats": stats}), flush=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
