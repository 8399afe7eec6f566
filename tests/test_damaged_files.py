"""Damaged, read-only, empty and foreign database files, met by the CLI as a user meets them.

Every command runs as a real process (python -m meterlink) on real SQLite files; damage is
garbage written over one real page of the file, as a failing card or a power cut leaves it.
"""

import hashlib
import json
import shutil
import sqlite3
import subprocess
import sys
from pathlib import Path

import pytest

from meterlink.storage.recorder import Recorder
from meterlink.storage.store import Store, StorageError
from meterlink.simulators.pty_meter import SimulatedMeter

PAGE = 4096


def cli(*argv, timeout=120):
    """Run meterlink in a subprocess: (exit code, stdout, stderr)."""
    p = subprocess.run([sys.executable, "-m", "meterlink", *map(str, argv)], capture_output=True, text=True,
                       timeout=timeout)
    return p.returncode, p.stdout, p.stderr


def one_line_error(err: str, *words: str) -> None:
    """stderr is exactly one line, no traceback, naming every word given."""
    assert "Traceback" not in err, err
    assert len(err.strip().splitlines()) == 1, err
    for w in words:
        assert w in err, (w, err)


@pytest.fixture(scope="module")
def recorded(tmp_path_factory):
    """A file with two sessions of 1200 readings each (several pages of readings apiece)."""
    db = tmp_path_factory.mktemp("rec") / "two.db"
    for seed in (4, 5):
        with SimulatedMeter("demo", sensor="probe", seed=seed, speed=100.0) as sim, Store(db) as store:
            Recorder(store, sim.port, interval_ms=100, duration_s=120.0, host_timeout_s=30.0, freq_hz=101.8e6).run()
    with Store(db) as store:
        assert [store.count("readings", s["id"]) > 1000 for s in store.sessions()] == [True, True]
    return db


def _copy(src: Path, dest: Path) -> Path:
    conn = sqlite3.connect(src)
    conn.execute("pragma wal_checkpoint(truncate)")   # every row in the main file before copying it
    conn.close()
    shutil.copy(src, dest)
    return dest


def _page_of(db: Path, sql: str) -> int:
    """Page number picked by a query over SQLite's dbstat table (pages of a table, in key order)."""
    conn = sqlite3.connect(db)
    try:
        return conn.execute(sql).fetchone()[0]
    except sqlite3.OperationalError as exc:  # pragma: no cover - an SQLite built without dbstat
        pytest.skip(f"SQLite without dbstat: {exc}")
    finally:
        conn.close()


def _damage(db: Path, page: int) -> None:
    """Write garbage over one whole page of the file."""
    with open(db, "r+b") as fh:
        fh.seek((page - 1) * PAGE)
        fh.write(bytes(range(256)) * (PAGE // 256))


def _sha(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


@pytest.fixture
def readings_damaged(recorded, tmp_path):
    """Garbage over the first leaf page of readings, which holds session 1's first readings only."""
    db = _copy(recorded, tmp_path / "damaged.db")
    page = _page_of(db, "select pageno from dbstat where name = 'readings' and pagetype = 'leaf' order by path limit 1")
    _damage(db, page)
    return db


@pytest.fixture
def events_damaged(recorded, tmp_path):
    """Garbage over the events table's root page: every session's events unreadable."""
    db = _copy(recorded, tmp_path / "events-damaged.db")
    _damage(db, _page_of(db, "select rootpage from sqlite_master where name = 'events'"))
    return db


def test_verify_reports_damage_as_its_answer_and_salvage_copies_the_intact_session(recorded, readings_damaged,
                                                                                   tmp_path):
    with Store(recorded, readonly=True) as store:
        intact = store.readings(2)
        n1 = store.count("readings", 1)
    code, out, err = cli("sessions", "--db", readings_damaged, "--verify")
    assert code == 1 and "Traceback" not in err + out
    assert "session 1: damaged" in out and "session 2: reads whole" in out and "--salvage" in out
    code, out, err = cli("sessions", "--db", readings_damaged, "--verify", "--json")
    doc = json.loads(out)
    assert code == 1 and doc["sound"] is False and doc["problems"]
    assert [(s["id"], s["intact"]) for s in doc["sessions"]] == [(1, False), (2, True)]
    assert doc["sessions"][1]["rows"]["readings"] == len(intact)
    # of the damaged session, the span index still says how many readings it had, and fewer read
    assert doc["sessions"][0]["readings_indexed"] == n1 and doc["sessions"][0]["readings_readable"] < n1

    out_db = tmp_path / "salvaged.db"
    code, out, err = cli("sessions", "--db", readings_damaged, "--salvage", out_db)
    assert code == 0 and "1 session(s) copied" in out and "left behind (damaged): 1" in out, out + err
    code, out, _ = cli("sessions", "--db", out_db, "--verify", "--json")
    assert code == 0 and json.loads(out)["sound"] is True     # integrity check and span index both pass
    with Store(out_db, readonly=True) as store:
        assert [s["id"] for s in store.sessions()] == [2]
        got = store.readings(2)
        assert (got.ids == intact.ids).all() and (got.raw == intact.raw).all() and (got.t_utc == intact.t_utc).all()
        assert store.count("events", 2) > 0 and store.session(2)["device_serial"]
    code, _, err = cli("sessions", "--db", readings_damaged, "--salvage", out_db)   # never over an existing file
    assert code == 2
    one_line_error(err, str(out_db), "exists")


def test_recalibrate_refuses_to_write_into_a_damaged_file(readings_damaged):
    # session 2 reads whole, so without the check the new calibration would be written and exit 0
    before = _sha(readings_damaged)
    code, out, err = cli("recalibrate", "--db", readings_damaged, "--session", "2", "--certificate", "demo-probe")
    assert code == 2 and out == ""
    one_line_error(err, str(readings_damaged), "damaged", "refusing to write", "--verify")
    assert _sha(readings_damaged) == before


@pytest.mark.parametrize("argv", [
    ["sessions"], ["sessions", "--json"], ["sessions", "--events", "1"],
    ["assess", "--standard", "icnirp-2020", "--tier", "public"],
    ["report", "--session", "1", "--out", "OUT"],
    ["recalibrate", "--certificate", "demo-probe"],
])
def test_commands_on_a_damaged_file_say_so_in_one_line(events_damaged, tmp_path, argv):
    argv = [a.replace("OUT", str(tmp_path / "rep")) for a in argv]
    code, out, err = cli(argv[0], "--db", events_damaged, *argv[1:])
    assert code == 2
    one_line_error(err, str(events_damaged), "damaged", "--verify")


def test_verify_of_a_file_whose_session_list_is_unreadable(recorded, tmp_path):
    db = _copy(recorded, tmp_path / "nolist.db")
    _damage(db, _page_of(db, "select rootpage from sqlite_master where name = 'sessions'"))
    code, out, err = cli("sessions", "--db", db, "--verify")
    assert code == 1 and "Traceback" not in err and "salvage nothing" in out


def test_read_only_commands_open_read_only_and_change_nothing(recorded, tmp_path):
    db = _copy(recorded, tmp_path / "ro.db")
    conn = sqlite3.connect(db)
    conn.execute("pragma journal_mode=delete")   # so that any write would show in the main file's bytes
    conn.close()
    before = _sha(db)
    for argv in (["sessions"], ["sessions", "--events", "1"], ["sessions", "--verify"]):
        code, out, err = cli(argv[0], "--db", db, *argv[1:])
        assert code == 0, err
    assert _sha(db) == before and sorted(p.name for p in tmp_path.iterdir()) == ["ro.db"]
    with Store(db, readonly=True) as store:
        with pytest.raises(sqlite3.OperationalError, match="readonly"):
            store.db.execute("insert into events (t_utc, kind, severity) values (0, 'x', 'info')")


@pytest.mark.parametrize("content,words", [
    (b"", ["empty (0 bytes)"]),
    (b"\x89PNG\r\n\x1a\n" + bytes(200), ["not an SQLite database"]),
    (b"station = 'x'\n", ["not an SQLite database"]),
])
@pytest.mark.parametrize("argv", [
    ["sessions"], ["sessions", "--verify"], ["status"], ["stats"], ["export"],
    ["assess", "--standard", "icnirp-2020", "--tier", "public"], ["recalibrate", "--certificate", "demo-probe"],
    ["report", "--session", "1", "--out", "OUT"],
])
def test_an_empty_or_foreign_file_is_refused_and_left_as_it_was(tmp_path, content, words, argv):
    path = tmp_path / "given.db"
    path.write_bytes(content)
    argv = [a.replace("OUT", str(tmp_path / "rep")) for a in argv]
    code, out, err = cli(argv[0], "--db", path, *argv[1:])
    assert code == 2
    one_line_error(err, str(path), *words)
    assert path.read_bytes() == content
    assert sorted(p.name for p in tmp_path.iterdir()) == ["given.db"]   # no -wal, -shm, no report folder


@pytest.mark.parametrize("argv", [
    ["record", "--port", "/dev/meterlink-no-such-port", "--duration", "1"],
    ["survey", "--port", "/dev/meterlink-no-such-port", "--plan", "PLAN"],
])
def test_a_failed_command_leaves_no_database_behind(tmp_path, argv):
    plan = Path(__file__).resolve().parent.parent / "simulators" / "scenarios" / "demo-survey.toml"
    argv = [a.replace("PLAN", str(plan)) for a in argv]
    code, out, err = cli(argv[0], "--db", tmp_path / "new.db", *argv[1:])
    assert code == 2
    one_line_error(err, "/dev/meterlink-no-such-port")
    assert list(tmp_path.iterdir()) == []


def test_a_failed_command_keeps_a_file_that_already_held_data(recorded, tmp_path):
    db = _copy(recorded, tmp_path / "kept.db")
    code, _, err = cli("record", "--port", "/dev/meterlink-no-such-port", "--db", db, "--duration", "1")
    assert code == 2 and db.exists()
    with Store(db, readonly=True) as store:
        assert len(store.sessions()) == 2


def test_monitor_with_an_unknown_certificate_creates_no_database(tmp_path):
    station = tmp_path / "station.toml"
    station.write_text(f"""format = "meterlink-station/1"
[station]
name = "Quarry Lane"
database = "{tmp_path / 'station.db'}"
[assessment]
standard = "icnirp-2020"
tier = "public"
band = ["80 MHz", "4 GHz"]
[[meter]]
name = "gate"
port = "/dev/meterlink-no-such-port"
certificate = "no-such-certificate"
""", encoding="utf-8")
    code, out, err = cli("monitor", "--config", station, timeout=30)
    assert code == 2
    one_line_error(err, "no-such-certificate")
    # no database, journal or WAL file (a station lock file, if the daemon keeps one, is not a database)
    assert not [p.name for p in tmp_path.iterdir() if p.name.startswith("station.db") and not p.name.endswith(".lock")]


def test_store_refuses_to_create_where_it_must_only_read(tmp_path):
    with pytest.raises(StorageError, match="no database at"):
        Store(tmp_path / "absent.db", readonly=True)
    with pytest.raises(StorageError, match="no database at"):
        Store(tmp_path / "absent.db", create=False)
    assert list(tmp_path.iterdir()) == []


STATION = """format = "meterlink-station/1"
[station]
name = "Salter's Knoll (invented)"
database = "DB"
[assessment]
standard = "icnirp-2020"
tier = "public"
band = ["80 MHz", "4 GHz"]
interval_s = 10
[[meter]]
name = "east"
port = "PORT"
certificate = "demo-probe"
[health]
drift_max_ppm = 1e9
"""


def test_salvage_of_a_sound_station_file_copies_every_row(tmp_path):
    import threading
    import time

    from meterlink.station.monitor import Monitor
    from meterlink.station.stationfile import parse_station

    db = tmp_path / "station.db"
    with SimulatedMeter("station", meter=1, seed=5, speed=2000.0) as sim:
        st = parse_station(STATION.replace("DB", str(db)).replace("PORT", sim.port), tmp_path / "s.toml")
        mon = Monitor(st, time_scale=2000.0, backoff_max_s=0.5)
        th = threading.Thread(target=mon.run)
        th.start()
        try:
            deadline = time.monotonic() + 30
            while True:
                conn = sqlite3.connect(db, timeout=10)
                n = conn.execute("select count(*) from mon_block where complete = 1").fetchone()[0]
                conn.close()
                if n >= 3:
                    break
                assert time.monotonic() < deadline and th.is_alive()
                th.join(0.1)
        finally:
            mon.stop()
            th.join(30)
    out_db = tmp_path / "copy.db"
    code, out, err = cli("sessions", "--db", db, "--salvage", out_db)
    assert code == 0, err

    def counts(path):
        conn = sqlite3.connect(path)
        names = [r[0] for r in conn.execute("select name from sqlite_master where type = 'table' "
                                            "and name not like 'sqlite_%' and name != 'meta'")]
        got = {n: conn.execute(f"select count(*) from [{n}]").fetchone()[0] for n in names}
        conn.close()
        return got

    before, after = counts(db), counts(out_db)
    assert before["readings"] > 0 and before["mon_block"] >= 3 and before["events"] > 0
    assert after == before


def _schema_v2_file(path: Path) -> None:
    """A file as meterlink wrote it before the span index (schema 2), with one session of readings."""
    import sqlite_utils

    from meterlink.storage.schema import MIGRATIONS

    db = sqlite_utils.Database(path)
    for v in (1, 2):
        MIGRATIONS[v](db)
    db["meta"].upsert({"key": "schema_version", "value": "2"}, pk="key")
    db["sessions"].insert({"id": 1, "kind": "record", "started_utc": 1.8e9})
    db["readings"].insert_all({"session_id": 1, "boot": 1, "seq": i, "tick_ms": 100 * i, "t_utc": 1.8e9 + i / 10,
                               "raw_x": i, "raw_y": 0, "raw_z": 0, "flags": 0, "range_index": 0} for i in range(300))
    db.close()


def test_salvage_and_read_only_open_of_a_file_from_before_the_span_index(tmp_path):
    old = tmp_path / "v2.db"
    _schema_v2_file(old)
    out_db = tmp_path / "v2-copy.db"
    code, out, err = cli("sessions", "--db", old, "--salvage", out_db)
    assert code == 0 and "1 session(s) copied" in out, err
    code, out, _ = cli("sessions", "--db", out_db, "--verify", "--json")
    assert code == 0 and json.loads(out)["sound"] is True
    with Store(out_db, readonly=True) as store:
        assert len(store.readings(1)) == 300
    with Store(old, readonly=True) as store:     # upgraded once (the file is writable), then read read-only
        assert store.schema_version >= 3 and len(store.readings(1)) == 300
