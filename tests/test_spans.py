"""The span index of readings (meterlink/storage/spans.py) on real SQLite files: against a plain model of
what should be stored, through random batches, repeats, restarts, interleaved sessions and deletes."""

import sqlite3

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings, strategies as st

from meterlink.storage import spans
from meterlink.station.monitor import thin_readings
from meterlink.storage.store import MIGRATIONS, READING_COLUMNS, SCHEMA_VERSION, Store

T0 = 1_800_000_000.0


def row(boot, seq, t=None):
    return {"boot": boot, "seq": seq, "tick_ms": seq * 100, "t_utc": T0 + seq / 10 if t is None else t,
            "raw_x": seq, "raw_y": boot, "raw_z": 1, "flags": 0, "range_index": 0}


# one step: (session 0/1, boot, first seq, count, stride, time offset) or a delete of the oldest part
batch = st.tuples(st.integers(0, 1), st.integers(1, 3), st.integers(0, 400), st.integers(1, 60),
                  st.sampled_from([1, 1, 1, 2, -1, 0]), st.floats(-5, 5, allow_nan=False))
step = st.one_of(batch, st.tuples(st.just("delete"), st.integers(0, 1), st.floats(0, 50)))


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(steps=st.lists(step, min_size=1, max_size=25))
def test_spans_match_a_plain_model(tmp_path_factory, steps):
    path = tmp_path_factory.mktemp("spans") / "s.db"
    orig = spans.SPAN_ROWS
    spans.SPAN_ROWS = 50  # small spans, so that batches straddle and extend them
    try:
        with Store(path) as store:
            sids = [store.begin_session("record"), store.begin_session("record")]
            model: list[dict] = [{}, {}]  # (boot, seq) -> t_utc, first copy wins
            for s in steps:
                if s[0] == "delete":
                    _, k, cut = s
                    thin_readings(store, sids[k], T0 + cut, 10_000)
                    model[k] = {key: t for key, t in model[k].items() if t >= T0 + cut}
                    continue
                k, boot, first, count, stride, dt = s
                rows = [row(boot, first + stride * i, T0 + (first + stride * i) / 10 + dt) for i in range(count)
                        if first + stride * i >= 0]
                if count % 3 == 0:  # the device restarted inside this batch: a second boot follows
                    rows += [row(boot % 3 + 1, i, T0 + 40 + i / 10) for i in range(count // 3)]
                want_new = 0
                for r in rows:
                    if (r["boot"], r["seq"]) not in model[k]:
                        model[k][(r["boot"], r["seq"])] = r["t_utc"]
                        want_new += 1
                assert store.add_readings(sids[k], rows) == want_new
            assert spans.check(store.db.conn) == []
            for k in (0, 1):
                got = store.readings(sids[k])
                assert store.count("readings", sids[k]) == len(model[k]) == len(got)
                assert set(zip(got.boot.tolist(), got.seq.tolist())) == set(model[k])
                assert np.all(np.diff(got.t_utc) >= 0)
                if model[k]:  # a time window returns exactly the model's rows in it
                    ts = sorted(model[k].values())
                    lo, hi = ts[len(ts) // 3], ts[-1]
                    win = store.readings(sids[k], lo, hi)
                    assert len(win) == sum(lo <= t < hi for t in ts)
                    n, first_t, last_t = spans.summary(store.db.conn, sids[k])
                    assert (n, first_t, last_t) == (len(ts), ts[0], ts[-1])
    finally:
        spans.SPAN_ROWS = orig


def test_a_refused_row_does_not_enter_the_spans(tmp_path):
    with Store(tmp_path / "r.db") as store:
        sid = store.begin_session("record")
        bad_t = row(1, 2, t=float("nan"))
        bad_seq = {**row(1, 3), "seq": "3; drop table readings"}
        assert store.add_readings(sid, [row(1, 1), bad_t, bad_seq, row(1, 4)]) == 2
        ev = store.events(sid, kind="bad_row")
        assert len(ev) == 2 and all("not stored" in e["message"] for e in ev)
        assert store.readings(sid).seq.tolist() == [1, 4] and spans.check(store.db.conn) == []


def test_a_version_2_file_is_migrated_to_spans_with_nothing_lost(tmp_path, capsys):
    path = tmp_path / "v2.db"
    import sqlite_utils
    db = sqlite_utils.Database(sqlite3.connect(path))
    for v in (1, 2):
        MIGRATIONS[v](db)
    db["meta"].upsert({"key": "schema_version", "value": "2"}, pk="key")
    db["sessions"].insert({"id": 1, "kind": "record", "started_utc": T0})
    db["sessions"].insert({"id": 2, "kind": "record", "started_utc": T0})
    rows = [(1 + (i % 3 == 0), 1 + i // 5000, i, i, T0 + i, i, 0, 0, 0, 0) for i in range(10_000)]
    db.conn.executemany(f"insert into readings (session_id, {', '.join(READING_COLUMNS)}) values "
                        f"(?,?,?,?,?,?,?,?,?,?)", rows)
    db.conn.commit()
    db.conn.close()
    with Store(path) as store:
        assert "upgrading" in capsys.readouterr().err  # a long pause on a big file is explained
        assert store.schema_version == SCHEMA_VERSION and store.db["readings"].indexes == []
        assert spans.check(store.db.conn) == []
        assert store.count("readings", 1) == sum(r[0] == 1 for r in rows)
        r2 = store.readings(2, T0 + 100, T0 + 200)
        assert r2.seq.tolist() == [i for i in range(100, 200) if i % 3 == 0]
        # and recording goes on: a repeat of a migrated reading (same key, same content) is still recognised
        same = {"boot": 1, "seq": 0, "tick_ms": 0, "t_utc": T0, "raw_x": 0, "raw_y": 0, "raw_z": 0, "flags": 0,
                "range_index": 0}
        assert store.add_readings(2, [same, row(2, 10_000, T0 + 10_000)]) == 1
        assert store.events(2, kind="duplicate_reading")[0]["detail"]["count"] == 1


def test_interleaved_meters_share_id_ranges_without_mixing(tmp_path):
    with Store(tmp_path / "i.db") as store:
        a, b = store.begin_session("monitor"), store.begin_session("monitor")
        for k in range(40):  # two meters' batches alternate, as in one monitor process
            store.add_readings(a, [row(1, 10 * k + i) for i in range(10)])
            store.add_readings(b, [row(7, 10 * k + i) for i in range(10)])
        assert spans.check(store.db.conn) == []
        assert store.count("readings", a) == store.count("readings", b) == 400
        assert set(store.readings(a).boot.tolist()) == {1} and set(store.readings(b).boot.tolist()) == {7}
        n_spans = store.db.execute("select count(*) from reading_spans").fetchone()[0]
        assert n_spans == 2  # one growing span per meter, not one per batch


@pytest.mark.parametrize("n", [1, 4096, 5000])
def test_batch_sizes_around_the_span_cap(tmp_path, n):
    with Store(tmp_path / "c.db") as store:
        sid = store.begin_session("record")
        for k in range(3):
            store.add_readings(sid, [row(1, k * n + i) for i in range(n)])
        assert spans.check(store.db.conn) == [] and store.count("readings", sid) == 3 * n
        assert store.add_readings(sid, [row(1, i) for i in range(3 * n)]) == 0  # all repeats


def test_a_restart_inside_one_batch_gives_each_boot_exact_bounds(tmp_path):
    with Store(tmp_path / "b.db") as store:
        sid = store.begin_session("record")
        store.add_readings(sid, [row(1, i) for i in range(10)])
        store.add_readings(sid, [row(1, 10 + i) for i in range(5)] + [row(2, i, T0 + 9 + i) for i in range(5)])
        assert spans.check(store.db.conn) == []
        b1 = store.db.execute("select id_hi, n from reading_spans where boot = 1").fetchall()
        assert b1 == [(15, 15)]


def test_a_late_lower_batch_then_new_readings_keep_spans_disjoint(tmp_path):
    # readings 100.., then a late batch 0.. (it cannot extend the first span), then 200..: only the
    # newest span may grow, or two spans of one boot would overlap in ids and be counted twice
    with Store(tmp_path / "l.db") as store:
        sid = store.begin_session("record")
        for first in (100, 0, 200):
            store.add_readings(sid, [row(1, first + i) for i in range(5)])
        assert spans.check(store.db.conn) == []
        thin_readings(store, sid, T0 + 10.2, 100)  # deletes seq 0..4 and 100..101
        assert spans.check(store.db.conn) == [] and store.count("readings", sid) == 8


def test_verify_reports_progress_through_both_stages(tmp_path):
    with Store(tmp_path / "p.db") as store:
        sid = store.begin_session("record")
        for k in range(100):  # two boots alternating: two spans, each grown fifty times
            store.add_readings(sid, [row(k % 2 + 1, k)])
        calls = []
        assert store.verify(lambda stage, done, total: calls.append((stage, done, total))) == []
    stages = [c[0] for c in calls]
    assert stages[0] == "SQLite integrity check" and stages[-1] == "span index"
    assert calls[-1][1:] == (1, 1) and any(c[0] == "span index" and c[2] > 1 for c in calls)
