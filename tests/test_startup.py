"""Start-up imports only what a command uses (python -X importtime of real processes; not timed).

Speed itself is measured in bench/bench_cli.py; here the check is which modules a command loads.
"""

from __future__ import annotations

import subprocess
import sys

import pytest


def imported(*argv: str, cwd=None) -> set[str]:
    """Top-level names of every module a `python -m meterlink ...` process imported."""
    p = subprocess.run([sys.executable, "-X", "importtime", "-m", "meterlink", *argv], capture_output=True,
                       text=True, timeout=120, cwd=cwd)
    names = {line.rsplit("|", 1)[1].strip() for line in p.stderr.splitlines() if line.startswith("import time:")}
    assert "meterlink.cli" in names, p.stderr[-2000:]
    return {n.split(".")[0] for n in names}


@pytest.mark.parametrize("argv", [("limits", "900MHz"), ("limits", "2.45GHz", "--json"), ("--help",)])
def test_limits_and_help_load_no_scipy_numpy_matplotlib_or_sqlite(argv):
    got = imported(*argv)
    assert not got & {"scipy", "matplotlib", "sqlite_utils", "numpy", "sqlite3", "serial"}, got


@pytest.mark.parametrize("extra", [(), ("--json",), ("--events", "1", "--json")])
def test_sessions_reads_on_plain_sqlite3_without_numpy_or_the_store(tmp_path, extra):
    db = tmp_path / "m.db"
    from meterlink.storage.store import Store
    with Store(db) as s:
        s.begin_session("record", "sim")
    got = imported("sessions", "--db", str(db), *extra)
    assert "sqlite3" in got           # it reads a database: the probe sees real imports
    assert not got & {"numpy", "scipy", "sqlite_utils", "matplotlib", "serial"}, got


def test_a_database_error_is_still_one_line(tmp_path):
    # sqlite3 is no longer imported by meterlink.cli itself: a damaged file must still give one line
    bad = tmp_path / "bad.db"
    bad.write_bytes(b"SQLite format 3\x00" + b"\x00" * 200)
    p = subprocess.run([sys.executable, "-m", "meterlink", "sessions", "--db", str(bad)], capture_output=True,
                       text=True, timeout=120)
    assert p.returncode != 0 and "Traceback" not in p.stderr
    assert len(p.stderr.strip().splitlines()) == 1, p.stderr
