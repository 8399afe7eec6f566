"""The systemd notify protocol of the monitor: a real AF_UNIX datagram socket stands in for systemd,
a real `meterlink monitor` process gets NOTIFY_SOCKET and WATCHDOG_USEC, and the test reads
READY=1, regular WATCHDOG=1 pings and STOPPING=1 from it (protocol: sd_notify(3), systemd 252)."""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from meterlink.station.notify import Notifier
from meterlink.simulators.pty_meter import SimulatedMeter

ROOT = Path(__file__).resolve().parents[1]

STATION = """
format = "meterlink-station/1"
[station]
name = "Kestle Down notify-test station"
database = "DB"
[assessment]
standard = "icnirp-2020"
tier = "public"
freq = "94.3 MHz"
interval_s = 0.5
[[meter]]
name = "probe-1"
port = "PORT"
certificate = "demo-probe"
"""


def _receive(sock: socket.socket, timeout_s: float) -> list[tuple[float, str]]:
    """Every datagram until timeout_s passes (monotonic deadline), with its arrival time."""
    out, deadline = [], time.monotonic() + timeout_s
    while (left := deadline - time.monotonic()) > 0:
        sock.settimeout(left)
        try:
            data = sock.recv(4096)
        except socket.timeout:
            break
        out.append((time.monotonic(), data.decode()))
    return out


def test_monitor_ready_watchdog_stopping(tmp_path):
    short = Path(tempfile.mkdtemp(prefix="ml-ntf-", dir="/tmp"))     # AF_UNIX paths are limited to 108 bytes
    path = short / "notify.sock"
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    sock.bind(str(path))
    try:
        with SimulatedMeter("station", meter=1, seed=2, speed=1.0) as sim:
            station = tmp_path / "station.toml"
            station.write_text(STATION.replace("PORT", sim.port).replace("DB", str(tmp_path / "n.db")))
            env = {**os.environ, "PYTHONPATH": str(ROOT), "NOTIFY_SOCKET": str(path), "WATCHDOG_USEC": "2000000"}
            env.pop("WATCHDOG_PID", None)
            p = subprocess.Popen([sys.executable, "-m", "meterlink", "monitor", "--config", str(station), "--quiet"],
                                 env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
            try:
                msgs = []
                deadline = time.monotonic() + 30
                while time.monotonic() < deadline and sum("WATCHDOG=1" in m for _, m in msgs) < 6:
                    assert p.poll() is None, p.stderr.read()
                    msgs += _receive(sock, 1.0)
                p.send_signal(signal.SIGTERM)
                assert p.wait(30) == 0
                msgs += _receive(sock, 0.5)
            finally:
                if p.poll() is None:
                    p.kill()
                    p.wait()
                p.stderr.close()
    finally:
        sock.close()
        path.unlink(missing_ok=True)
        short.rmdir()
    texts = [m for _, m in msgs]
    assert texts[0].splitlines()[:2] == ["READY=1", f"MAINPID={p.pid}"], texts[:3]
    pings = [t for t, m in msgs if m == "WATCHDOG=1"]
    assert len(pings) >= 6
    # a quarter of WATCHDOG_USEC (0.5 s) apart on average, well inside the 2 s the service manager allows
    # (arrival times, not send times: a mean, since a busy test process may read two at once)
    mean_gap = (pings[-1] - pings[0]) / (len(pings) - 1)
    assert 0.45 <= mean_gap < 1.5, pings
    assert texts[-1].splitlines()[0] == "STOPPING=1"
    assert texts.index(texts[-1]) > texts.index(next(m for m in texts if m == "WATCHDOG=1"))


def test_notifier_rules():
    assert not Notifier({}).enabled and Notifier({}).ready() is False         # not under systemd: silent
    n = Notifier({"NOTIFY_SOCKET": "@meterlink-test", "WATCHDOG_USEC": "1000000", "WATCHDOG_PID": "1"})
    assert n.address == "\0meterlink-test" and n.watchdog_s is None           # watchdog meant for pid 1
    n = Notifier({"NOTIFY_SOCKET": "@x", "WATCHDOG_USEC": "3000000", "WATCHDOG_PID": str(os.getpid())})
    assert n.watchdog_s == 3.0


def test_abstract_socket_roundtrip():
    name = f"meterlink-test-{os.getpid()}"
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    sock.bind("\0" + name)
    try:
        n = Notifier({"NOTIFY_SOCKET": "@" + name, "WATCHDOG_USEC": "400000"})
        assert n.ready("up") and n.watchdog() and not n.watchdog()           # second ping rate-limited
        got = [m for _, m in _receive(sock, 0.5)]
        assert got == [f"READY=1\nMAINPID={os.getpid()}\nSTATUS=up", "WATCHDOG=1"]
        n.close()
    finally:
        sock.close()
