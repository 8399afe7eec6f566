"""The simulated instruments' imperfection models (simulators/instruments.py)."""

import math
import tomllib
from importlib import resources

import numpy as np

from meterlink.simulators.instruments import (ProbeModel, ReceiverModel, axis_gain_db, probe_counts,
                                    receiver_levels_dbuv, true_antenna_factor_db_per_m, true_cable_loss_db)


def _tables():
    d = tomllib.loads(resources.files("meterlink.simulators.scenarios").joinpath("demo.toml").read_text())
    return ProbeModel.from_dict(d["probe"]), ReceiverModel.from_dict(d["receiver"])


def test_gain_at_reference_is_sensitivity_and_ripple_vanishes():
    probe, _ = _tables()
    np.testing.assert_allclose(axis_gain_db(probe, probe.ref_freq_hz), probe.sensitivity_db, atol=1e-12)
    g = axis_gain_db(probe, [1e8, 1e9, 3e9], temp_c=33.0)
    assert g.shape == (3, 3)
    # temperature term: 10 degC above 23 degC adds 10*coeff at every frequency
    np.testing.assert_allclose(g[1], np.array(probe.sensitivity_db) + 10 * probe.temp_coeff_db_per_c)


def test_square_law_below_knee_and_incoherent_sum():
    probe, _ = _tables()
    f = [probe.ref_freq_hz, probe.ref_freq_hz]
    c1, _ = probe_counts(probe, [[0.1, 0, 0]], [f[0]])
    c2, _ = probe_counts(probe, [[0.2, 0, 0]], [f[0]])
    s1, s2 = c1[0] - probe.offset_counts[0], c2[0] - probe.offset_counts[0]
    assert abs(s2 / s1 - 4.0) < 0.05  # square law: double field, four times the counts
    # two sources of 0.1 V/m add in power, like one of 0.1*sqrt(2)
    c3, _ = probe_counts(probe, [[0.1, 0, 0], [0.1, 0, 0]], f)
    c4, _ = probe_counts(probe, [[0.1 * math.sqrt(2), 0, 0]], [f[0]])
    assert abs(int(c3[0]) - int(c4[0])) <= 1


def test_overrange_clips_and_flags_only_that_axis():
    probe, _ = _tables()
    counts, over = probe_counts(probe, [[200.0, 0.0, 0.0]], [1e9], rng=np.random.default_rng(1))
    assert over.tolist() == [True, False, False]
    assert counts[0] == probe.full_scale_counts


def test_noise_shrinks_with_device_averaging():
    probe, _ = _tables()
    rng = np.random.default_rng(7)
    one = np.array([probe_counts(probe, [[0, 0, 0]], [1e9], rng=rng)[0][0] for _ in range(400)])
    avg = np.array([probe_counts(probe, [[0, 0, 0]], [1e9], rng=rng, n_average=16)[0][0] for _ in range(400)])
    assert 2.0 < one.std() < 4.0
    assert avg.std() < 0.5 * one.std()


def test_dipole_antenna_factor_matches_handbook_relation():
    # AF = 20 log10(f_MHz) - 29.77 - G(dBi) for a 50-ohm receiver (common practice, e.g. ANSI C63.5
    # background); an ideal half-wave dipole (2.15 dBi) at 100 MHz gives about 8.1 dB/m.
    _, rx = _tables()
    ideal = ReceiverModel([(1e6, 2.15), (1e10, 2.15)], [(1e6, 0.0), (1e10, 0.0)], 0.0, -200.0, 0.0, (1e6, 1e10))
    assert abs(float(true_antenna_factor_db_per_m(ideal, 100e6)) - 8.08) < 0.01
    assert float(true_cable_loss_db(rx, 1e9)) == 1.8


def test_receiver_level_chain_and_noise_floor():
    _, rx = _tables()
    f = np.array([100e6, 1e9])
    v = receiver_levels_dbuv(rx, [1.0, 1e-7], f)
    # 1 V/m = 120 dBuV/m (definition); V = E - AF - loss + level error
    expect = 120 - true_antenna_factor_db_per_m(rx, 100e6) - true_cable_loss_db(rx, 100e6) + rx.level_error_db
    assert abs(v[0] - expect) < 1e-9
    assert np.isnan(v[1])
