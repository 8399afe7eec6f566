"""Store and BatchWriter on real SQLite files in tmp_path."""

import os
import subprocess
import sqlite3
import threading
import time

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings, strategies as st

from meterlink.storage import spans
from meterlink.storage.store import SCHEMA_VERSION, BatchWriter, Store, StorageError

TABLES = {"meta", "devices", "sessions", "readings", "spectra", "spectrum_lines", "status", "events",
          "calibrations", "field_values", "spectrum_values"}


def reading(seq, boot=1, t0=1_700_000_000.0, x=None):
    return {"boot": boot, "seq": seq, "tick_ms": 1000 * seq, "t_utc": t0 + seq, "raw_x": seq if x is None else x,
            "raw_y": -seq, "raw_z": 2 * seq, "flags": seq % 4, "range_index": 0}


@pytest.fixture
def store(tmp_path):
    with Store(tmp_path / "m.db") as s:
        yield s


def test_empty_file_is_migrated_to_current_schema_with_wal(tmp_path):
    path = tmp_path / "new.db"
    path.touch()  # an empty file is a valid, empty SQLite database
    with Store(path) as s:
        assert s.schema_version == SCHEMA_VERSION
        assert TABLES <= set(s.db.table_names())
        assert s.journal_mode == "wal"
        assert s.db.execute("pragma synchronous").fetchone()[0] == 1  # 1 = NORMAL (SQLite pragma docs)
    with Store(path) as s:  # reopening does not migrate twice
        assert s.schema_version == SCHEMA_VERSION


def test_time_range_queries_use_the_span_index_then_a_rowid_range(store):
    # SQLite "EXPLAIN QUERY PLAN" wording (sqlite.org/eqp.html): SEARCH ... USING INDEX / INTEGER PRIMARY KEY
    plan = store.db.execute("explain query plan select id_lo, id_hi from reading_spans where session_id = 1 "
                            "and t_hi >= 0 and t_lo < 10").fetchall()
    assert any("USING INDEX reading_spans_time" in row[-1] for row in plan), plan
    plan = store.db.execute("explain query plan select * from readings where id between 1 and 99 and session_id = 1 "
                            "and t_utc >= 0").fetchall()
    assert any("USING INTEGER PRIMARY KEY" in row[-1] for row in plan), plan
    # and readings carry no per-row secondary index (that is what the spans replace)
    assert store.db["readings"].indexes == []


def test_batch_insert_and_unique_protection(store):
    sid = store.begin_session("record", port="loop://")
    assert store.add_readings(sid, [reading(i) for i in range(100)]) == 100
    assert store.add_readings(sid, [reading(i) for i in range(90, 110)]) == 10
    r = store.readings(sid)
    assert len(r) == 110 and np.array_equal(r.seq, np.arange(110))
    dup = store.events(sid, kind="duplicate_reading")
    assert len(dup) == 1 and dup[0]["detail"]["count"] == 10
    # the same seq after a device restart (another boot) is a new reading
    assert store.add_reading(sid, reading(5, boot=2)) == 1
    assert store.add_readings(sid, [reading(5, boot=2), reading(6, boot=2)]) == 1
    assert store.count("readings", sid) == 112 and spans.check(store.db.conn) == []


def test_a_duplicate_is_the_same_reading_not_just_the_same_key(store):
    """A reading that shares (boot, seq) with a stored one but differs in content is another reading
    (an undetected restart): it is kept and reported, never dropped as "already stored"."""
    sid = store.begin_session("record", port="loop://")
    assert store.add_readings(sid, [reading(i) for i in range(100)]) == 100
    assert store.add_readings(sid, [reading(i, x=999) for i in range(90, 110)]) == 20
    assert store.add_readings(sid, [reading(95, x=999), reading(96, x=999)]) == 0  # now true repeats
    r = store.readings(sid)
    assert len(r) == 120 and sorted(r.raw[r.seq == 95, 0].tolist()) == [95, 999]
    reused = store.events(sid, kind="seq_reused")
    assert len(reused) == 1 and reused[0]["detail"]["count"] == 10 and reused[0]["severity"] == "warning"
    assert sum(e["detail"]["count"] for e in store.events(sid, kind="duplicate_reading")) == 2
    # within one batch too: the second copy with other content is kept, an exact copy is not
    b = [reading(500), reading(500, x=7), reading(500)]
    assert store.add_readings(sid, b) == 2
    assert spans.check(store.db.conn) == []


def test_epochs_keep_a_reused_boot_count_apart(store):
    """A meter that comes back with a boot count it used before (a reflash, a replacement unit) starts a
    new epoch: its readings are new even where their content repeats the old ones exactly."""
    sid = store.begin_session("record", port="loop://")
    e1, e2 = store.new_epoch(sid, 1, "handshake"), store.new_epoch(sid, 1, "handshake")
    assert store.db.execute("select count(*) from epochs where session_id = ?", [sid]).fetchone()[0] == 2
    assert e2 > e1
    assert store.add_readings(sid, [{**reading(i), "epoch": e1} for i in range(50)]) == 50
    assert store.add_readings(sid, [{**reading(i), "epoch": e2} for i in range(50)]) == 50
    a = _arrays_of([reading(i) for i in range(40, 60)])
    assert store.add_reading_arrays(sid, **a, epoch=e2) == 10
    assert store.count("readings", sid) == 110 and spans.check(store.db.conn) == []
    n = store.db.execute("select count(*) from reading_spans where session_id = ? and epoch = ?", [sid, e2]).fetchone()
    assert n[0] >= 1


def _arrays_of(rows):
    return {"boot": np.array([r["boot"] for r in rows]), "seq": np.array([r["seq"] for r in rows]),
            "tick_ms": np.array([r["tick_ms"] for r in rows]), "t_utc": np.array([r["t_utc"] for r in rows]),
            "raw": np.array([[r["raw_x"], r["raw_y"], r["raw_z"]] for r in rows]),
            "flags": np.array([r["flags"] for r in rows]), "range_index": np.array([r["range_index"] for r in rows])}


def test_bad_row_becomes_an_event_and_good_rows_are_kept(store):
    sid = store.begin_session("record")
    bad = reading(3)
    del bad["raw_x"]
    assert store.add_readings(sid, [reading(1), bad, reading(2)]) == 2
    ev = store.events(sid, kind="bad_row")
    assert len(ev) == 1 and ev[0]["severity"] == "error" and ev[0]["detail"]["seq"] == 3


def test_time_range_query_and_arrays(store):
    sid = store.begin_session("record")
    other = store.begin_session("record")
    store.add_readings(sid, [reading(i) for i in range(10)])
    store.add_readings(other, [reading(i) for i in range(3)])
    r = store.readings(sid, t0=1_700_000_002.0, t1=1_700_000_005.0)
    assert r.seq.tolist() == [2, 3, 4]
    assert r.raw.shape == (3, 3) and r.raw[:, 1].tolist() == [-2, -3, -4]
    assert r.t_utc.dtype == float and r.flags.tolist() == [2, 3, 0]
    empty = store.readings(sid, t0=0, t1=1)
    assert len(empty) == 0 and empty.raw.shape == (0, 3)


def test_sessions_devices_status_spectra_events(store):
    dev = store.device_id("MODEL-A", "SN1", "P1", "CAL-1", 1, "2.3.1", "1.0")
    assert store.device_id("MODEL-A", "SN1", "P1", "CAL-1", 1, "2.3.1", "1.0") == dev
    assert store.device_id("MODEL-A", "SN1", "P1", "CAL-2", 1, "2.3.1", "1.0") != dev
    sid = store.begin_session("survey", port="/dev/x", device_id=dev, interval_ms=500, band_lo_hz=8e8,
                              band_hi_hz=1e9, notes="roof")
    store.add_status(sid, {"boot": 1, "seq": 9, "tick_ms": 130000, "t_utc": 5.0, "battery_mv": 3910,
                           "battery_pct": 78, "temperature_degc": 24.5, "flags": 16, "interval_ms": 500})
    store.add_spectrum(sid, {"boot": 1, "seq": 40, "tick_ms": 60000, "t_utc": 6.0, "orientation": 1, "sweep": 12,
                             "lines": [(98.5e6, 61.23), (936.2e6, 44.07)]})
    store.add_event(sid, "seq_gap", "warning", "2 lost", lost=2, prev_seq=3, seq=6)
    store.end_session(sid, clock_rate_ratio=1.00001)
    s = store.session(sid)
    assert s["device_model"] == "MODEL-A" and s["kind"] == "survey" and s["band_hi_hz"] == 1e9
    assert s["ended_utc"] is not None and s["clock_rate_ratio"] == 1.00001
    lines = store.db.execute("select freq_hz, level_dbuv from spectrum_lines order by freq_hz").fetchall()
    assert lines == [(98.5e6, 61.23), (936.2e6, 44.07)]
    assert store.count("status", sid) == 1
    assert store.events(sid)[0]["detail"] == {"lost": 2, "prev_seq": 3, "seq": 6}
    with pytest.raises(ValueError):
        store.add_event(sid, "x", "fatal", "bad severity")
    with pytest.raises(StorageError):
        store.session(999)


def test_derived_tables_exist_empty_with_keys(store):
    cols = {c.name for c in store.db["field_values"].columns}
    assert {"reading_id", "calibration_id", "e_v_per_m", "h_a_per_m", "s_w_per_m2", "u_expanded_db"} <= cols
    assert store.db["field_values"].pks == ["reading_id", "calibration_id"]
    assert store.db["calibrations"].count == 0 and store.db["spectrum_values"].count == 0


def test_unwritable_or_foreign_files_are_clear_errors(tmp_path):
    with pytest.raises(StorageError, match="cannot open database"):
        Store(tmp_path / "missing-dir" / "x.db")
    with pytest.raises(StorageError, match="is a directory"):
        Store(tmp_path)
    junk = tmp_path / "junk.db"
    junk.write_bytes(b"this is not sqlite at all, just text" * 100)
    with pytest.raises(StorageError, match="junk.db"):
        Store(junk)
    foreign = tmp_path / "foreign.db"
    sqlite3.connect(foreign).execute("create table t (a)").connection.close()
    with pytest.raises(StorageError, match="not a meterlink database"):
        Store(foreign)


def test_read_only_directory(tmp_path):
    """A folder nobody may write into gives a StorageError. Root ignores permission bits, so as root
    the folder is made immutable instead (chattr +i binds root too, on file systems that support it)."""
    ro = tmp_path / "ro"
    ro.mkdir()
    as_root = os.geteuid() == 0
    if as_root:
        subprocess.run(["chattr", "+i", str(ro)], check=True)
    else:
        ro.chmod(0o500)
    try:
        with pytest.raises(StorageError):
            Store(ro / "x.db")
    finally:
        if as_root:
            subprocess.run(["chattr", "-i", str(ro)], check=True)
        else:
            ro.chmod(0o700)


def test_batch_writer_flushes_by_size_and_by_age(tmp_path):
    path = tmp_path / "b.db"
    with Store(path) as s:
        sid = s.begin_session("record")
        w = BatchWriter(s, sid, max_rows=50, max_age_s=0.2)
        other = Store(path)  # a second reader sees only committed rows
        for i in range(49):
            w.add_reading(reading(i))
        assert other.count("readings", sid) == 0
        w.add_reading(reading(49))
        assert other.count("readings", sid) == 50  # size triggered a commit
        w.add_reading(reading(50))
        w.start()  # background flushing by age
        deadline = time.monotonic() + 2.0
        while other.count("readings", sid) < 51 and time.monotonic() < deadline:
            time.sleep(0.01)
        assert other.count("readings", sid) == 51
        w.add_event("garbage", "warning", "3 bytes", n_bytes=3)
        w.close()
        assert other.count("events", sid) == 1 and w.new_readings == 51
        other.close()


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.lists(st.tuples(st.integers(0, 3), st.integers(0, 2**32 - 1), st.integers(-2**31, 2**31 - 1),
                          st.integers(-2**31, 2**31 - 1), st.integers(-2**31, 2**31 - 1),
                          st.floats(0, 4e9, allow_nan=False)), max_size=60,
                unique_by=lambda t: (t[0], t[1])))
def test_round_trip_of_any_readings(tmp_path, rows):
    with Store(tmp_path / "rt.db") as s:
        sid = s.begin_session("record")
        dicts = [{"boot": b, "seq": q, "tick_ms": q, "t_utc": t, "raw_x": x, "raw_y": y, "raw_z": z, "flags": 0,
                  "range_index": 0} for b, q, x, y, z, t in rows]
        assert s.add_readings(sid, dicts) == len(rows)
        r = s.readings(sid)
        got = sorted(zip(r.boot.tolist(), r.seq.tolist(), r.raw[:, 0].tolist(), r.raw[:, 1].tolist(),
                         r.raw[:, 2].tolist(), r.t_utc.tolist()))
        assert got == sorted((b, q, x, y, z, t) for b, q, x, y, z, t in rows)


def test_several_connections_write_one_file_at_once(tmp_path):
    # as a monitor and someone assessing or recording into the same file would: each its own Store.
    # Deferred transactions that read first failed here at once with "database is locked".
    path = tmp_path / "shared.db"
    Store(path).close()
    errors, counts = [], {}

    def writer(k):
        try:
            with Store(path) as s:
                sid = s.begin_session("record", notes=f"writer {k}")
                for b in range(60):
                    s.add_readings(sid, [reading(b * 5 + i, t0=1.8e9) for i in range(5)])
                    s.add_event(sid, "note", "info", f"batch {b}")
                counts[k] = (s.count("readings", sid), len(s.events(sid, kind="bad_row")))
        except Exception as exc:  # noqa: BLE001 - reported below
            errors.append(repr(exc))

    threads = [threading.Thread(target=writer, args=(k,)) for k in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(60)
    assert not errors, errors
    assert counts == {k: (300, 0) for k in range(4)}
    with Store(path) as s:
        assert spans.check(s.db.conn) == [] and len(s.sessions()) == 4


def test_batch_writer_keeps_a_failed_batch_and_bounds_memory_with_an_exact_drop_event(tmp_path):
    """A commit that fails on a full file (SQLite PRAGMA max_page_count, sqlite.org/pragma.html) keeps
    the batch; past max_keep readings the oldest go, recorded as an event with the exact count and
    sequence range; once there is room everything kept is stored."""
    import sqlite3

    with Store(tmp_path / "full.db") as s:
        sid = s.begin_session("record")
        w = BatchWriter(s, sid, max_rows=10**9, max_age_s=60.0, max_keep=100)
        pages = s.db.execute("PRAGMA page_count").fetchone()[0]
        s.db.execute(f"PRAGMA max_page_count = {pages}")
        for i in range(250):
            w.add_reading(reading(i))
        with pytest.raises(sqlite3.OperationalError, match="full"):
            w.flush()
        assert w.failures == 1 and w.pending_readings == 100 and w.dropped == 150
        for i in range(250, 260):   # while failing, adding stays bounded too
            w.add_reading(reading(i))
        assert w.pending_readings == 100 and w.dropped == 160
        assert s.count("readings", sid) == 0
        s.db.execute("PRAGMA max_page_count = 1073741823")
        w.flush()
        assert w.failures == 0
        r = s.readings(sid)
        assert r.seq.tolist() == list(range(160, 260))
        drops = s.events(sid, kind="readings_dropped")
        assert [d["detail"]["count"] for d in drops] == [160]          # one event for the episode
        assert [d["detail"]["ranges"] for d in drops] == [[[1, 0, 0, 159]]]
        assert sum(d["detail"]["count"] for d in drops) + len(r) == 260   # every reading: stored or counted
