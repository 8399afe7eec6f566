"""meterlink simulate as a real process: port on the first line, stats after SIGTERM."""

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import serial

from meterlink.device.protocol import Empty, Frame, FrameReader, FrameType, encode_message

ROOT = Path(__file__).resolve().parents[1]


def _env():
    return {**os.environ, "PYTHONPATH": str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", "")}


def test_simulate_prints_port_serves_frames_and_reports_stats():
    p = subprocess.Popen([sys.executable, "-m", "meterlink", "simulate", "--speed", "100", "--json"],
                         stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=_env(), cwd=ROOT)
    try:
        port = p.stdout.readline().strip()
        with serial.Serial(port, timeout=0.05) as s:
            s.write(encode_message(Empty(), 0, 0, FrameType.WHO))
            r, got = FrameReader(), []
            deadline = time.monotonic() + 1.5
            while time.monotonic() < deadline and not any(f.type == FrameType.IDENT for f in got):
                got += [f for f in r.feed(s.read(512)) if isinstance(f, Frame)]
        assert any(f.type == FrameType.IDENT for f in got)
        p.send_signal(signal.SIGTERM)
        out, _ = p.communicate(timeout=5)
    finally:
        if p.poll() is None:
            p.kill()
            p.communicate()
    assert p.returncode == 0
    assert json.loads(out.strip().splitlines()[-1])["commands_received"] == 1


def test_simulate_bad_option_is_one_line_error():
    p = subprocess.run([sys.executable, "-m", "meterlink", "simulate", "--drop", "2"], capture_output=True,
                       text=True, env=_env(), cwd=ROOT, timeout=10)
    assert p.returncode == 2
    assert p.stderr.strip().count("\n") == 0 and "--drop" in p.stderr
    p = subprocess.run([sys.executable, "-m", "meterlink", "simulate", "--scenario", "nowhere"], capture_output=True,
                       text=True, env=_env(), cwd=ROOT, timeout=10)
    assert p.returncode == 2 and "nowhere" in p.stderr and "Traceback" not in p.stderr
