"""A reader that goes away (``| head``, ``| tee`` ended by Ctrl-C): quiet exit with 128 + SIGPIPE.

The usual convention for command-line programs (a C program dies of SIGPIPE, status 141 in the
shell); Python ignores SIGPIPE, so meterlink maps the EPIPE it gets to the same quiet ending.
The reader is a real pipe whose read end is closed, so the first write fails, every time.
"""

import os
import signal
import sqlite3
import subprocess
import sys

import pytest

from meterlink.storage.store import Store
from meterlink.simulators.pty_meter import SimulatedMeter

SIGPIPE_STATUS = 128 + signal.SIGPIPE   # 141 on Linux


def run_into_closed_pipe(*argv):
    """Run meterlink with stdout on a pipe nobody reads: (exit code, stderr)."""
    r, w = os.pipe()
    os.close(r)
    try:
        p = subprocess.run([sys.executable, "-m", "meterlink", *map(str, argv)], stdout=w,
                           stderr=subprocess.PIPE, text=True, timeout=120)
    finally:
        os.close(w)
    return p.returncode, p.stderr


@pytest.fixture(scope="module")
def db(tmp_path_factory):
    path = tmp_path_factory.mktemp("pipe") / "m.db"
    with Store(path) as store:
        for i in range(300):
            sid = store.begin_session("record", notes=f"session {i}")
            store.add_event(sid, "note", "info", "x" * 80)
    return path


@pytest.mark.parametrize("argv", [
    ["sessions", "--db", "DB"], ["sessions", "--db", "DB", "--json"], ["sessions", "--db", "DB", "--events", "1"],
    ["limits", "900MHz"], ["limits", "900MHz", "--json"], ["--help"],
])
def test_a_closed_pipe_ends_quietly_with_status_141(db, argv):
    code, err = run_into_closed_pipe(*[str(db) if a == "DB" else a for a in argv])
    if argv == ["--help"]:     # argparse prints help and exits itself; at least no traceback
        assert "Traceback" not in err
        return
    assert code == SIGPIPE_STATUS, err
    assert err == ""      # no "[Errno 32] Broken pipe", no "Exception ignored"


STATION = """format = "meterlink-station/1"
[station]
name = "Ferris Gap pipe station"
database = "DB"
[assessment]
standard = "icnirp-2020"
tier = "public"
band = ["80 MHz", "4 GHz"]
interval_s = 10
[[meter]]
name = "north"
port = "PORT"
certificate = "demo-probe"
"""


def _state(db):
    conn = sqlite3.connect(db, timeout=10)
    try:
        return conn.execute("select state from mon_station").fetchone()
    except sqlite3.OperationalError:
        return None
    finally:
        conn.close()


def test_monitor_piped_into_a_reader_that_dies_stops_cleanly_and_marks_the_station_stopped(tmp_path):
    # as `meterlink monitor | tee log` with Ctrl-C: tee is gone, then the monitor is told to stop
    db = tmp_path / "station.db"
    with SimulatedMeter("station", meter=1, seed=3, speed=200.0) as sim:
        cfg = tmp_path / "station.toml"
        cfg.write_text(STATION.replace("DB", str(db)).replace("PORT", sim.port), encoding="utf-8")
        r, w = os.pipe()
        proc = subprocess.Popen([sys.executable, "-m", "meterlink", "monitor", "--config", str(cfg),
                                 "--time-scale", "200"], stdout=w, stderr=subprocess.PIPE, text=True)
        os.close(w)
        try:
            with os.fdopen(r, "rb") as reader:
                while not (line := reader.readline()).startswith(b"monitoring "):   # up and writing to us
                    assert line, f"monitor ended: {proc.stderr.read()}"
                assert _state(db) == ("running",)
            # reader closed (tee died): the next line the monitor logs meets EPIPE
            proc.send_signal(signal.SIGINT)
            _, err = proc.communicate(timeout=60)
        finally:
            if proc.poll() is None:
                proc.kill()
                proc.wait()
    assert proc.returncode == SIGPIPE_STATUS, err
    assert "Traceback" not in err and "Errno 32" not in err
    assert _state(db) == ("stopped",)
    with Store(db, readonly=True) as store:
        kinds = [e["kind"] for e in store.events()]
    assert "monitor_stopped" in kinds
