"""Channel-power integration and the field chain of a frequency-selective point, against hand-worked values.

The traces here are written from the defining physics, not from the code under test: an rms detector
behind a Gaussian resolution filter of 3 dB width RBW shows, at offset x from a CW carrier of power P,
P*exp(-4 ln2 (x/RBW)^2) (half power at x = RBW/2); for a flat density D it shows D * B_n with
B_n = integral of exp(-4 ln2 (x/RBW)^2) dx = RBW*sqrt(pi/(4 ln2)) = 1.0645 RBW (the Gaussian integral,
worked by hand: integral exp(-a x^2) dx = sqrt(pi/a), a = 4 ln2 / RBW^2).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from meterlink.physics.selective import (GAUSSIAN_NBW_FACTOR, SelectiveError, channel_power_w,
                                         combine_orientations, e_from_input_power_v_per_m, integration_window_hz)


def test_gaussian_noise_bandwidth_factor_by_hand():
    # sqrt(pi / (4 * 0.693147)) = sqrt(1.133090) = 1.064467
    assert GAUSSIAN_NBW_FACTOR == pytest.approx(1.064467, abs=1e-6)


def test_flat_density_over_known_bandwidth():
    # D = -90 dBm/Hz = 1e-12 W/Hz over B = 5 MHz: P = 5e-6 W (-23.01 dBm), by hand.
    rbw = 100e3
    f = np.linspace(990e6, 1010e6, 8001)                       # 2.5 kHz spacing
    inside = np.abs(f - 1000e6) <= 2.5e6
    level = np.where(inside, -90.0 + 10 * math.log10(GAUSSIAN_NBW_FACTOR * rbw), -200.0)
    p = channel_power_w(f, level, rbw, 997.5e6, 1002.5e6)
    # the ends of the band each hold half a bin too many at this sampling: (2000+1)/2000 of the value
    assert p == pytest.approx(5e-6 * 2001 / 2000, rel=1e-9)
    # the peak bin alone would say D * B_n = 1.0645e-7 W, 47 x too low
    assert 1e-3 * 10 ** (level.max() / 10) == pytest.approx(1e-12 * 106.4467e3, rel=1e-5)


@pytest.mark.parametrize("rbw_hz", [10e3, 30e3, 100e3, 300e3])
def test_single_cw_tone_under_different_rbws(rbw_hz):
    # P = -20 dBm = 1e-5 W at 500 MHz; spacing RBW/4; the sum of the sampled Gaussian is its integral
    p_w = 1e-5
    f0 = 500e6 + 1234.0                                        # off the bin grid on purpose
    df = rbw_hz / 4
    f = 500e6 + df * np.arange(-400, 401)
    level = 10 * np.log10(np.maximum(p_w / 1e-3 * np.exp(-4 * math.log(2) * ((f - f0) / rbw_hz) ** 2), 1e-30))
    lo, hi = integration_window_hz(f0, 0.0, rbw_hz)
    assert channel_power_w(f, level, rbw_hz, lo, hi) == pytest.approx(p_w, rel=1e-4)
    # the peak bin of an off-grid carrier reads low by the filter's response half a spacing off at worst:
    # 10*log10(exp(-4 ln2 (1/8)^2)) = -0.188 dB at spacing RBW/4; the channel power above does not
    assert -20.0 - 0.189 < level.max() <= -20.0


def test_spacing_wider_than_rbw_is_refused():
    f = np.linspace(0, 1e6, 11)
    with pytest.raises(SelectiveError, match="wider than the RBW"):
        channel_power_w(f, np.zeros(11), 10e3, 0, 1e6)
    with pytest.raises(SelectiveError, match="not inside the sweep"):
        channel_power_w(f, np.zeros(11), 200e3, 0, 2e6)


def test_field_from_input_power_by_hand():
    # -20 dBm into 50 ohm: V = sqrt(1e-5 * 50) = 22.36 mV (87.0 dBuV); AF 20 dB/m, loss 3 dB:
    # E = 22.36e-3 * 10 * 10^(3/20) = 0.3159 V/m (87.0 + 20 + 3 = 110.0 dBuV/m)
    e = e_from_input_power_v_per_m(1e-5, 20.0, 3.0)
    assert e == pytest.approx(0.022360680 * 10 * 1.4125375, rel=1e-6)
    assert 20 * math.log10(e * 1e6) == pytest.approx(106.99 + 3.0, abs=0.01)


def test_three_orientations_add_in_power():
    assert combine_orientations([3.0, 4.0, 12.0]) == pytest.approx(13.0)


def test_many_bands_of_one_wide_sweep_by_hand():
    # two flat blocks of -90 dBm/Hz (1e-12 W/Hz): 2 MHz and 5 MHz wide -> 2e-6 W and 5e-6 W, as by hand
    # (plus half a bin at each edge, (N+1)/N with N = width / spacing)
    rbw = 100e3
    f = np.linspace(0.0, 100e6, 40001)                        # 2.5 kHz spacing
    density = np.where(np.abs(f - 20e6) <= 1e6, 1.0, 0.0) + np.where(np.abs(f - 60e6) <= 2.5e6, 1.0, 0.0)
    level = np.where(density > 0, -90.0 + 10 * math.log10(GAUSSIAN_NBW_FACTOR * rbw), -300.0)
    from meterlink.physics.selective import channel_powers_w
    p = channel_powers_w(f, level, rbw, [(19e6, 21e6), (57.5e6, 62.5e6)])
    assert p[0] == pytest.approx(2e-6 * 801 / 800, rel=1e-9)
    assert p[1] == pytest.approx(5e-6 * 2001 / 2000, rel=1e-9)
