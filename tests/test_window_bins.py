"""The monitor's running-average windows hold merged bins, not one segment per reading.

The reference values are those of meterlink.physics.averaging.running_average (the physics core,
itself checked against hand-worked windows in tests/test_averaging.py), with the sampling model both
share: a sample holds its value until the next one, for at most hold_s; uncovered time is a gap.
"""

import numpy as np

from meterlink.physics.averaging import running_average
from meterlink.station import derived

WINDOWS = (360.0, 1800.0, 86400.0)


def _record(rate_hz: float, days: float, gap: tuple[float, float], seed: int):
    """Jittered sample times from 1.7e9 s with one gap [gap) of no samples, and a varying field."""
    rng = np.random.default_rng(seed)
    n = int(days * 86400 * rate_hz)
    t = 1.7e9 + (np.arange(n) + rng.uniform(-0.2, 0.2, n)) / rate_hz
    t = t[(t - 1.7e9 < gap[0]) | (t - 1.7e9 >= gap[1])]
    d = t - 1.7e9
    e = 2.0 + 1.5 * np.sin(d / 3000.0) + rng.uniform(0.0, 0.5, t.size) + 3.0 * ((d % 20000.0) < 700.0)
    return t, e


def _feed(t, e, hold_s, chunk):
    s = derived.Series(hold_s, windows_s=WINDOWS)
    rows = []
    for k in range(0, t.size, chunk):
        _, run = s.push_many(t[k:k + chunk], e[k:k + chunk])
        rows.append(run)
    mean = np.concatenate([r.e_rms_v_per_m for r in rows], axis=1) ** 2
    cov = np.concatenate([r.coverage for r in rows], axis=1)
    return s, mean, cov


def test_two_days_at_1_hz_against_the_physics_core_within_the_bound():
    t, e = _record(1.0, 2.0, (50_000.0, 57_200.0), seed=1)     # a 2-hour gap on the first day
    s, mean, cov = _feed(t, e, 3.0, 3600)
    p_max = float(np.max(e)) ** 2
    for i, ws in enumerate(WINDOWS):
        ref = running_average(t, e, ws, max_hold_s=3.0)
        # covered time is kept exactly: coverage to rounding
        assert np.allclose(cov[i], ref.coverage, rtol=0, atol=1e-9)
        ok = ref.coverage > 0
        p_ref = ref.e_rms_v_per_m[ok] ** 2
        # stated bound (derived.SlidingWindow, docs/monitoring.md): relative error of the window mean
        # <= bin_s / covered_s x p_max / p_mean, with bin_s = window_s / 3600 (p_max over the record
        # here, which is at least that of the straddling bin)
        bound = (ws / 3600.0) / (ref.coverage[ok] * ws) * p_max / p_ref + 1e-9
        err = np.abs(mean[i][ok] / p_ref - 1.0)
        assert np.all(err <= bound), (ws, float(np.max(err / bound)))
        assert np.isnan(mean[i][~ok]).all()
    # the day window did merge (24-s bins of 1-s readings), the short ones had nothing to merge at 1 Hz
    assert len(s.windows[86400.0]._segs) <= 2 * 3600 + 4


def test_a_day_at_10_hz_holds_bins_not_readings():
    t, e = _record(10.0, 1.0, (40_000.0, 40_100.0), seed=2)
    s, mean, _ = _feed(t, e, 0.3, 100_000)
    day = s.windows[86400.0]._segs
    assert len(day) <= 2 * 3600 + 4                       # 864 000 readings held in about one bin per 24 s
    for ws in (360.0, 1800.0):                             # bins of 0.1 s and 0.5 s: bounded likewise
        assert len(s.windows[ws]._segs) <= 2 * 3600 + 4
    # energy and covered time kept in the merged segments are those of the readings: the day's mean
    # at the last sample against the physics core, to the stated bound (here the start is before the
    # record: no straddling bin, so exact to rounding)
    ref = running_average(t, e, 86400.0, max_hold_s=0.3, at_s=t[-1:])
    assert abs(mean[2][-1] / ref.e_rms_v_per_m[0] ** 2 - 1.0) < 1e-9
    assert abs(sum(b - a for a, b, _ in day) - ref.coverage[0] * 86400.0) < 1e-6


def test_a_gap_is_never_merged_over():
    # samples every 0.1 s, silent from 100 s to 103 s (hold 0.3 s): [100.3, 103) is uncovered
    t = np.r_[np.arange(0.0, 100.05, 0.1), np.arange(103.0, 200.0, 0.1)] + 1.7e9
    e = np.full(t.size, 2.0)
    for path in ("push", "push_many"):
        s = derived.Series(0.3, windows_s=WINDOWS)
        if path == "push":
            for ti, ei in zip(t.tolist(), e.tolist()):
                s.push(ti, ei)
        else:
            s.push_many(t, e)
        for ws, w in s.windows.items():
            segs = list(w._segs)
            assert all(b <= 1.7e9 + 100.3 + 1e-6 or a >= 1.7e9 + 103.0 - 1e-6 for a, b, _ in segs), (path, ws)
            # uncovered time stays a gap, never a zero: the mean of a constant field is that field squared
            mean, cov = w.value(t[-1])
            assert abs(mean - 4.0) < 1e-10, (path, ws)
        # the day window: covered = 199.9 s of record less the 2.7-s gap (hand count), over 86400 s
        _, cov = s.windows[86400.0].value(t[-1])
        assert abs(cov * 86400.0 - (199.9 - 2.7)) < 1e-5, path


def test_push_and_push_many_merge_alike():
    # 20 readings/s for 800 s, windows of 360 and 720 s (bins of 0.1 and 0.2 s: runs of readings merge)
    # and a 2-s gap: the per-reading and batched paths hold the same bins and
    # give the same running values to rounding (an equivalence of the two paths, not a physics value)
    t, e = _record(20.0, 800.0 / 86400.0, (300.0, 302.0), seed=3)
    loop, batch = (derived.Series(0.15, windows_s=(360.0, 720.0)) for _ in range(2))
    got_loop = np.array([[r.e_rms_v_per_m for r in loop.push(ti, ei)[1]] for ti, ei in zip(t.tolist(), e.tolist())]).T
    parts, k = [], 0
    for n in (1, 37, 500, 3, 2000) * 2:       # then 546 s in one call, longer than a window
        parts.append(batch.push_many(t[k:k + n], e[k:k + n])[1].e_rms_v_per_m)
        k += n
    parts.append(batch.push_many(t[k:], e[k:])[1].e_rms_v_per_m)
    got_batch = np.concatenate(parts, axis=1)
    assert np.allclose(got_loop, got_batch, rtol=1e-9, atol=0, equal_nan=True)
    for ws in (360.0, 720.0):
        a, b = list(loop.windows[ws]._segs), list(batch.windows[ws]._segs)
        assert len(a) == len(b) and np.allclose(a, b, rtol=1e-12, atol=0)
    assert len(loop.windows[720.0]._segs) < 0.5 * 14400       # merged: fewer segments than readings held
