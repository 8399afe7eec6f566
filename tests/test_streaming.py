"""Streamed and in-memory paths agree on the same session: recalibrated values, assessment, report CSV.

The session is a real SQLite file holding a probe record with a restart (a second boot after a
gap), a dropout and irregular intervals; the streamed paths run with chunks far shorter than the
averaging window, so most windows span several chunk boundaries. The in-memory paths (the whole
series loaded, physics.averaging's running average) are the reference. Speed is measured in
bench/bench_streaming.py, not here.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from meterlink.device.protocol import SensorKind
from meterlink.physics.assessment import assess_field, assess_field_stats, averaging_time_s, field_stats
from meterlink.physics.calibrate import expected_counts
from meterlink.physics.certificate import load_certificate
from meterlink.physics.streaming import FieldAccumulator, IntervalMedian
from meterlink.reports.session_report import write_session_report
from meterlink.storage import streamed as S
from meterlink.storage.processing import apply_certificate, field_series
from meterlink.storage.recording import load_recording
from meterlink.storage.store import Store

FREQ_HZ = 101.8e6
STANDARD, TIER, RULE = "icnirp-1998", "public", "guarded"   # 6-minute averaging at 101.8 MHz
SMALL = 37          # readings per chunk: a 360 s window at ~1 Hz spans about ten chunk boundaries


def _counts(cert, e_axis):
    return np.stack([np.round(expected_counts(ax, e_axis)) for ax in cert.axes], axis=1).astype(np.int64)


@pytest.fixture(scope="module")
def session(tmp_path_factory):
    """Boot 1: 1500 readings at ~1 Hz (jittered) with a 12 s dropout; then a restart: boot 2 after a
    90 s gap, 1300 readings. Field made from the demo certificate's own detector law."""
    cert = load_certificate("demo-probe")
    rng = np.random.default_rng(5)
    path = tmp_path_factory.mktemp("stream") / "s.db"
    t0 = 1_790_000_000.0
    n1, n2 = 1500, 1300
    t1 = t0 + np.arange(n1) + rng.uniform(-0.2, 0.2, n1)
    t1[800:] += 12.0                                          # a dropout inside boot 1
    t2 = t1[-1] + 90.0 + np.arange(n2) + rng.uniform(-0.2, 0.2, n2)
    e1 = 2.0 + 1.5 * np.sin(np.arange(n1) / 150.0) + rng.uniform(0, 0.3, n1)
    e2 = 3.0 + np.cos(np.arange(n2) / 90.0) + rng.uniform(0, 0.3, n2)
    with Store(path) as store:
        dev = store.device_id("TEST-1", "T-0001", cert.serial, cert.certificate_number, int(SensorKind.E_PROBE),
                              "1.0.0", "1.0")
        sid = store.begin_session("record", "test", dev, 1000, freq_hz=FREQ_HZ)
        for boot, t, e in ((1, t1, e1), (2, t2, e2)):
            seq = np.arange(t.size)
            store.add_reading_arrays(sid, boot, seq, seq * 1000, t, _counts(cert, e / np.sqrt(3.0)), 0, 0)
        store.write_batch(sid, statuses=[{"boot": 1, "seq": k, "tick_ms": k * 1000, "t_utc": t0 + k * 60,
                                          "battery_mv": 3900, "temperature_degc": 21.0 + k, "flags": 0,
                                          "interval_ms": 1000} for k in range(3)])
    return path, sid, cert


def _field_values(store, cal_id):
    v = store.field_values(cal_id)
    return [v[k] for k in ("reading_id", "t_utc", "e_v_per_m", "axes_v_per_m", "h_a_per_m", "s_w_per_m2",
                           "u_expanded_db", "flags")]


def test_the_session_has_a_restart_and_windows_span_many_chunks(session):
    path, sid, _ = session
    with Store(path) as store:
        r = store.readings(sid)
    assert set(r.boot.tolist()) == {1, 2} and len(r) == 2800
    window = averaging_time_s(STANDARD, TIER, FREQ_HZ)
    assert window is not None and window / np.median(np.diff(r.t_utc)) > 5 * SMALL


def test_streamed_recalibration_stores_exactly_the_in_memory_values(session):
    path, sid, cert = session
    with Store(path) as store:
        mem = apply_certificate(store, sid, cert)
        rec = load_recording(store, sid)
        done = S.recalibrate(store, rec, cert, rows=SMALL)
        a, b = _field_values(store, mem.calibration_id), _field_values(store, done.calibration_id)
        for x, y in zip(a, b):
            np.testing.assert_array_equal(x, y)
        assert done.n_values == len(mem) == 2800
        assert done.e_rms_v_per_m == pytest.approx(math.sqrt(np.mean(mem.e_v_per_m ** 2)), rel=1e-12)
        # Recording.values (the streamed reader) hands back the same values as Store.field_values
        rec = load_recording(store, sid)
        assert rec.calibration["id"] == done.calibration_id and rec.packed_n == 2800
        chunks = list(rec.values(rows=SMALL))
        assert len(chunks) > 2800 // SMALL
        np.testing.assert_array_equal(np.concatenate([c.reading_ids for c in chunks]), a[0])
        np.testing.assert_array_equal(np.concatenate([c.e_v_per_m for c in chunks]), a[2])
        np.testing.assert_array_equal(np.concatenate([c.axes_v_per_m for c in chunks]), a[3])
        np.testing.assert_array_equal(np.concatenate([c.flags for c in chunks]), a[7])


def _assessments(store, sid, rows):
    rec = load_recording(store, sid)
    series = field_series(store, sid)
    window = averaging_time_s(STANDARD, TIER, FREQ_HZ)
    mem_stats = field_stats(series, window)
    stats = S.field_stats(rec, window, rows=rows)
    kw = dict(freq_hz=FREQ_HZ, fallback_range=rec.certificate.freq_range_hz)
    mem = assess_field(series, STANDARD, TIER, RULE, **kw)
    got = assess_field_stats(stats, S.series_facts(rec), STANDARD, TIER, RULE, **kw)
    return mem_stats, stats, mem, got


@pytest.mark.parametrize("rows", [1, SMALL, 500, 100_000])
def test_streamed_assessment_equals_the_in_memory_one(session, rows):
    path, sid, cert = session
    with Store(path) as store:
        if not store.calibrations(sid):
            apply_certificate(store, sid, cert)
        m, s, mem, got = _assessments(store, sid, rows)
    assert m.complete and s.complete
    assert (s.n_finite, s.peak_v_per_m, s.t_peak_s, s.u_max_db) == (m.n_finite, m.peak_v_per_m, m.t_peak_s, m.u_max_db)
    assert s.value_v_per_m == pytest.approx(m.value_v_per_m, rel=1e-12)
    assert s.t_value_end_s == m.t_value_end_s
    assert s.coverage == pytest.approx(m.coverage, rel=1e-12)
    assert s.partial_max_v_per_m == pytest.approx(m.partial_max_v_per_m, rel=1e-12)
    assert (s.n_above, s.n_below, s.freq_out, s.freq_assumed) == (m.n_above, m.n_below, m.freq_out, m.freq_assumed)
    assert got.verdict.outcome == mem.verdict.outcome and got.verdict.reason == mem.verdict.reason
    assert got.total_exposure_ratio == pytest.approx(mem.total_exposure_ratio, rel=1e-12)
    assert got.notes == mem.notes and got.n_values == mem.n_values == 2800


def test_values_read_through_the_per_reading_rows_when_nothing_is_packed(session):
    """A calibration made before schema 8 has no field_spans rows, only per-reading rows in field_values
    (written here with plain SQL inserts, as an old file holds them): values come from field_values.
    Equivalence of two code paths: the same values stored the old way and the new way read back alike."""
    path, sid, cert = session
    with Store(path) as store:
        if not store.calibrations(sid):
            apply_certificate(store, sid, cert)
        new = store.calibrations(sid)[-1]
        packed = [c.e_v_per_m for c in load_recording(store, sid).values(rows=SMALL)]
        v = store.field_values(new["id"])
        with store.write() as conn:
            old = conn.execute("insert into calibrations (session_id, certificate_name, certificate_sha256, "
                               "certificate_text, applied_utc, freq_hz, software_version) values (?,?,?,?,?,?,?)",
                               [sid, new["certificate_name"], new["certificate_sha256"], new["certificate_text"],
                                new["applied_utc"], new["freq_hz"], "0.0.old"]).lastrowid
            conn.executemany("insert into field_values (reading_id, calibration_id, e_v_per_m, ex_v_per_m, "
                             "ey_v_per_m, ez_v_per_m, h_a_per_m, s_w_per_m2, u_expanded_db, flags) values "
                             "(?,?,?,?,?,?,?,?,?,?)",
                             [(int(i), old, float(e), *map(float, ax), float(h), float(s_), float(u), int(f))
                              for i, e, ax, h, s_, u, f in zip(v["reading_id"], v["e_v_per_m"], v["axes_v_per_m"],
                                                               v["h_a_per_m"], v["s_w_per_m2"], v["u_expanded_db"],
                                                               v["flags"])])
        rec = load_recording(store, sid)
        assert rec.calibration["id"] == old and rec.packed_n == 0
        rows = [c.e_v_per_m for c in rec.values(rows=SMALL)]
        np.testing.assert_array_equal(np.concatenate(rows), np.concatenate(packed))
        _, s, mem, got = _assessments(store, sid, SMALL)
        assert got.value_v_per_m == pytest.approx(mem.value_v_per_m, rel=1e-12)
        with store.write() as conn:          # leave the session's latest calibration a packed one
            conn.execute("delete from field_values where calibration_id = ?", [old])
            conn.execute("delete from calibrations where id = ?", [old])


def test_streamed_report_writes_the_same_csv_and_verdict(session, tmp_path):
    path, sid, cert = session
    with Store(path) as store:
        apply_certificate(store, sid, cert)
    a = write_session_report(path, sid, tmp_path / "a", standard=STANDARD, tier=TIER, rule=RULE, streamed=False)
    b = write_session_report(path, sid, tmp_path / "b", standard=STANDARD, tier=TIER, rule=RULE)
    csv_a, csv_b = (a.parent / "values.csv").read_bytes(), (b.parent / "values.csv").read_bytes()
    assert csv_a == csv_b and csv_a.count(b"\r\n") == 2801
    # the assessment section of the page (standard, level, averaged value, U, percent, outcome) is the same
    import re

    def section(html: str) -> str:
        m = re.search(r"<h2[^>]*>Assessment</h2>(.*?)<h2", html, re.S)
        assert m, "no Assessment section"
        return m.group(1)

    sa, sb = section(a.read_text()), section(b.read_text())
    assert "outcome" in sa and "V/m" in sa and sa == sb


def test_accumulator_matches_running_average_on_an_irregular_record():
    """Irregular intervals, gaps longer than the hold, chunks of 1 to 400 samples, a record shorter
    than one window: the streamed statistics equal physics.averaging's on the whole arrays."""
    from types import SimpleNamespace

    rng = np.random.default_rng(9)
    dt = rng.choice([0.5, 1.0, 1.0, 1.0, 2.0, 9.0], size=3000)
    t = 1_000.0 + np.cumsum(dt)
    e = rng.uniform(0.1, 5.0, t.size)
    e[rng.integers(0, t.size, 40)] = np.nan                  # calibrated values missing here and there
    u = np.full(t.size, 1.2)
    flags = rng.choice([0, 0, 0, 1, 2], size=t.size)
    for window, n in ((120.0, 3000), (360.0, 3000), (10_000.0, 3000), (None, 3000), (120.0, 1)):
        series = SimpleNamespace(t_utc=t[:n], e_v_per_m=e[:n], u_expanded_db=u[:n], flags=flags[:n])
        ref = field_stats(series, window)
        ok = np.isfinite(e[:n])
        for rows in (1, 7, 400):
            med = IntervalMedian(int(ok.sum()))
            for a in range(0, n, rows):
                med.feed(t[:n][a:a + rows][ok[a:a + rows]])
            acc = FieldAccumulator(window, med.median_s(), med.first, med.last, above_bit=2, below_bit=1)
            for a in range(0, n, rows):
                acc.feed(t[a:min(a + rows, n)], e[a:min(a + rows, n)], u[a:min(a + rows, n)],
                         flags[a:min(a + rows, n)])
            got = acc.result()
            assert got.value_v_per_m == pytest.approx(ref.value_v_per_m, rel=1e-12), (window, rows)
            assert (got.t_value_end_s, got.complete, got.n_finite) == (ref.t_value_end_s, ref.complete, ref.n_finite)
            assert got.coverage == pytest.approx(ref.coverage, rel=1e-12)
            assert (got.partial_max_v_per_m is None) == (ref.partial_max_v_per_m is None)
            if ref.partial_max_v_per_m is not None:
                assert got.partial_max_v_per_m == pytest.approx(ref.partial_max_v_per_m, rel=1e-12)
            assert (got.peak_v_per_m, got.t_peak_s) == (ref.peak_v_per_m, ref.t_peak_s)
            assert (got.n_above, got.n_below) == (ref.n_above, ref.n_below)


def test_packed_rows_round_trip_with_holes_and_varying_columns():
    """Ids with holes (two meters in one file), a varying uncertainty and flags, NaN values: the packed
    form gives back exactly what went in; contiguous ids and constant columns take the short form."""
    from meterlink.physics import units
    from meterlink.storage.queries import PACKED_ROWS, _packed_rows, _rebuilt_h, _unpack

    rng = np.random.default_rng(3)
    n = PACKED_ROWS + 500
    ids = np.cumsum(rng.choice([1, 1, 2], size=n)) + 100
    t = 1e9 + np.arange(n, dtype=float)
    e = rng.uniform(0, 5, n)
    e[::97] = np.nan
    axes = rng.uniform(0, 3, (n, 3))
    u = np.where(np.arange(n) < PACKED_ROWS, 1.5, rng.uniform(1, 2, n))
    flags = rng.choice([0, 1], size=n)
    s = units.e_to_s(e)
    cases = ((ids, flags, units.e_to_h(e), True), (np.arange(n) + 7, np.zeros(n, np.int64), e / 376.0, False))
    for ids_, fl, h, derived in cases:
        rows = _packed_rows(9, ids_, t, e, axes, h, s, u, fl)
        assert len(rows) == 2 and [r[3] for r in rows] == [PACKED_ROWS, 500]
        back = [_unpack((r[1], r[2], r[3], *r[6:])) for r in rows]   # as selected: no t_lo, t_hi
        got = {k: np.concatenate([b[k] for b in back]) for k in back[0]}
        np.testing.assert_array_equal(got["reading_id"], ids_)
        for k, want in (("t_utc", t), ("e_v_per_m", e), ("axes_v_per_m", axes), ("u_expanded_db", u), ("flags", fl)):
            np.testing.assert_array_equal(got[k], want)
        np.testing.assert_array_equal(np.concatenate([_rebuilt_h(b["e_v_per_m"], r[12]) for b, r in zip(back, rows)]),
                                      h)
        contiguous = bool(np.all(np.diff(ids_) == 1))
        assert (rows[0][6] == b"") == contiguous
        assert len(rows[0][10]) == 8          # the first row's uncertainty is constant: one element
        # H is stored only where it is not E / Z0 to the last bit (here: E / 376 in the second case)
        assert all((r[12] == b"") == derived for r in rows)


def test_a_clock_step_back_takes_the_in_memory_path_with_one_calibration(tmp_path, capsys):
    """Times that go back inside a boot (a host clock step) cannot stream: assess says so by loading
    the session whole, and applies its certificate once, not once per path."""
    import json

    from meterlink.cli import main

    cert = load_certificate("demo-probe")
    path = tmp_path / "step.db"
    n = 2000
    t = 1_790_000_000.0 + np.arange(n, dtype=float)
    t[1200:] -= 30.0                                         # the clock stepped back 30 s
    e = 3.0 + np.sin(np.arange(n) / 200.0)
    with Store(path) as store:
        dev = store.device_id("TEST-1", "T-0002", cert.serial, cert.certificate_number, int(SensorKind.E_PROBE),
                              "1.0.0", "1.0")
        sid = store.begin_session("record", "test", dev, 1000, freq_hz=FREQ_HZ)
        seq = np.arange(n)
        store.add_reading_arrays(sid, 1, seq, seq * 1000, t, _counts(cert, e / np.sqrt(3.0)), 0, 0)
        with pytest.raises(S.NotStreamable):
            S.interval_median(load_recording(store, sid))
    assert main(["assess", "--db", str(path), "--standard", STANDARD, "--tier", TIER, "--freq", "101.8MHz",
                 "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    with Store(path) as store:
        assert len(store.calibrations(sid)) == 1
        series = field_series(store, sid)
    assert np.all(np.diff(series.t_utc) >= 0)               # the in-memory path sorts by time
    want = assess_field(series, STANDARD, TIER, RULE, freq_hz=FREQ_HZ, fallback_range=cert.freq_range_hz)
    # JSON numbers to 5 significant digits (docs/formats.md)
    assert out["session_id"] == sid and out["averaged_e_v_per_m"] == pytest.approx(want.value_v_per_m, rel=1e-4)
    assert out["peak_e_v_per_m"] == pytest.approx(want.peak_v_per_m, rel=1e-4) and out["outcome"] == want.verdict.outcome
