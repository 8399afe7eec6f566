"""Helpers of the central-store tests: a database of their own in the real PostgreSQL server, the real
ingest service in a child process, station files, and a loopback TCP proxy that can cut the link.

Also checks the central configuration parser (bad input refused in one line).
"""

from __future__ import annotations

import contextlib
import json
import math
import os
import select
import signal
import socket
import subprocess
import sys
import threading
import time
import urllib.request
import uuid
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
ADMIN_DSNS = ("host=127.0.0.1 port=5432 user=postgres dbname=postgres",
              "host=127.0.0.1 port=5432 user=root dbname=postgres")


def admin_dsn() -> str:
    """A DSN that may create databases on 127.0.0.1:5432, or a skip with the reason in one line."""
    psycopg = pytest.importorskip("psycopg", reason="psycopg not installed (pip install '.[central]')")
    last = None
    for dsn in ADMIN_DSNS:
        try:
            psycopg.connect(dsn, connect_timeout=3).close()
            return dsn
        except psycopg.Error as exc:
            last = exc
    pytest.skip(f"no PostgreSQL reachable at 127.0.0.1:5432 with trust auth: {str(last).strip().splitlines()[0]}")


@contextlib.contextmanager
def central_database():
    """A fresh database (unique name) with the central schema; dropped afterwards. Yields its DSN."""
    import psycopg

    from meterlink.network.central_schema import migrate

    admin = admin_dsn()
    name = f"meterlink_test_{os.getpid()}_{uuid.uuid4().hex[:10]}"
    with psycopg.connect(admin, autocommit=True) as c:
        c.execute(f"CREATE DATABASE {name}")
    dsn = admin.replace("dbname=postgres", f"dbname={name}")
    try:
        with psycopg.connect(dsn, autocommit=True) as c:
            migrate(c)
        yield dsn
    finally:
        with psycopg.connect(admin, autocommit=True) as c:
            c.execute(f"DROP DATABASE IF EXISTS {name} WITH (FORCE)")


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def write_central_config(path: Path, dsn: str, port: int, max_body_bytes: int = 16 * 1024 * 1024) -> Path:
    path.write_text(f'format = "meterlink-central/1"\n[database]\ndsn = "{dsn}"\n'
                    f'[service]\nhost = "127.0.0.1"\nport = {port}\nmax_body_bytes = {max_body_bytes}\n')
    return path


class Service:
    """``meterlink central serve`` as a real child process on a loopback port."""

    def __init__(self, config: Path, port: int, log: Path):
        self.config, self.port, self.log = config, port, log
        self.proc: subprocess.Popen | None = None

    @property
    def url(self) -> str:
        return f"http://127.0.0.1:{self.port}"

    def start(self, timeout_s: float = 20.0) -> "Service":
        fh = open(self.log, "ab")
        self.proc = subprocess.Popen([sys.executable, "-m", "meterlink", "central", "serve", "--config",
                                      str(self.config)], stdout=fh, stderr=subprocess.STDOUT, cwd=ROOT)
        fh.close()
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                raise AssertionError(f"service exited {self.proc.returncode}: {self.log.read_text()[-2000:]}")
            try:
                with urllib.request.urlopen(self.url + "/health", timeout=2) as r:
                    if r.status == 200:
                        return self
            except OSError:
                time.sleep(0.05)
        raise AssertionError(f"service did not come up: {self.log.read_text()[-2000:]}")

    def kill(self, sig=signal.SIGKILL) -> None:
        if self.proc and self.proc.poll() is None:
            self.proc.send_signal(sig)
            self.proc.wait(20)

    def stop(self) -> None:
        self.kill(signal.SIGTERM)


class Proxy:
    """A TCP relay on loopback to a target port. ``cut()`` closes every open connection and refuses new
    ones (a dropped link); ``drop_replies`` forwards requests but closes before any reply gets back
    (the link dies after the server acted, before the station heard the acknowledgement)."""

    def __init__(self, target_port: int):
        self.target_port = target_port
        self.sock = socket.socket()
        self.sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        self.sock.bind(("127.0.0.1", 0))
        self.sock.listen(128)
        self.port = self.sock.getsockname()[1]
        self.up = True
        self.drop_replies = False
        self.replies_dropped = 0
        self._conns: set[socket.socket] = set()
        self._lock = threading.Lock()
        self._stop = False
        self._t = threading.Thread(target=self._accept, name="test-proxy", daemon=True)
        self._t.start()

    @property
    def url(self) -> str:
        return f"http://127.0.0.1:{self.port}"

    def cut(self) -> None:
        self.up = False
        with self._lock:
            for c in list(self._conns):
                with contextlib.suppress(OSError):
                    c.shutdown(socket.SHUT_RDWR)
                c.close()
            self._conns.clear()

    def restore(self) -> None:
        self.up = True

    def close(self) -> None:
        self._stop = True
        self.cut()
        self.sock.close()
        self._t.join(5)

    def _accept(self) -> None:
        while not self._stop:
            try:
                c, _ = self.sock.accept()
            except OSError:
                return
            if not self.up:
                c.close()
                continue
            try:
                s = socket.create_connection(("127.0.0.1", self.target_port), timeout=5)
            except OSError:
                c.close()
                continue
            with self._lock:
                self._conns |= {c, s}
            threading.Thread(target=self._pump, args=(c, s), name="test-proxy-pump", daemon=True).start()

    def _pump(self, c: socket.socket, s: socket.socket) -> None:
        try:
            while self.up:
                r, _, _ = select.select([c, s], [], [], 0.2)
                for src in r:
                    data = src.recv(65536)
                    if not data:
                        return
                    if src is s and self.drop_replies:
                        self.replies_dropped += 1
                        return
                    (s if src is c else c).sendall(data)
        except (OSError, ValueError):
            return
        finally:
            with self._lock:
                self._conns.discard(c)
                self._conns.discard(s)
            for x in (c, s):
                with contextlib.suppress(OSError):
                    x.close()


def make_station_db(path: Path, name: str, n_blocks: int, t0: float = 1_780_000_200.0, n_events: int = 3,
                    meter: str = "m1") -> None:
    """A station file as the monitor leaves it: its station row, n_blocks 6-minute blocks (with their
    running summaries) written by meterlink.station.derived from a held series, and n_events events."""
    from meterlink.station import derived
    from meterlink.storage.store import Store

    with Store(path) as store:
        with store.write() as conn:
            derived.ensure_schema(conn)
            conn.execute("INSERT INTO mon_station (name, standard, tier, convention, block_s, latitude_deg, "
                         "longitude_deg, created_utc) VALUES (?, 'icnirp-2020', 'public', 'power', 360, 47.0, 8.0, ?)",
                         (name, t0))
            sid = conn.execute("SELECT id FROM mon_station WHERE name=?", (name,)).fetchone()[0]
        add_blocks(store, sid, meter, t0, n_blocks)
        for i in range(n_events):
            store.add_event(None, "test_event", "info", f"event {i} of {name}", t_utc=t0 + i)


def add_blocks(store, station_id: int, meter: str, t0: float, n_blocks: int, interval_s: float = 60.0) -> None:
    """n_blocks more blocks from samples every interval_s starting at t0 (a slowly varying field)."""
    from meterlink.station import derived

    series = derived.Series(hold_s=3 * interval_s, windows_s=(360.0, 1800.0))
    ts = t0 + interval_s * __import__("numpy").arange(int(n_blocks * 360 / interval_s) + 1)
    es = 1.0 + 0.5 * __import__("numpy").sin(ts / 5000.0)
    final, _ = series.push_many(ts, es)
    with store.write() as conn:
        derived.save_blocks(conn, station_id, meter, "total", final, 0.9)


def station_file(path: Path, db: Path, name: str, url: str, token: str, station_uuid: str, every_s: float = 60.0,
                 extra: str = "") -> Path:
    """A station file with a [central] table (the token in a file beside it)."""
    tok = path.with_suffix(".token")
    tok.write_text(token + "\n")
    cert = ROOT / "calibration" / "demo-probe.toml"
    path.write_text(f'''format = "meterlink-station/1"
[station]
name = "{name}"
database = "{db}"
[assessment]
standard = "icnirp-2020"
tier = "public"
freq = 100e6
[[meter]]
name = "m1"
port = "/dev/null"
certificate = "{cert}"
[central]
url = "{url}"
token_file = "{tok.name}"
station_uuid = "{station_uuid}"
every_s = {every_s}
{extra}''')
    return path


def post(url: str, body, token: str | None, raw: bytes | None = None, headers=None) -> tuple[int, dict]:
    data = raw if raw is not None else json.dumps(body).encode()
    h = {"Content-Type": "application/json", **(headers or {})}
    if token:
        h["Authorization"] = f"Bearer {token}"
    req = urllib.request.Request(url + "/api/v1/batches", data=data, method="POST", headers=h)
    try:
        with urllib.request.urlopen(req, timeout=10) as r:
            return r.status, json.loads(r.read())
    except urllib.error.HTTPError as exc:
        return exc.code, json.loads(exc.read())


def count(dsn: str, sql: str, args=()) -> int:
    import psycopg

    with psycopg.connect(dsn) as c:
        return c.execute(sql, args).fetchone()[0]


# -- the configuration parser ------------------------------------------------------------------------
@pytest.mark.parametrize("text, words", [
    ('format = "x"\n', "format: expected"),
    ('format = "meterlink-central/1"\n', "database.dsn"),
    ('format = "meterlink-central/1"\n[database]\ndsn = "host=x"\n[service]\nport = 70000\n', "service.port"),
    ('format = "meterlink-central/1"\n[database]\ndsn = "host=x"\n[service]\nprot = 1\n', "unknown key 'prot'"),
    ('format = "meterlink-central/1"\n[database\n', "not valid TOML"),
])
def test_bad_central_configuration_is_refused_in_one_line(text, words):
    from meterlink.network.central import CentralError, parse_config

    with pytest.raises(CentralError) as ei:
        parse_config(text, "c.toml")
    assert words in str(ei.value) and "\n" not in str(ei.value)


def test_month_partition_bounds_are_calendar_months():
    """2024 is a leap year: February 2024 has 29 days (Gregorian calendar rule)."""
    from meterlink.network.central_schema import month_bounds

    lo, hi, suffix = month_bounds(1_709_000_000.0)   # 2024-02-27T02:13:20Z
    assert suffix == "y2024m02" and (hi - lo) == 29 * 86400
    assert lo == 1_706_745_600                          # 2024-02-01T00:00:00Z
    assert math.isclose(month_bounds(lo)[0], lo) and month_bounds(hi)[2] == "y2024m03"


def test_the_example_central_configuration_parses():
    from meterlink.network.central import load_config

    cfg = load_config(ROOT / "deploy" / "central.toml")
    assert cfg.port == 8600 and cfg.pool == 4 and "dbname=meterlink_central" in cfg.dsn


def test_the_central_unit_verifies_and_is_sandboxed(tmp_path):
    """systemd-analyze (installed by .ci/run) parses the unit; its offline security score stays under 2.5."""
    import re
    import shutil

    if shutil.which("systemd-analyze") is None:
        pytest.skip("systemd-analyze not installed")
    exe = Path(sys.executable).parent / "meterlink"
    unit = tmp_path / "meterlink-central.service"
    unit.write_text((ROOT / "deploy" / "meterlink-central.service").read_text()
                    .replace("/opt/meterlink/venv/bin/meterlink", str(exe)))
    v = subprocess.run(["systemd-analyze", "verify", str(unit)], capture_output=True, text=True, timeout=60)
    assert v.returncode == 0 and v.stderr.strip() == "", v.stderr
    sec = subprocess.run(["systemd-analyze", "security", "--offline=yes", str(unit)], capture_output=True,
                         text=True, timeout=60)
    m = re.search(r"Overall exposure level for \S+: ([0-9.]+)", sec.stdout)
    assert m, sec.stdout[-500:] + sec.stderr
    assert float(m.group(1)) < 2.5, sec.stdout


def test_a_station_never_loads_the_central_libraries():
    """The monitor and the sync client use the standard library only: psycopg, starlette and uvicorn stay
    in the central commands (a station installs meterlink without the 'central' extra)."""
    code = ("import sys, meterlink.station.monitor, meterlink.network.syncd, meterlink.commands.sync; "
            "print(sorted(m for m in ('psycopg', 'starlette', 'uvicorn') if m in sys.modules))")
    p = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT, timeout=60)
    assert p.returncode == 0 and p.stdout.strip() == "[]", p.stdout + p.stderr


@pytest.mark.parametrize("args, config, words", [
    (["central", "migrate"], None, "no such central configuration file"),
    (["central", "serve"], 'format = "meterlink-central/1"\n[database]\ndsn = "host=127.0.0.1 port=1 '
     'dbname=x user=x connect_timeout=2"\n', "cannot connect to the central database"),
    (["central", "tokens"], 'format = "meterlink-central/2"\n', "format: expected"),
])
def test_central_commands_refuse_bad_input_in_one_line(tmp_path, args, config, words):
    cfg = tmp_path / "central.toml"
    if config is not None:
        cfg.write_text(config)
    p = subprocess.run([sys.executable, "-m", "meterlink", *args, "--config", str(cfg)], capture_output=True,
                       text=True, cwd=ROOT, timeout=60)
    assert p.returncode == 2 and words in p.stderr and "Traceback" not in p.stderr, p.stderr
    assert len(p.stderr.strip().splitlines()) == 1, p.stderr
