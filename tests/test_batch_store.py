"""The batched ingest path: Series.push_many against a push loop, Store.add_reading_arrays against write_batch.

The reference of each check is the library's own per-reading path (an equivalence, not a physics
value): push_many must leave the same blocks and running averages as push called in turn, and
add_reading_arrays must store the same rows and report the same duplicates as write_batch.
"""

import math

import numpy as np
from hypothesis import HealthCheck, given, settings, strategies as st

from meterlink.station import derived
from meterlink.storage.store import Store

REL = 1e-9  # summation order differs (bincount/cumsum vs running sums): agreement to rounding, not bits


def _close(a, b, scale):
    if isinstance(a, float) and math.isnan(a):
        return isinstance(b, float) and math.isnan(b)
    return abs(a - b) <= REL * (abs(a) + abs(b)) + REL * scale


def _same_block(x, y, p_scale, loop_runs):
    assert (x.t_start, x.block_s, x.n, x.n_over) == (y.t_start, y.block_s, y.n, y.n_over)
    assert _close(x.energy, y.energy, p_scale * x.block_s) and _close(x.covered_s, y.covered_s, x.block_s)
    assert x.e_max == y.e_max
    assert set(x.run_end) == set(y.run_end) and set(x.run_max) == set(y.run_max)
    for w in x.run_end:
        assert _close(x.run_end[w][0], y.run_end[w][0], p_scale) and _close(x.run_end[w][1], y.run_end[w][1], 1)
    for w in x.run_max:
        assert _close(x.run_max[w][0] ** 2, y.run_max[w][0] ** 2, p_scale)
        if x.run_max[w][1] != y.run_max[w][1]:
            # maxima equal to rounding may be found at another sample: the loop's value there is as large
            assert _close(loop_runs[(w, y.run_max[w][1])] ** 2, x.run_max[w][0] ** 2, p_scale)


samples = st.lists(st.tuples(
    st.sampled_from([0.25, 0.5, 1.0, 1.0, 1.0, 2.0, 7.0, 40.0, -3.0, 0.0]),     # step to the next time (gaps, repeats)
    st.one_of(st.floats(0, 50), st.sampled_from([0.0, 1.0, 2.5, 2.5]), st.just(float("nan")), st.just(-1.0), st.just(float("inf"))),
    st.booleans()), min_size=0, max_size=400)


@settings(max_examples=120, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(samples, st.lists(st.integers(1, 120), min_size=1, max_size=6), st.sampled_from([1.5, 3.0, 12.0, 45.0]),
       st.sampled_from([(30.0, (30.0, 60.0)), (20.0, (7.0, 50.0, 300.0)), (360.0, (360.0, 1800.0))]),
       st.sampled_from([0.5, 0.9, 1.0]), st.floats(0, 1000).map(lambda x: round(x, 2)))
def test_push_many_equals_push_loop(items, cuts, hold_s, geometry, min_cov, t0):
    block_s, windows = geometry
    t = t0 + np.cumsum([s for s, _, _ in items]) if items else np.zeros(0)
    e = np.array([v for _, v, _ in items], float)
    over = np.array([o for _, _, o in items], bool)
    loop, batch = (derived.Series(hold_s, block_s, windows, min_cov) for _ in range(2))
    blocks_loop, runs_loop, blocks_batch, runs_batch = [], [], [], []
    for ti, ei, oi in zip(t.tolist(), e.tolist(), over.tolist()):
        b, r = loop.push(ti, ei, oi)
        blocks_loop += b
        runs_loop += r
    k, i = 0, 0
    while k < len(t):
        n = cuts[i % len(cuts)]
        b, r = batch.push_many(t[k:k + n], e[k:k + n], over[k:k + n])
        blocks_batch += b
        runs_batch += r.samples()
        k, i = k + n, i + 1
    p_scale = 2500.0  # the largest E^2 drawn
    loop_runs = {(r.window_s, r.t_end): r.e_rms_v_per_m for r in runs_loop}
    assert len(blocks_loop) == len(blocks_batch)
    for x, y in zip(blocks_loop, blocks_batch):
        _same_block(x, y, p_scale, loop_runs)
    assert len(runs_loop) == len(runs_batch)
    for x, y in zip(runs_loop, runs_batch):
        assert (x.window_s, x.t_end, x.complete) == (y.window_s, y.t_end, y.complete)
        assert _close(x.coverage, y.coverage, 1) and _close(x.e_rms_v_per_m ** 2, y.e_rms_v_per_m ** 2, p_scale)
    # what is left open, and what a later gap closes, is the same too
    assert sorted(loop.open) == sorted(batch.open)
    for kk in loop.open:
        _same_block(loop.open[kk], batch.open[kk], p_scale, loop_runs)
    assert loop.last == batch.last and loop.frontier == batch.frontier
    end = (t[-1] if len(t) else 0.0) + 10 * hold_s + 2 * block_s
    for x, y in zip(loop.close_gap(end), batch.close_gap(end)):
        _same_block(x, y, p_scale, loop_runs)
    b1, r1 = loop.push(end + 1, 3.0)
    b2, r2 = batch.push(end + 1, 3.0)
    assert len(b1) == len(b2)
    for x, y in zip(r1, r2):
        assert _close(x.e_rms_v_per_m ** 2, y.e_rms_v_per_m ** 2, p_scale) and x.complete == y.complete


def test_push_many_six_minute_blocks_of_a_steady_field():
    # a constant field held without gaps: every complete 6-minute block has that field as its RMS
    # (power-domain time average, ICNIRP 2020 guidelines, averaging over 6 minutes for local exposure)
    s = derived.Series(3.0)
    t = np.arange(0.0, 3600.0, 1.0)
    blocks, runs = s.push_many(t, np.full(t.size, 2.0))
    assert [b.t_start for b in blocks] == [360.0 * k for k in range(9)]
    assert all(abs(b.e_rms() - 2.0) < 1e-12 and b.n == 360 and b.coverage() == 1.0 for b in blocks)
    assert runs.e_rms_v_per_m.shape == (3, 3600) and runs.complete[0, 360:].all() and not runs.complete[0, :300].any()
    # A 6-min average needs 6 min of record: the windows ending at t = 324..359 s hold 90-100 % coverage
    # but begin before the first sample (t = 0), so they are partial, never complete (hand-worked).
    assert runs.coverage[0, 330] >= 0.9 and not runs.complete[0, :360].any()
    assert not runs.complete[1, :1800].any() and runs.complete[1, 1800:].all()
    # A record starting 20 s into the block [0, 360) covers 340/360 = 94 % of it: still not a 6-min
    # block average, it begins before the record (partial); the next block is complete.
    s = derived.Series(3.0)
    t = np.arange(20.0, 1000.0, 1.0)
    blocks, _ = s.push_many(t, np.full(t.size, 2.0))
    rows = [derived.block_row(1, "m", "total", b, 0.9) for b in blocks]
    assert blocks[0].coverage() >= 0.9 and blocks[0].partial and rows[0][10] == 0
    assert not blocks[1].partial and rows[1][10] == 1


def _arrays(seqs, boot=1, t0=1_700_000_000.0):
    seq = np.asarray(seqs, dtype=np.int64)
    raw = np.stack([seq * 3, -seq, seq + 7], axis=1)
    return dict(boot=np.full(seq.size, boot), seq=seq, tick_ms=seq * 1000, t_utc=t0 + seq * 0.5, raw=raw,
                flags=seq % 8, range_index=np.zeros(seq.size, np.int64))


def _dicts(a):
    return [{"boot": int(b), "seq": int(s), "tick_ms": int(k), "t_utc": float(t), "raw_x": int(r[0]),
             "raw_y": int(r[1]), "raw_z": int(r[2]), "flags": int(f), "range_index": int(ri)}
            for b, s, k, t, r, f, ri in zip(a["boot"], a["seq"], a["tick_ms"], a["t_utc"], a["raw"], a["flags"],
                                            a["range_index"])]


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.lists(st.lists(st.integers(0, 60), max_size=40), min_size=1, max_size=5), st.booleans())
def test_add_reading_arrays_stores_and_reports_as_write_batch(tmp_path, batches, scalars):
    with Store(tmp_path / "a.db") as sa, Store(tmp_path / "b.db") as sb:
        ia, ib = sa.begin_session("record", started_utc=0.0), sb.begin_session("record", started_utc=0.0)
        for k, seqs in enumerate(batches):
            a = _arrays(seqs, boot=1 + k % 2)
            rows = _dicts(a)
            if scalars:  # values common to the batch given once (they go into the statement as literals)
                a.update(boot=1 + k % 2, flags=5, range_index=np.int64(2))
                rows = [{**r, "flags": 5, "range_index": 2} for r in rows]
            assert sa.add_reading_arrays(ia, **a) == sb.write_batch(ib, readings=rows)
        ra, rb = sa.readings(ia), sb.readings(ib)
        for f in ("ids", "boot", "seq", "tick_ms", "t_utc", "raw", "flags", "range_index"):
            assert np.array_equal(getattr(ra, f), getattr(rb, f))
        da, db = sa.events(ia, kind="duplicate_reading"), sb.events(ib, kind="duplicate_reading")
        assert [e["detail"]["count"] for e in da] == [e["detail"]["count"] for e in db]
    (tmp_path / "a.db").unlink()
    (tmp_path / "b.db").unlink()


def test_add_reading_arrays_duplicates_and_a_bad_row(tmp_path):
    with Store(tmp_path / "m.db") as s:
        sid = s.begin_session("record")
        assert s.add_reading_arrays(sid, **_arrays(range(100))) == 100
        assert s.add_reading_arrays(sid, **_arrays(range(90, 110))) == 10
        dup = s.events(sid, kind="duplicate_reading")
        assert len(dup) == 1 and dup[0]["detail"]["count"] == 10
        assert s.add_reading_arrays(sid, **_arrays(range(5), boot=2)) == 5  # another boot: new readings
        assert s.count("readings", sid) == 115
        # a row SQLite cannot bind becomes an event; the others still go in
        a = _arrays([200, 201, 202])
        a["t_utc"] = np.array([1.0, 2.0, 3.0], dtype=object)
        a["t_utc"][1] = {"not": "a number"}
        assert s.add_reading_arrays(sid, **a) == 2
        bad = s.events(sid, kind="bad_row")
        assert len(bad) == 1 and bad[0]["detail"]["seq"] == 201
