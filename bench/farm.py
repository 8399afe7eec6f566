"""Start and stop bench/sim_farm.py from a benchmark or a test (a child process with a deadline)."""

from __future__ import annotations

import json
import subprocess
import sys
import time
from pathlib import Path

FARM = Path(__file__).resolve().parent / "sim_farm.py"


class Farm:
    """N simulated meters in a child process; .ports and .truth once started."""

    def __init__(self, n: int, truth_dir, speed: float = 1.0, seed: int = 0, scenario: str = "demo"):
        self.cmd = [sys.executable, str(FARM), "--n", str(n), "--speed", str(speed), "--seed", str(seed),
                    "--scenario", scenario, "--truth-dir", str(truth_dir)]
        self.proc: subprocess.Popen | None = None
        self.ports: list[str] = []
        self.truth: list[str] = []
        self.stats: list[dict] = []

    def __enter__(self) -> "Farm":
        self.proc = subprocess.Popen(self.cmd, stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True)
        line = self.proc.stdout.readline()
        if not line:
            self.proc.wait(10)
            raise RuntimeError(f"simulator farm exited with {self.proc.returncode} before serving")
        info = json.loads(line)
        self.ports, self.truth = info["ports"], info["truth"]
        return self

    def cpu_s(self) -> float:
        """CPU seconds the farm process has used (from /proc)."""
        return proc_cpu_s(self.proc.pid)

    def __exit__(self, *exc) -> None:
        assert self.proc is not None
        self.proc.terminate()  # the farm stops its meters on SIGTERM and prints their stats
        try:
            out, _ = self.proc.communicate(timeout=20)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            out, _ = self.proc.communicate()
        for line in out.splitlines():
            if line.startswith("{"):
                self.stats = json.loads(line).get("stats", [])


def proc_cpu_s(pid: int) -> float:
    """utime + stime of a process in seconds, from /proc/PID/stat."""
    import os

    with open(f"/proc/{pid}/stat") as f:
        fields = f.read().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def proc_rss_mb(pid: int) -> tuple[float, float]:
    """(VmRSS, VmHWM) of a process in MiB, from /proc/PID/status."""
    vals = {}
    with open(f"/proc/{pid}/status") as f:
        for line in f:
            if line.startswith(("VmRSS:", "VmHWM:")):
                k, v = line.split(":")
                vals[k] = int(v.split()[0]) / 1024.0
    return vals.get("VmRSS", 0.0), vals.get("VmHWM", 0.0)


def wait_until(pred, timeout_s: float, poll_s: float = 0.05) -> bool:
    deadline = time.monotonic() + timeout_s
    while not pred():
        if time.monotonic() >= deadline:
            return False
        time.sleep(poll_s)
    return True
