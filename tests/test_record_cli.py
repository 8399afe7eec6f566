"""meterlink record / ports from the command line: one-line errors, and a real run on the simulator."""

import json
import os
import subprocess
import sys

import pytest

from conftest import ROOT
from meterlink.cli import main
from meterlink.storage.store import Store
from meterlink.simulators.pty_meter import SimulatedMeter


def run_cli(*args, cwd):
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    return subprocess.run([sys.executable, "-m", "meterlink", *args], capture_output=True, text=True, cwd=cwd,
                          env=env, timeout=60)


@pytest.mark.parametrize("args, needle", [
    ([], "--port"),
    (["--port", "/nonexistent/tty-meter"], "/nonexistent/tty-meter"),
    (["--port", "loop://", "--db", "/nonexistent-dir/x.db"], "/nonexistent-dir/x.db"),
    (["--port", "loop://", "--duration", "soon"], "--duration"),
    (["--port", "loop://", "--duration", "-5"], "--duration"),
    (["--port", "loop://", "--interval-ms", "0"], "--interval-ms"),
    (["--port", "loop://", "--band", "2GHz:1GHz"], "--band"),
    # beyond the 300 GHz end of ICNIRP 2020 / IEEE C95.1-2019: refused at the edge, nothing stored
    (["--port", "loop://", "--band", "1e30Hz:2e30Hz"], "'1e30Hz' = 1e+30 Hz is outside 1 Hz-300 GHz"),
    (["--port", "loop://", "--freq", "1e30Hz"], "--freq: frequency '1e30Hz'"),
])
def test_bad_input_is_one_line_and_nonzero(tmp_path, args, needle):
    if "--db" not in args:
        args = args + ["--db", str(tmp_path / "x.db")]
    p = run_cli("record", *args, cwd=tmp_path)
    assert p.returncode != 0
    assert "Traceback" not in p.stderr
    lines = p.stderr.strip().splitlines()
    assert len(lines) == 1 and needle in lines[0], p.stderr
    if "1e30Hz" in " ".join(args):
        assert not (tmp_path / "x.db").exists()


def test_record_against_the_simulator_json(tmp_path):
    db = tmp_path / "rec.db"
    with SimulatedMeter("demo", sensor="probe", seed=2, speed=100.0) as sim:
        p = run_cli("record", "--port", sim.port, "--db", str(db), "--duration", "60", "--interval-ms", "1000",
                    "--freq", "900MHz", "--json", cwd=tmp_path)
    assert p.returncode == 0, p.stderr
    summary = json.loads(p.stdout)
    assert summary["readings"] >= 60 and summary["stop_reason"] == "duration reached"
    assert summary["device_span_s"] >= 60.0 and summary["model"]
    with Store(db) as store:
        s = store.session(summary["session_id"])
        assert s["freq_hz"] == 9e8 and s["kind"] == "record" and s["port"] == sim.port
        assert store.count("readings", s["id"]) == summary["readings"]


def test_record_via_main_prints_a_summary_table(tmp_path, capsys):
    db = tmp_path / "rec.db"
    with SimulatedMeter("demo", sensor="probe", seed=4, speed=100.0) as sim:
        rc = main(["record", "--port", sim.port, "--db", str(db), "--duration", "30", "--band", "800MHz:1GHz"])
    out = capsys.readouterr().out
    assert rc == 0
    assert "readings" in out and "session 1" in out and "duration reached" in out
    with Store(db) as store:
        assert store.session(1)["band_lo_hz"] == 8e8


def test_ports_lists_or_says_none(tmp_path):
    p = run_cli("ports", cwd=tmp_path)
    assert p.returncode == 0 and p.stdout.strip()
    j = run_cli("ports", "--json", cwd=tmp_path)
    assert isinstance(json.loads(j.stdout), list)
