"""Alarm commands (meterlink/station/hooks.py): timeout, the whole process group killed, a minimal environment,
millisecond timestamps, acquisition going on meanwhile, and a stop that never waits on a hung hook.

The hung hook is a real shell script that ignores SIGTERM (so only the group SIGKILL ends it) and
starts a child that inherits that, so a kill of the leader alone would leave the child running."""

from __future__ import annotations

import os
import signal
import sqlite3
import subprocess
import sys
import threading
import time
from pathlib import Path

from meterlink.station.alarms import AlarmEvent
from meterlink.station.hooks import HOOK_PATH, HookRunner, iso_ms
from meterlink.simulators.pty_meter import SimulatedMeter

ROOT = Path(__file__).resolve().parents[1]

HUNG = """#!/bin/sh
# a hook that hangs: ignores SIGTERM, starts a child that ignores it too, writes its pids, waits
trap '' TERM
dir=$1; tag=$2
env > "$dir/$tag.env"
sleep 300 &
echo $! > "$dir/$tag.child"
echo $$ > "$dir/$tag.tmp" && mv "$dir/$tag.tmp" "$dir/$tag.pid"
wait
"""


def _hung_script(tmp_path: Path) -> Path:
    p = tmp_path / "hung-hook.sh"
    p.write_text(HUNG)
    p.chmod(0o755)
    return p


def _gone(pid: int) -> bool:
    """True when no live process has this pid (a zombie awaiting its reaper counts as gone)."""
    try:
        stat = Path(f"/proc/{pid}/stat").read_text()
    except (FileNotFoundError, ProcessLookupError):
        return True
    return stat.rsplit(")", 1)[1].split()[0] == "Z"


def _wait(cond, timeout_s: float, what: str, every_s: float = 0.05):
    deadline, pause = time.monotonic() + timeout_s, threading.Event()
    while time.monotonic() < deadline:
        v = cond()
        if v:
            return v
        pause.wait(every_s)
    raise AssertionError(f"timed out waiting for {what}")


def test_iso_ms_against_posix_time():
    # POSIX.1-2017 Base Definitions 4.16 (Seconds Since the Epoch): 1e9 s = 11574 days + 6400 s;
    # 11574 days after 1970-01-01 is 2001-09-09 (31 years with 8 leap days = 11331 d, then 243 d
    # into 2001 = 1 Jan + 243 = 1 Sep + 8 = 9 Sep); 6400 s = 1 h 46 min 40 s
    assert iso_ms(1_000_000_000.123) == "2001-09-09T01:46:40.123Z"
    assert iso_ms(1_000_000_000.9996) == "2001-09-09T01:46:41.000Z"      # rounds to the millisecond
    assert iso_ms(0.0) == "1970-01-01T00:00:00.000Z"


def test_alarm_environment_has_millisecond_times():
    ev = AlarmEvent("start", "r", "m", "total", 1_000_000_007.25, 3.5, "v_per_m", 3.0, 2.0, 360.0,
                    1_000_000_001.5, 1_000_000_007.25, 3.5)
    env = ev.environment("St")
    assert env["METERLINK_ALARM_AT_UTC"] == "2001-09-09T01:46:47.250Z"
    assert env["METERLINK_ALARM_AT_EPOCH_S"] == "1000000007.250"
    assert env["METERLINK_ALARM_EPISODE_START_UTC"] == "2001-09-09T01:46:41.500Z"
    assert env["METERLINK_ALARM_VALUE"] == "3.5" and env["METERLINK_ALARM_STATION"] == "St"


def test_hung_hook_group_killed_and_environment_minimal(tmp_path, monkeypatch):
    monkeypatch.setenv("METERLINK_DAEMON_ONLY", "must not reach hooks")
    script = _hung_script(tmp_path)
    runner = HookRunner(term_grace_s=0.5)
    t0 = time.monotonic()
    pid = runner.start([str(script), str(tmp_path), "h"], {"METERLINK_ALARM_RULE": "r1"}, timeout_s=1.0, label="m/r1")
    assert pid is not None
    assert time.monotonic() - t0 < 0.5                         # starting never waits for the hook
    _wait(lambda: (tmp_path / "h.pid").exists(), 10, "the hook's pid file")
    leader, child = int((tmp_path / "h.pid").read_text()), int((tmp_path / "h.child").read_text())
    assert leader == pid and os.getpgid(child) == pid          # its own group, led by the hook
    outs = _wait(runner.outcomes, 15, "the timeout outcome")
    assert [(o.kind, o.label, o.pid) for o in outs] == [("timeout", "m/r1", pid)]
    assert outs[0].returncode == -signal.SIGKILL                # SIGTERM was ignored: SIGKILL ended it
    assert 1.0 <= outs[0].duration_s < 6.0
    _wait(lambda: _gone(leader) and _gone(child), 10, "both processes gone")
    env = dict(line.split("=", 1) for line in (tmp_path / "h.env").read_text().splitlines() if "=" in line)
    # what /bin/sh itself adds (PWD, SHLVL, ...) aside, only PATH, LANG and the alarm's variables
    assert env["PATH"] == HOOK_PATH and env["LANG"] == "C.UTF-8" and env["METERLINK_ALARM_RULE"] == "r1"
    assert "METERLINK_DAEMON_ONLY" not in env and "HOME" not in env and "PYTHONPATH" not in env
    assert runner.shutdown(1.0) == []


def test_shutdown_is_bounded_and_kills_running_groups(tmp_path):
    script = _hung_script(tmp_path)
    runner = HookRunner()
    pid = runner.start([str(script), str(tmp_path), "s"], {}, timeout_s=600.0, label="s")
    _wait(lambda: (tmp_path / "s.pid").exists(), 10, "the hook's pid file")
    child = int((tmp_path / "s.child").read_text())
    t0 = time.monotonic()
    outs = runner.shutdown(0.5)
    assert time.monotonic() - t0 < 3.0
    assert [(o.kind, o.pid) for o in outs] == [("killed_at_stop", pid)]
    _wait(lambda: _gone(pid) and _gone(child), 10, "both processes gone")
    assert runner.start(["/bin/true"], {}, 5.0) is None and runner.outcomes()[0].kind == "skipped"


def test_unstartable_hooks_become_outcomes(tmp_path):
    runner = HookRunner()
    assert runner.start([str(tmp_path / "missing")], {}, 5.0, label="a") is None
    assert runner.start(["/bin/true", "x\0y"], {}, 5.0, label="b") is None        # NUL from a hostile name
    assert runner.start(["/bin/true"], {"V": "x\0y"}, 5.0, label="c") is None
    outs = runner.shutdown(1.0)
    assert [(o.kind, o.label) for o in outs] == [("not_started", "a"), ("not_started", "b"), ("not_started", "c")]
    assert "No such file" in outs[0].error and "null" in outs[1].error


STATION = """
format = "meterlink-station/1"
[station]
name = "Kestle Down hook-test station"
database = "hooks.db"
[assessment]
standard = "icnirp-2020"
tier = "public"
band = ["80 MHz", "4 GHz"]
interval_s = 1
windows_s = [360]
[[meter]]
name = "north"
port = "PORT"
certificate = "demo-probe"
[health]
drift_max_ppm = 1e9
max_gap_s = 30
[[alarm]]
name = "quick"
unit = "pct_field"
threshold = 1e-6
command = ["SCRIPT", "DIR", "quick"]
command_timeout_s = 1
[[alarm]]
name = "patient"
unit = "pct_field"
threshold = 1e-6
command = ["SCRIPT", "DIR", "patient"]
command_timeout_s = 600
"""


def test_monitor_with_hung_hooks(tmp_path):
    """A real monitor process: one hook times out (group killed, event stored) while readings keep
    arriving; SIGTERM with the other hook still hung ends the monitor within the stop bound."""
    script, db = _hung_script(tmp_path), tmp_path / "hooks.db"
    speed = 200.0
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    with SimulatedMeter("station", meter=0, seed=4, speed=speed) as sim:
        station = tmp_path / "station.toml"
        station.write_text(STATION.replace("PORT", sim.port).replace("SCRIPT", str(script))
                           .replace("DIR", str(tmp_path)))
        p = subprocess.Popen([sys.executable, "-m", "meterlink", "monitor", "--config", str(station), "--quiet",
                              "--time-scale", str(speed)], env=env, stdout=subprocess.DEVNULL,
                             stderr=subprocess.PIPE, text=True)
        try:
            def seen(path):
                assert p.poll() is None, p.stderr.read()
                return path.exists()
            _wait(lambda: seen(tmp_path / "quick.pid") and seen(tmp_path / "patient.pid"), 60, "both hooks")
            q_pid, q_child = int((tmp_path / "quick.pid").read_text()), int((tmp_path / "quick.child").read_text())

            def count(sql):
                c = sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=5)
                try:
                    return c.execute(sql).fetchone()[0]
                finally:
                    c.close()
            n0 = count("SELECT count(*) FROM readings")
            _wait(lambda: seen(db) and count("SELECT count(*) FROM events WHERE kind='alarm_command_timeout'"),
                  30, "the timeout event")
            _wait(lambda: _gone(q_pid) and _gone(q_child), 10, "the quick hook's group gone")
            assert count("SELECT count(*) FROM readings") > n0 + 100   # acquisition went on meanwhile
            pt_pid, pt_child = int((tmp_path / "patient.pid").read_text()), \
                int((tmp_path / "patient.child").read_text())
            assert not _gone(pt_pid) and not _gone(pt_child)
            t0 = time.monotonic()
            p.send_signal(signal.SIGTERM)
            assert p.wait(30) == 0
            stop_s = time.monotonic() - t0
        finally:
            if p.poll() is None:
                p.kill()
                p.wait()
            p.stderr.close()
    # STOP_WAIT_S (5 s) for hooks plus the links and the final commit: far inside the unit's 30 s
    assert stop_s < 12.0, stop_s
    _wait(lambda: _gone(pt_pid) and _gone(pt_child), 10, "the patient hook's group gone")
    conn = sqlite3.connect(db)
    try:
        rows = conn.execute("SELECT severity, json_extract(detail, '$.hook'), json_extract(detail, '$.timeout_s'), "
                            "json_extract(detail, '$.at_stop') FROM events WHERE kind='alarm_command_timeout' "
                            "ORDER BY id").fetchall()
    finally:
        conn.close()
    assert rows == [("error", "north/quick/start", 1.0, None), ("warning", "north/patient/start", 600.0, 1)]
