"""The running-average windows hold their segments in a flat array whose length stops growing once the
window is full (meterlink/station/derived.py, SlidingWindow._room): the monitor's memory plateaus.

The values themselves are checked against meterlink.physics.averaging in tests/test_window_bins.py;
here: the array's length over time, and that the segments held are those a window needs (the
covered time of a constant field, hand-counted, and its mean, exactly the field squared).
"""

import numpy as np

from meterlink.station import derived

WINDOW_S = 3600.0


def _lengths(path: str, hours: float, piece_s: float = 600.0):
    """Feed 1 reading/s (jittered, hold 3 s) of a constant 2 V/m; the day array's length after each piece."""
    rng = np.random.default_rng(4)
    n = int(hours * 3600)
    t = 1.7e9 + np.arange(n) + rng.uniform(0.0, 0.2, n)
    s = derived.Series(3.0, windows_s=(WINDOW_S,))
    w = s.windows[WINDOW_S]
    per = int(piece_s)
    out = []
    for k in range(0, n, per):
        if path == "push_many":
            s.push_many(t[k:k + per], np.full(t[k:k + per].size, 2.0))
        else:
            for ti in t[k:k + per].tolist():
                s.push(ti, 2.0)
        out.append((float(t[min(k + per, n) - 1] - t[0]), len(w._buf), (w._t - w._h) // 3))
    return s, w, t, out


def test_array_length_stops_growing_once_the_window_is_full():
    for path in ("push_many", "push"):
        hours = 6.0 if path == "push_many" else 3.0
        s, w, t, out = _lengths(path, hours)
        full = [(el, n, live) for el, n, live in out if el >= WINDOW_S + 600.0]
        assert full, path
        # after the window filled, the array's length is constant (the head moves, the held segments
        # are moved to the front when the end is reached): no growth for the rest of the record
        assert len({n for _, n, _ in full}) == 1, (path, sorted({n for _, n, _ in full}))
        live_max = max(live for _, _, live in out)
        # bins of 1 s (3600 s / 3600) and 1-s readings: about one or two segments a bin (hand count)
        assert 3000 <= live_max <= 2 * 3600 + 4, (path, live_max)
        # grown by a quarter when more than 7/8 full: at most 1.25 x 8/7 (< 1.45) x what it holds, plus rounding
        assert full[0][1] <= 1.45 * 3 * live_max + 3 * 64, (path, full[0][1], live_max)
        # what is held is the window: a constant 2 V/m gives mean E^2 = 4 exactly over full coverage
        mean, cov = w.value(float(t[-1]))
        assert abs(mean - 4.0) < 1e-12 and abs(cov - 1.0) < 1e-9, (path, mean, cov)


def test_moving_to_the_front_keeps_the_segments_in_order():
    # a window of 360 s at 1 reading/s for 2 h: the array's end is reached many times over
    rng = np.random.default_rng(5)
    t = 1.7e9 + np.arange(7200) + rng.uniform(0.0, 0.2, 7200)
    e = 1.0 + rng.uniform(0.0, 1.0, t.size)
    s = derived.Series(3.0, windows_s=(360.0,))
    for k in range(0, t.size, 37):
        s.push_many(t[k:k + 37], e[k:k + 37])
    segs = np.array(s.windows[360.0]._segs)
    assert np.all(segs[1:, 0] >= segs[:-1, 1])          # time order, no overlap
    assert segs[0, 1] > t[-1] - 360.0                   # nothing held that the window has left
    assert segs[-1, 1] == t[-1]                         # up to the last sample (its hold not yet added)
