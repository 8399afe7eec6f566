"""Start and stop several bench/loadgen.py processes (meters split between them) with their truth."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np

from farm import proc_cpu_s

LOADGEN = Path(__file__).resolve().parent / "loadgen.py"


class LoadFarm:
    """n meters served by procs load-generator processes; .ports and .truth once started."""

    def __init__(self, n: int, truth_dir, procs: int = 2, seed: int = 0):
        self.n, self.procs, self.seed, self.truth_dir = n, max(1, min(procs, n)), seed, str(truth_dir)
        self.children: list[subprocess.Popen] = []
        self.ports: list[str] = []
        self.truth: list[str] = []
        self.sent: list[int] = []
        self.unsent_bytes: list[int] = []

    def __enter__(self) -> "LoadFarm":
        share = [self.n // self.procs + (i < self.n % self.procs) for i in range(self.procs)]
        first = 0
        try:
            for k in share:
                p = subprocess.Popen([sys.executable, str(LOADGEN), "--n", str(k), "--first", str(first), "--seed",
                                      str(self.seed), "--truth-dir", self.truth_dir],
                                     stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True)
                self.children.append(p)
                first += k
            for p in self.children:
                line = p.stdout.readline()
                if not line:
                    raise RuntimeError(f"load generator exited with {p.wait(10)} before serving")
                info = json.loads(line)
                self.ports += info["ports"]
                self.truth += info["truth"]
        except BaseException:
            self.__exit__()
            raise
        return self

    def cpu_s(self) -> float:
        return sum(proc_cpu_s(p.pid) for p in self.children if p.poll() is None)

    def __exit__(self, *exc) -> None:
        for p in self.children:
            if p.poll() is None:
                p.terminate()
        for p in self.children:
            try:
                out, _ = p.communicate(timeout=60)
            except subprocess.TimeoutExpired:
                p.kill()
                out, _ = p.communicate()
            for line in (out or "").splitlines():
                if line.startswith('{"sent"'):
                    info = json.loads(line)
                    self.sent += info["sent"]
                    self.unsent_bytes += info["unsent_bytes"]


def truth_losses(conn, session_id: int, truth_path: str) -> dict:
    """A session's stored readings against a load generator's truth: between the first and the last
    reading stored, every reading sent must be stored exactly once with its tick and counts."""
    rows = conn.execute("SELECT boot, seq, tick_ms, raw_x, raw_y, raw_z FROM readings WHERE session_id=?",
                        (session_id,)).fetchall()
    got = [tuple(r) for r in rows]
    t = np.load(truth_path)
    sent = list(zip(t["boot"].tolist(), t["seq"].tolist(), t["tick_ms"].tolist(), *t["raw"].T.tolist()))
    if not got:
        return {"stored": 0, "expected": len(sent), "missing": len(sent), "extra": 0, "duplicates": 0}
    lo, hi = min(g[1] for g in got), max(g[1] for g in got)
    expected = {s for s in sent if lo <= s[1] <= hi}
    gs = set(got)
    return {"stored": len(got), "expected": len(expected), "missing": len(expected - gs), "extra": len(gs - expected),
            "duplicates": len(got) - len(gs), "sent": len(sent)}
