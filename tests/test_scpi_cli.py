"""The CLI over real processes: `meterlink scpi-sim` serves the simulated instruments, `meterlink selective`
measures a point through pyvisa-py; a failing analyser gives one line on stderr, exit 2, and a journal
that says how many sweeps were and were not measured."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from importlib import resources

import pytest

BANDS = str(resources.files("meterlink.simulators.scenarios").joinpath("demo-bands.toml"))
CMD = [sys.executable, "-m", "meterlink"]


@pytest.fixture
def sim(request):
    procs = []

    def start(*extra):
        p = subprocess.Popen([*CMD, "scpi-sim", *extra], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        procs.append(p)
        addrs = {}
        deadline = time.monotonic() + 30
        while len(addrs) < 4 and time.monotonic() < deadline:
            line = p.stdout.readline()
            if not line:
                break
            name, addr = line.split()
            addrs[name] = addr
        assert len(addrs) == 4, p.stderr.read() if p.poll() is not None else "no addresses"
        return addrs
    yield start
    for p in procs:
        p.send_signal(signal.SIGTERM)
        p.communicate(timeout=10)                 # reads and closes both pipes
        assert p.returncode == 0


def test_selective_point_over_the_cli(sim, tmp_path):
    addrs = sim()
    # the names docs/instruments.md gives; power_meter as in the bench files and the benches' own lines
    assert list(addrs) == ["analyser", "generator", "power_meter", "rotator"]
    journal = tmp_path / "p.jsonl"
    r = subprocess.run([*CMD, "selective", addrs["analyser"], "--bands", BANDS, "--journal", str(journal), "--json"],
                       capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    out = json.loads(r.stdout)
    assert [b["name"] for b in out["bands"]][:2] == ["Tor FM A", "Tor FM B"]
    assert 0 < out["total_exposure_ratio"] < 1 and "qualified person" in out["cautions"]
    lines = [json.loads(x) for x in journal.read_text().splitlines()]
    assert lines[0]["event"] == "analyser" and lines[-1]["event"] == "result" and len(lines) == 10
    r = subprocess.run([*CMD, "selective", addrs["analyser"], "--bands", BANDS, "--journal", str(tmp_path / "q.jsonl")],
                       capture_output=True, text=True, timeout=120)
    assert r.returncode == 0 and "total exposure ratio" in r.stdout and "qualified person" in r.stdout


def test_lost_analyser_is_one_line_exit_2_and_journal_says_so(sim, tmp_path):
    addrs = sim("--disconnect")
    journal = tmp_path / "p.jsonl"
    r = subprocess.run([*CMD, "selective", addrs["analyser"], "--bands", BANDS, "--journal", str(journal)],
                       capture_output=True, text=True, timeout=120, env={**os.environ, "COLUMNS": "200"})
    assert r.returncode == 2
    err = r.stderr.strip()
    assert "\n" not in err and "Traceback" not in err and addrs["analyser"] in err
    ev = [json.loads(x) for x in journal.read_text().splitlines()][-1]
    assert ev["event"] == "instrument_error" and ev["sweeps_measured"] == 0 and ev["sweeps_not_measured"] == 8


def test_bad_band_file_is_one_line(tmp_path):
    bad = tmp_path / "b.toml"
    bad.write_text("[[band]]\nname = 'x'\nfreq_hz = -1\nbandwidth_hz = 0\n")
    r = subprocess.run([*CMD, "selective", "TCPIP::127.0.0.1::1::SOCKET", "--bands", str(bad), "--journal",
                        str(tmp_path / "j")], capture_output=True, text=True, timeout=60)
    assert r.returncode == 2 and "band 1: freq_hz" in r.stderr and "\n" not in r.stderr.strip()


@pytest.mark.slow   # about 50 s on two cores: the --quick plan's 70 steps over SCPI and a pty at speed 5
def test_lab_run_on_the_simulated_scpi_bench(tmp_path):
    bench = tmp_path / "bench.toml"
    p = subprocess.Popen([*CMD, "scpi-sim", "--lab-bench", str(bench)], stdout=subprocess.PIPE,
                         stderr=subprocess.PIPE, text=True)
    try:
        names = [p.stdout.readline().split()[0] for _ in range(4)]
        assert names == ["generator", "power_meter", "rotator", "meter"], p.stderr.read() if p.poll() else names
        r = subprocess.run([*CMD, "lab", "run", "--bench", str(bench), "--quick", "--repeats", "2", "--out",
                            str(tmp_path / "cert"), "--json"], capture_output=True, text=True, timeout=300)
        assert r.returncode == 0, r.stderr
        out = json.loads(r.stdout)
        assert (tmp_path / "cert" / "certificate.toml").exists() and "qualified person" in out["safety"]
        assert 0 < out["u_expanded_db"] < 3 and len(out["cf_db"]["freq_hz"]) == 6
    finally:
        p.send_signal(signal.SIGTERM)
        p.communicate(timeout=10)
    assert p.returncode == 0


def test_lab_run_bench_errors_are_one_line(tmp_path):
    bench = tmp_path / "bench.toml"
    bench.write_text('[instruments]\ngenerator = "TCPIP::127.0.0.1::1::SOCKET"\npower_meter = "TCPIP::127.0.0.1::1::SOCKET"\n'
                     'rotator = "TCPIP::127.0.0.1::1::SOCKET"\nmeter_port = "/nonexistent"\n[chain]\ncoupling_db = 20\n')
    r = subprocess.run([*CMD, "lab", "run", "--bench", str(bench), "--temperatures", "5,40", "--out",
                        str(tmp_path / "c1")], capture_output=True, text=True, timeout=60)
    assert r.returncode == 2 and "climatic chamber" in r.stderr and "\n" not in r.stderr.strip()
    r = subprocess.run([*CMD, "lab", "run", "--bench", str(bench), "--out", str(tmp_path / "c2")],
                       capture_output=True, text=True, timeout=60)
    assert r.returncode == 2 and "cannot open" in r.stderr and "\n" not in r.stderr.strip()
    assert "Traceback" not in r.stderr
