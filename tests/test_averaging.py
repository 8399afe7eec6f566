"""Time averaging in the power domain: held samples, gaps, coverage, long-record precision."""

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from meterlink.physics import averaging
from meterlink.physics.averaging import (
    block_averages,
    block_averages_s,
    running_average,
    running_average_s,
    summarise,
    summarise_s,
    window_mean_s,
    window_rms,
)
from meterlink.errors import MeterlinkError
from meterlink.physics.units import e_to_s


def test_power_domain_not_field_average():
    # 10 V/m for 3 min then 0 V/m for 27 min: sqrt(10^2 * 3/30) = sqrt(10) = 3.162 V/m, not the
    # 1 V/m a field average gives. Reference levels are time averages of E^2 / S: ICNIRP 2020
    # (Health Phys. 118(5)) Tables 5 and 6, notes on averaging over 30 min (whole body) and
    # 6 min (local); the relation itself is the definition of an RMS over time (common practice).
    t = np.arange(0.0, 1801.0)
    e = np.where(t < 180.0, 10.0, 0.0)
    rms, cov = window_rms(t, e, 0.0, 1800.0)
    assert rms == pytest.approx(math.sqrt(10.0), rel=1e-12)
    assert rms == pytest.approx(3.162, abs=5e-4)
    assert cov == 1.0
    assert np.mean(e[:1800]) == pytest.approx(1.0)          # what a field average would say
    r = running_average(t, e, 1800.0)
    assert r.e_rms_v_per_m[-1] == pytest.approx(math.sqrt(10.0), rel=1e-12)
    assert r.complete[-1] and not r.complete[100]
    # Power density averages linearly to the same thing: S = E^2/Z0 (plane wave).
    s_mean, _ = window_mean_s(t, e_to_s(e), 0.0, 1800.0)
    assert s_mean == pytest.approx(float(e_to_s(math.sqrt(10.0))), rel=1e-12)


def test_gap_is_not_zero_filled_and_coverage_by_hand():
    # Samples every 10 s; median interval 10 s so the default hold is 30 s. Sample at 30 s
    # holds to 60 s, then nothing until 100 s: 40 s gap. Worked by hand:
    # [0,120]: covered 0-60 (E=1) and 100-120 (E=2) -> 80 s of 120 -> coverage 2/3;
    # mean E^2 = (60*1 + 20*4)/80 = 1.75 -> 1.3229 V/m. Zero-filling would give sqrt(140/120).
    t = np.array([0.0, 10.0, 20.0, 30.0, 100.0, 110.0, 120.0])
    e = np.array([1.0, 1.0, 1.0, 1.0, 2.0, 2.0, 2.0])
    rms, cov = window_rms(t, e, 0.0, 120.0)
    assert cov == pytest.approx(80.0 / 120.0, rel=1e-12)
    assert rms == pytest.approx(math.sqrt(1.75), rel=1e-12)
    assert rms != pytest.approx(math.sqrt(140.0 / 120.0), rel=1e-3)
    r = running_average(t, e, 60.0, at_s=[60.0, 100.0, 120.0])
    # (0,60]: full; (40,100]: 40-60 held -> 20/60; (60,120]: 100-120 -> 20/60.
    assert r.coverage == pytest.approx([1.0, 1 / 3, 1 / 3])
    assert list(r.complete) == [True, False, False]
    assert r.e_rms_v_per_m == pytest.approx([1.0, 1.0, 2.0])     # over covered time only
    # An explicit longer hold closes the gap.
    _, cov_long = window_rms(t, e, 0.0, 120.0, max_hold_s=100.0)
    assert cov_long == 1.0


def test_irregular_sampling_is_time_weighted():
    # 1 V/m held 50 s, then 3 V/m held 10 s: mean E^2 = (50*1 + 10*9)/60 = 140/60 (by hand),
    # whereas a per-sample mean of E^2 would give (1+9)/2 = 5.
    t = np.array([0.0, 50.0, 60.0])
    e = np.array([1.0, 3.0, 0.0])
    rms, cov = window_rms(t, e, 0.0, 60.0, max_hold_s=100.0)
    assert cov == 1.0
    assert rms == pytest.approx(math.sqrt(140.0 / 60.0), rel=1e-12)


def test_blocks_aligned_to_origin():
    # 6-min blocks: 240 per day (ICNIRP 2020 6-min averaging; the count is 86400/360).
    t = np.arange(0.0, 86400.0, 1.0)
    e = np.full(t.size, 2.0)
    b = block_averages(t, e)
    assert b.t_start_s.size == 240
    assert np.all(b.complete) and b.value == pytest.approx(2.0)
    # Aligned to an origin 100 s before the first sample: first block covers 260/360.
    b2 = block_averages(t, e, origin_s=-100.0)
    assert b2.t_start_s[0] == -100.0
    assert b2.coverage[0] == pytest.approx(260.0 / 360.0)
    assert not b2.complete[0]
    bs = block_averages_s(t, np.full(t.size, 0.5))
    assert bs.value == pytest.approx(0.5) and bs.quantity == "power density mean"


def test_summary_peak_and_max_average():
    t = np.arange(0.0, 7200.0)
    e = np.ones(t.size)
    e[3000:3360] = 3.0          # a 6-min burst of 3 V/m
    e[5000] = 50.0              # a single spike
    s = summarise(t, e, 360.0)
    assert s.peak_v_per_m == 50.0 and s.t_peak_s == 5000.0
    # Window (t-360, t] ending at 3360 holds exactly the burst: 3 V/m.
    assert s.max_avg_v_per_m == pytest.approx(3.0, rel=1e-12)
    assert s.t_max_avg_end_s == 3360.0
    assert s.n_complete + s.n_incomplete == t.size
    assert s.overall_coverage == 1.0
    ss = summarise_s(t, e_to_s(e), 360.0)
    assert ss.max_avg_v_per_m == pytest.approx(float(e_to_s(3.0)), rel=1e-12)


def test_year_of_constant_field_averages_to_itself():
    # Long-record precision: 31.5 million 1 Hz samples of a value whose square is not exact
    # in binary; the block-compensated cumulative integral keeps every window to 1e-9.
    n = 365 * 86400
    t = np.arange(n, dtype=np.float64) + 1.7e9
    e = np.full(n, 3.7)
    s = summarise(t, e, 360.0)
    assert s.max_avg_v_per_m == pytest.approx(3.7, rel=1e-9)
    r = running_average(t, e, 360.0, at_s=t[-5:])
    assert np.all(np.abs(r.e_rms_v_per_m / 3.7 - 1.0) < 1e-9)
    rms, cov = window_rms(t, e, t[-1] - 1800.0, t[-1])
    assert abs(rms / 3.7 - 1.0) < 1e-9 and cov == pytest.approx(1.0, abs=1e-12)


def test_bad_input_is_a_meterlink_error():
    with pytest.raises(MeterlinkError, match="decrease"):
        running_average([0.0, 2.0, 1.0], [1.0, 1.0, 1.0], 10.0)
    with pytest.raises(MeterlinkError, match="finite"):
        running_average([0.0, 1.0, 2.0], [1.0, np.nan, 1.0], 10.0)
    with pytest.raises(MeterlinkError, match="window"):
        running_average([0.0, 1.0], [1.0, 1.0], 0.0)
    with pytest.raises(MeterlinkError, match="no samples"):
        summarise([], [], 10.0)
    with pytest.raises(MeterlinkError, match="max_hold_s"):
        window_rms([5.0], [1.0], 0.0, 10.0)
    assert window_rms([5.0], [2.0], 0.0, 10.0, max_hold_s=2.0) == (2.0, pytest.approx(0.2))


def test_unsorted_grid_keeps_caller_order():
    t = np.arange(0.0, 100.0)
    e = np.where(t < 50, 1.0, 2.0)
    a = running_average(t, e, 10.0, at_s=[90.0, 20.0, 55.0])
    assert a.e_rms_v_per_m == pytest.approx([2.0, 1.0, math.sqrt((5 * 1 + 5 * 4) / 10)])
    rs = running_average_s(t, e, 10.0, at_s=[20.0, 90.0])
    assert rs.s_w_per_m2 == pytest.approx([1.0, 2.0])


_records = st.integers(min_value=2, max_value=60).flatmap(
    lambda n: st.tuples(
        st.lists(st.floats(0.1, 100.0), min_size=n, max_size=n),
        st.lists(st.floats(0.0, 1e3), min_size=n, max_size=n),
    )
)


@settings(max_examples=150, deadline=None)
@given(st.floats(1e-3, 1e3), st.lists(st.floats(0.1, 50.0), min_size=2, max_size=80),
       st.floats(1.0, 500.0))
def test_property_constant_averages_to_constant(c, gaps, window):
    t = np.concatenate(([0.0], np.cumsum(gaps)))
    r = running_average(t, np.full(t.size, c), window)
    ok = np.isfinite(r.e_rms_v_per_m)
    assert np.allclose(r.e_rms_v_per_m[ok], c, rtol=1e-9)


@settings(max_examples=150, deadline=None)
@given(_records, st.floats(1.0, 500.0))
def test_property_bounded_by_max_and_jensen(rec, window):
    gaps, e = rec
    t = np.concatenate(([0.0], np.cumsum(gaps[:-1])))
    e = np.asarray(e)
    r = running_average(t, e, window, min_coverage=1.0)
    ok = np.isfinite(r.e_rms_v_per_m)
    assert np.all(r.e_rms_v_per_m[ok] <= e.max() * (1 + 1e-9) + 1e-12)
    # Jensen: the RMS over a window is at least the time-weighted mean field over it.
    for k in np.nonzero(r.complete)[0]:
        t1 = r.t_end_s[k]
        t0 = t1 - window
        # time-weighted field mean by explicit integration of the held samples
        hold = 3.0 * np.median(np.diff(t))
        ends = np.minimum(np.append(t[1:], t[-1] + min(np.median(np.diff(t)), hold)), t + hold)
        lo = np.clip(t, t0, t1)
        hi = np.clip(ends, t0, t1)
        mean_field = np.sum(e * (hi - lo)) / np.sum(hi - lo)
        # Compared in the power domain with the rounding bound of a cumulative integral:
        # a few ulps of max(E)^2 times (record span / window) (float64 eps, numpy finfo).
        tol = 64 * np.finfo(float).eps * e.max() ** 2 * (ends[-1] - t[0]) / window
        assert r.e_rms_v_per_m[k] ** 2 >= mean_field**2 * (1 - 1e-9) - tol


def _reference_running(t, e, window, hold, last_hold):
    """Straightforward O(n^2) reference: each sample holds min(next - t, hold) (the last one
    last_hold); a window's mean E^2 is the overlap-weighted sum over the covered seconds."""
    ends = np.append(np.minimum(t[1:], t[:-1] + hold), t[-1] + last_hold)
    mean, cov = np.full(t.size, np.nan), np.zeros(t.size)
    for k, t1 in enumerate(t):
        ov = np.clip(np.minimum(ends, t1) - np.maximum(t, t1 - window), 0.0, None)
        covered = ov.sum()
        if covered > 0:
            mean[k] = np.sum(e * e * ov) / covered
        cov[k] = min(covered / window, 1.0)
    return mean, cov


_stretches = st.lists(st.tuples(st.integers(1, 40), st.floats(0.5, 5.0), st.floats(0.0, 60.0),
                                st.booleans()), min_size=1, max_size=6)


@settings(max_examples=120, deadline=None)
@given(_stretches, st.floats(1.0, 200.0), st.integers(0, 2**32 - 1))
def test_property_matches_reference_on_irregular_records_with_gaps(stretches, window, seed):
    # Regular stretches (the index-offset fast path) joined by gaps, some jittered (the search
    # path); both the sample-time path and the general at_s path against the explicit sum.
    rng = np.random.default_rng(seed)
    steps = []
    for count, dt, gap, jitter in stretches:
        s = np.full(count, dt)
        if jitter:
            s = s * rng.uniform(0.5, 1.5, count)
        s[0] += gap
        steps.append(s)
    t = 100.0 + np.concatenate(([0.0], np.cumsum(np.concatenate(steps))))
    e = rng.uniform(0.0, 30.0, t.size)
    e[rng.random(t.size) < 0.1] = 0.0
    med = float(np.median(np.diff(t)))
    hold = 3.0 * med                     # the module's documented default (HOLD_FACTOR)
    mean_ref, cov_ref = _reference_running(t, e, window, hold, min(med, hold))
    # Rounding bound of a cumulative integral: a few ulps of max(E^2) times span / window
    # (float64 eps from numpy finfo), as in the Jensen property above.
    tol = 64 * np.finfo(float).eps * max(e.max() ** 2, 1e-300) * (t[-1] - t[0] + hold) / window
    ok = cov_ref > 1e-6
    # Small evaluation chunks put chunks wholly inside regular stretches, as in long records.
    for chunk in (averaging._QCHUNK, 8, 3):
        with pytest.MonkeyPatch.context() as mp:
            mp.setattr(averaging, "_QCHUNK", chunk)
            runs = (running_average(t, e, window), running_average(t, e, window, at_s=t))
            rs = running_average_s(t, e * e, window)
        for r in runs:
            assert r.coverage == pytest.approx(cov_ref, abs=1e-9)
            assert np.all(np.isnan(r.e_rms_v_per_m[cov_ref == 0.0]))
            np.testing.assert_allclose(r.e_rms_v_per_m[ok] ** 2, mean_ref[ok], rtol=1e-9, atol=tol)
        np.testing.assert_allclose(rs.s_w_per_m2[ok], mean_ref[ok], rtol=1e-9, atol=tol)


def test_window_starts_that_repeat_and_skip_samples():
    # Window starts 3.2, 3.5, 5.5 fall in samples 3, 3, 5 (a repeat and a skip in one pass).
    # By hand, E = k V/m held over [k, k+1): (3.2,4.2] -> 0.8*9 + 0.2*16 = 10.4 V^2/m^2;
    # (3.5,4.5] -> 0.5*9 + 0.5*16 = 12.5; (5.5,6.5] -> 0.5*25 + 0.5*36 = 30.5.
    t = np.arange(10.0)
    r = running_average(t, t.copy(), 1.0, at_s=[4.2, 4.5, 6.5])
    np.testing.assert_allclose(r.e_rms_v_per_m ** 2, [10.4, 12.5, 30.5], rtol=1e-12)
    assert r.coverage == pytest.approx([1.0, 1.0, 1.0])


def test_windows_reaching_outside_the_record_are_partial_never_complete():
    # ICNIRP 1998 (Health Phys 74(4)) Tables 6-7 notes: reference levels are "averaged over any
    # 6-min period" - a window of length T = 360 s. A 340-s record (1-s samples) covers 339 of the
    # 360 s of its last window: 94 % coverage, above the 90 % gap tolerance, yet the window begins
    # 21 s before the first sample, so it is not a 6-min average. Hand-worked.
    from meterlink.physics.averaging import block_averages, running_average, summarise
    t = np.arange(340.0)
    e = np.full(340, 10.0)
    ra = running_average(t, e, 360.0)
    assert ra.coverage[-1] == pytest.approx(339 / 360)
    assert ra.partial.all() and not ra.complete.any()
    s = summarise(t, e, 360.0)
    assert s.n_complete == 0 and math.isnan(s.max_avg_v_per_m)
    assert s.n_partial == 340 and s.max_partial_v_per_m == pytest.approx(10.0)
    # One sample more than T: the windows ending at t = 360 .. 400 lie inside, and only those.
    t = np.arange(401.0)
    ra = running_average(t, np.full(401, 10.0), 360.0)
    assert list(np.nonzero(ra.complete)[0]) == list(range(360, 401))
    # Fixed 6-min blocks: a record starting 20 s into the block [0, 360) and ending at 360 covers
    # 340/360 = 94 % of it, but the block starts before the record: partial, not complete.
    t = np.arange(20.0, 720.0)
    b = block_averages(t, np.full(t.size, 5.0), 360.0)
    assert list(b.partial) == [True, False]
    assert list(b.complete) == [False, True]
    assert b.coverage[0] == pytest.approx(340 / 360)


def _general(fn, *args, **kw):
    """The same call with the fused path switched off (the general path)."""
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(averaging, "_FAST", False)
        return fn(*args, **kw)


_fast_records = st.lists(st.tuples(st.integers(1, 30), st.floats(0.25, 4.0), st.floats(0.0, 40.0),
                                   st.sampled_from(["even", "jitter", "repeat"])), min_size=1, max_size=8)


@settings(max_examples=150, deadline=None)
@given(_fast_records, st.floats(0.5, 120.0), st.sampled_from([None, 0.7, 6.0]),
       st.sampled_from([(2, 1), (4, 2), (8, 3), (4096, 16)]), st.floats(0.5, 1.0), st.integers(0, 2**32 - 1))
def test_property_fused_path_equals_general_path(stretches, window, hold, sizes, min_cov, seed):
    # Records with gaps, explicit and default holds, even, jittered and repeated sample times, and
    # tiny blocks and chunks so that windows cross chunks, starts fall before the record over
    # several chunks and both the constant-offset and the searched starts are taken.
    rng = np.random.default_rng(seed)
    steps = []
    for count, dt, gap, kind in stretches:
        s = np.full(count, dt)
        if kind == "jitter":
            s = s * rng.uniform(0.5, 1.5, count)
        elif kind == "repeat":
            s[rng.random(count) < 0.3] = 0.0
        s[0] += gap
        steps.append(s)
    t = 1.7e9 + np.concatenate(([0.0], np.cumsum(np.concatenate(steps))))
    e = rng.uniform(0.0, 30.0, t.size)
    e[rng.random(t.size) < 0.1] = 0.0
    block, chunk_blocks = sizes
    if hold is None and not np.median(np.diff(t)) > 0:
        hold = 1.0                       # no default hold without a positive median interval
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(averaging, "_BLOCK", block)
        mp.setattr(averaging, "_FAST_CHUNK_BLOCKS", chunk_blocks)
        fast = running_average(t, e, window, max_hold_s=hold, min_coverage=min_cov)
        fast_s = running_average_s(t, e * e, window, max_hold_s=hold, min_coverage=min_cov)
        slow = _general(running_average, t, e, window, max_hold_s=hold, min_coverage=min_cov)
        # The fused path did run (it returns None where it would hand over to the general path).
        med = float(np.median(np.diff(t)))
        h = 3.0 * med if hold is None else hold
        assert averaging.averaging_fast.running_at_samples(
            t, e, True, window, min_cov, h, min(med, h) if med > 0 else h, averaging._COVER_TOL,
            block, chunk_blocks, averaging._SPAN) is not None
    # Rounding bound of a cumulative integral (float64 eps from numpy finfo), as in the properties above.
    tol = 64 * np.finfo(float).eps * max(e.max() ** 2, 1e-300) * (t[-1] - t[0] + 1.0) / window
    np.testing.assert_allclose(fast.coverage, slow.coverage, rtol=0, atol=1e-9)
    assert np.array_equal(np.isnan(fast.e_rms_v_per_m), np.isnan(slow.e_rms_v_per_m))
    ok = ~np.isnan(slow.e_rms_v_per_m)
    np.testing.assert_allclose(fast.e_rms_v_per_m[ok] ** 2, slow.e_rms_v_per_m[ok] ** 2, rtol=1e-9, atol=tol)
    np.testing.assert_allclose(fast_s.s_w_per_m2[ok], slow.e_rms_v_per_m[ok] ** 2, rtol=1e-9, atol=tol)
    assert np.array_equal(fast.partial, slow.partial)
    assert np.array_equal(fast.complete, slow.complete)
    assert np.array_equal(fast.t_end_s, t)


def test_fused_path_reports_bad_samples_like_the_general_path():
    # Bad input far into a long record (past the first chunks): the same one-line errors.
    t = np.arange(200_000.0)
    e = np.ones(t.size)
    e[150_001] = np.inf
    with pytest.raises(MeterlinkError, match="sample 150001 is not a finite"):
        running_average(t, e, 60.0)
    t2 = t.copy()
    t2[123_456] = 10.0
    with pytest.raises(MeterlinkError, match="must not decrease \\(sample 123456\\)"):
        running_average(t2, np.ones(t.size), 60.0)
    s = np.ones(t.size)
    s[99_999] = -1.0
    with pytest.raises(MeterlinkError, match="sample 99999 is not a finite, non-negative"):
        running_average_s(t, s, 60.0)
    t3 = t.copy()
    t3[170_000] = np.nan
    with pytest.raises(MeterlinkError, match="sample times must be finite"):
        running_average(t3, np.ones(t.size), 60.0, max_hold_s=2.0)


def test_fused_path_gap_in_a_long_record_by_hand():
    # 1 Hz from 1.7e9 s, E = 2 V/m, then a jump of 101 s after sample 149999 and E = 5 V/m. The
    # median interval is 1 s, so the default hold is 3 s: sample 149999 holds [149999, 150002] and
    # 98 s are a gap. Worked by hand (offsets from 1.7e9), 360-s windows:
    # ending 150100: (149740, 150100] covers 149740..150002 = 262 s of 2 V/m -> 2 V/m, 262/360;
    # ending 150300: 62 s of 2 V/m and 200 s of 5 V/m -> sqrt((62*4 + 200*25)/262), 262/360;
    # ending 150500: (150140, 150500] all 5 V/m -> 5 V/m, coverage 1.
    t = np.arange(200_000.0)
    t[150_000:] += 100.0
    t += 1.7e9
    e = np.where(np.arange(t.size) < 150_000, 2.0, 5.0)
    r = running_average(t, e, 360.0)
    k = np.searchsorted(t, 1.7e9 + np.array([150_100.0, 150_300.0, 150_500.0]))
    np.testing.assert_allclose(r.e_rms_v_per_m[k], [2.0, math.sqrt(5248.0 / 262.0), 5.0], rtol=1e-12)
    np.testing.assert_allclose(r.coverage[k], [262 / 360, 262 / 360, 1.0], rtol=0, atol=1e-9)
    assert list(r.complete[k]) == [False, False, True]
    assert not r.partial[k].any() and r.partial[:359].all() and not r.partial[360:].any()
    # A window wholly in the gap has nothing covered: no value, coverage 0.
    q = running_average(t, e, 50.0)
    j = int(np.searchsorted(t, 1.7e9 + 150_100.0))
    assert q.coverage[j] == 0.0 and math.isnan(q.e_rms_v_per_m[j])
