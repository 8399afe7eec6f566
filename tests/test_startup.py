"""Start-up imports only what a command uses (python -X importtime of real processes; not timed).

Speed itself is measured in bench/bench_cli.py; here the check is which modules a command loads.
"""

from __future__ import annotations

import re
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
def test_limits_and_help_load_no_scipy_numpy_matplotlib_sqlite_or_rich(argv):
    got = imported(*argv)
    assert not got & {"scipy", "matplotlib", "sqlite_utils", "numpy", "sqlite3", "serial", "rich"}, got


@pytest.mark.parametrize("extra", [(), ("--json",), ("--events", "1", "--json")])
def test_sessions_reads_on_plain_sqlite3_without_numpy_or_the_store(tmp_path, extra):
    db = tmp_path / "m.db"
    from meterlink.storage.store import Store
    with Store(db) as s:
        s.begin_session("record", "sim")
    got = imported("sessions", "--db", str(db), *extra)
    assert "sqlite3" in got           # it reads a database: the probe sees real imports
    assert not got & {"numpy", "scipy", "sqlite_utils", "matplotlib", "serial", "rich"}, got


def test_at_a_terminal_limits_and_sessions_draw_styled_tables_without_rich(tmp_path):
    """stdout on a real pty: the same plain tables, styled with ANSI codes, and still no rich (nor numpy)."""
    import os
    import select

    from meterlink.storage.store import Store

    db = tmp_path / "m.db"
    with Store(db) as s:
        s.begin_session("record", "sim")
    for argv, expect in ((("limits", "900MHz"), "Reference levels at 900 MHz"),
                         (("sessions", "--db", str(db)), "sessions in")):
        master, slave = os.openpty()
        env = {k: v for k, v in os.environ.items() if k != "NO_COLOR"} | {"COLUMNS": "100", "TERM": "xterm"}
        p = subprocess.Popen([sys.executable, "-X", "importtime", "-m", "meterlink", *argv], stdout=slave,
                             stderr=subprocess.PIPE, text=True, env=env)
        os.close(slave)
        out = b""
        while True:               # drain the pty while the command writes (its buffer is small)
            if select.select([master], [], [], 60)[0]:
                try:
                    chunk = os.read(master, 65536)
                except OSError:   # EIO: the far side closed
                    break
                if not chunk:
                    break
                out += chunk
            elif p.poll() is not None:
                break
        err = p.communicate(timeout=60)[1]
        os.close(master)
        assert p.returncode == 0, err[-2000:]
        names = {ln.rsplit("|", 1)[1].strip().split(".")[0] for ln in err.splitlines() if ln.startswith("import time:")}
        assert not names & {"rich", "numpy", "scipy", "sqlite_utils"}, names
        text = out.decode()
        assert expect in text and "\x1b[1m" in text          # bold header: styled at a terminal
        plain = re.sub(r"\x1b\[[0-9;]*m", "", text).replace("\r\n", "\n")
        assert max(len(ln) for ln in plain.splitlines()) <= 100


def test_a_database_error_is_still_one_line(tmp_path):
    # sqlite3 is no longer imported by meterlink.cli itself: a damaged file must still give one line
    bad = tmp_path / "bad.db"
    bad.write_bytes(b"SQLite format 3\x00" + b"\x00" * 200)
    p = subprocess.run([sys.executable, "-m", "meterlink", "sessions", "--db", str(bad)], capture_output=True,
                       text=True, timeout=120)
    assert p.returncode != 0 and "Traceback" not in p.stderr
    assert len(p.stderr.strip().splitlines()) == 1, p.stderr
