"""The numpy monotone cubic against scipy.interpolate.PchipInterpolator (the published reference
implementation of Fritsch & Carlson 1980 / Moler 2004 pchip), and its shape preservation."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.interpolate import PchipInterpolator

from meterlink.physics.interp import MonotoneCubic

steps = st.lists(st.floats(0.01, 10.0), min_size=1, max_size=25)
# level steps below 1e-9 are taken as flat: scipy itself overflows dividing by such tiny slopes
# (a RuntimeWarning, near 1e-308), and no certificate table has them


def _step(lo, hi):
    return st.floats(lo, hi).map(lambda v: 0.0 if abs(v) < 1e-9 else v)


@settings(max_examples=200, deadline=None)
@given(dx=steps, dy=st.lists(_step(-5.0, 5.0), min_size=26, max_size=26))
def test_same_curve_as_scipy_pchip(dx, dy):
    x = np.concatenate([[0.0], np.cumsum(dx)])
    y = np.asarray(dy[: x.size])
    ref = PchipInterpolator(x, y, extrapolate=False)
    xq = np.linspace(x[0], x[-1], 301)
    np.testing.assert_allclose(MonotoneCubic(x, y)(xq), ref(xq), rtol=1e-9, atol=1e-9)


@settings(max_examples=100, deadline=None)
@given(dx=steps, dy=st.lists(_step(0.0, 3.0), min_size=26, max_size=26))
def test_monotone_data_give_a_monotone_curve(dx, dy):
    x = np.concatenate([[0.0], np.cumsum(dx)])
    y = np.cumsum(dy[: x.size])
    v = MonotoneCubic(x, y)(np.linspace(x[0], x[-1], 2001))
    assert np.all(np.diff(v) >= -1e-9 * max(1.0, abs(y).max()))


def test_outside_is_nan_and_bad_tables_are_refused():
    f = MonotoneCubic([0.0, 1.0, 3.0], [0.0, 2.0, 2.5])
    assert np.isnan(f(-0.1)) and np.isnan(f(3.01)) and f(1.0) == pytest.approx(2.0)
    with pytest.raises(ValueError):
        MonotoneCubic([0.0, 0.0, 1.0], [1.0, 2.0, 3.0])
