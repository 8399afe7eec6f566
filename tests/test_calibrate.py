"""Applying calibration, tested with synthetic truth: a known detector law and frequency response."""

import dataclasses
import datetime as dt

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from meterlink.physics import units
from meterlink.physics.calibrate import (ABOVE_RANGE, BELOW_RANGE, EXPIRED, FREQ_ASSUMED, FREQ_OUT, NEAR_FIELD,
                                 calibrate_axes, calibrate_spectrum, combine_orientations, expected_counts,
                                 flag_names, frequency_correction_db, identity_certificate, linearise)
from meterlink.physics.certificate import AxisCalibration, DipoleCertificate, ProbeCertificate
from meterlink.physics.uncertainty import Component

REF_HZ = 1e9
K_COUNTS = 1000.0
KNEE = np.array([8.0, 10.0, 12.0])
ZERO = np.array([150.0, -80.0, 20.0])
SENS_DB = np.array([0.4, -0.3, 0.1])
TABLE_F = np.geomspace(1e8, 6e9, 12)
# a known frequency response, piecewise linear in log-frequency (so the certificate holds it exactly)
RESP_DB = np.stack([0.8 * np.sin(np.arange(12) * 0.9 + p) - 0.8 * np.sin(6 * 0.0 + p) for p in (0.0, 1.0, 2.0)])
TODAY = dt.date(2026, 7, 1)


def _response_db(freq_hz):
    """Axis gain (field dB) relative to the reference frequency, shape (3,)."""
    g = np.array([np.interp(np.log10(freq_hz), np.log10(TABLE_F), RESP_DB[a]) for a in range(3)])
    g_ref = np.array([np.interp(np.log10(REF_HZ), np.log10(TABLE_F), RESP_DB[a]) for a in range(3)])
    return g - g_ref


def true_counts(e_axes, freq_hz):
    """The synthetic truth: counts = zero + k*Eeff^2/(1 + Eeff/knee), Eeff = E*gain (float counts)."""
    g = 10 ** ((SENS_DB + _response_db(freq_hz)) / 20)
    e_eff = np.asarray(e_axes, dtype=float) * g
    return ZERO + K_COUNTS * e_eff**2 / (1 + e_eff / KNEE)


def synthetic_cert(**changes) -> ProbeCertificate:
    """A certificate made from the known law: 40 points 0.05..400 V/m at REF_HZ, corrections = -response."""
    fields = np.geomspace(0.05, 400, 40)
    axes = []
    for a, name in enumerate("xyz"):
        e_axes = np.zeros((40, 3))
        e_axes[:, a] = fields
        counts = true_counts(e_axes, REF_HZ)[:, a] - ZERO[a]
        corr = -(RESP_DB[a] - np.interp(np.log10(REF_HZ), np.log10(TABLE_F), RESP_DB[a]))
        axes.append(AxisCalibration(name, float(ZERO[a]), tuple(counts), tuple(fields), tuple(TABLE_F), tuple(corr)))
    us = (Component("reference_field", 0.8, "dB", "normal", 2.0), Component("linearity", 0.2, "dB", "rectangular"),
          Component("frequency_response", 0.5, "dB", "normal", 2.0))
    cert = ProbeCertificate("SYN-1", "0001", "Synthetic lab", "SYN-CERT-1", dt.date(2026, 6, 15),
                            dt.date(2027, 6, 15), "E", REF_HZ, (1e8, 6e9), (0.1, 300.0), 23.0, 0.0, 0.0, 0.3,
                            tuple(axes), us)
    return dataclasses.replace(cert, **changes)


def _random_fields(rng, n, lo=0.2, hi=150.0):
    mag = np.geomspace(lo, hi, n)
    d = rng.normal(size=(n, 3))
    return mag[:, None] * np.abs(d) / np.linalg.norm(d, axis=1)[:, None]


@pytest.mark.parametrize("freq_hz", [REF_HZ, 1e8, 433e6, 2.45e9, 6e9])
def test_synthetic_truth_recovered(freq_hz):
    rng = np.random.default_rng(7)
    e_axes = _random_fields(rng, 200)
    counts = np.array([true_counts(e, freq_hz) for e in e_axes])
    r = calibrate_axes(synthetic_cert(), counts, freq_hz, today=TODAY)
    inside = r.axis_flags == 0                  # components below the table are clamped (tested below)
    assert inside.mean() > 0.9
    np.testing.assert_allclose(r.axes_v_per_m[inside], e_axes[inside], rtol=2e-3)
    clamp = 0.05 * 10 ** (frequency_correction_db(synthetic_cert(), freq_hz)[0] / 20)
    np.testing.assert_allclose(r.axes_v_per_m, np.where(inside, r.axes_v_per_m, clamp[None, :]))
    total = np.linalg.norm(e_axes, axis=1)
    ok = np.all(inside, axis=1)                 # rows clear of the below-range clamp of tiny components
    assert np.max(np.abs(20 * np.log10(r.e_v_per_m[ok] / total[ok]))) < 0.01
    np.testing.assert_allclose(r.h_a_per_m, r.e_v_per_m / units.Z0_OHM)
    np.testing.assert_allclose(r.s_w_per_m2, r.e_v_per_m**2 / units.Z0_OHM)
    assert not np.any(r.flags & (FREQ_OUT | ABOVE_RANGE | EXPIRED))


def test_integer_counts_and_uncalibrated_is_visibly_wrong():
    e_axes = np.array([[0.0, 0.0, 60.0], [20.0, 5.0, 1.0], [0.3, 0.3, 0.3]])
    counts = np.rint([true_counts(e, 2.45e9) for e in e_axes]).astype(np.int64)
    good = calibrate_axes(synthetic_cert(), counts, 2.45e9, today=TODAY)
    naive = calibrate_axes(identity_certificate(), counts, 2.45e9, today=TODAY)
    truth = np.linalg.norm(e_axes, axis=1)
    err_good = np.abs(20 * np.log10(good.e_v_per_m / truth))
    err_naive = np.abs(20 * np.log10(naive.e_v_per_m / truth))
    assert np.all(err_good < 0.05)
    assert np.all(err_naive > 1.0)            # knee compression, offsets, gains: > 1 dB off


def test_apply_invert_round_trip():
    cert = synthetic_cert()
    fields = np.geomspace(0.05, 400, 301)
    for ax in cert.axes:
        counts = expected_counts(ax, fields)
        back, flags = linearise(ax, counts)
        np.testing.assert_allclose(back, fields, rtol=1e-10)
        assert not np.any(flags)
        # and the inverse reproduces the table points exactly
        np.testing.assert_allclose(expected_counts(ax, ax.field), np.add(ax.counts_above_zero, ax.zero_counts),
                                   rtol=1e-10)
    with pytest.raises(ValueError):
        expected_counts(cert.axes[0], [1000.0])


def test_zero_and_below_range_and_above_range():
    cert = synthetic_cert()
    ax = cert.axes[0]
    counts = np.array([ax.zero_counts - 5, ax.zero_counts, ax.zero_counts + 0.5 * ax.counts_above_zero[0],
                       ax.zero_counts + 10 * ax.counts_above_zero[-1]])
    e, flags = linearise(ax, counts)
    assert e[0] == 0 and e[1] == 0 and flags[0] & BELOW_RANGE and flags[1] & BELOW_RANGE
    assert e[2] == pytest.approx(ax.field[0], rel=1e-14) and flags[2] & BELOW_RANGE  # clamped to the lowest calibrated field
    assert np.isnan(e[3]) and flags[3] & ABOVE_RANGE             # never an understated clamp above
    three = np.array([[ZERO[0], ZERO[1], ZERO[2]], [ZERO[0] + 1e9, ZERO[1], ZERO[2]],
                      true_counts([0.03, 0.03, 0.03], REF_HZ), true_counts([5.0, 0.03, 0.03], REF_HZ)])
    cert = dataclasses.replace(cert, level_range=(0.05, 300.0))     # valid from the table's first point
    r = calibrate_axes(cert, three, REF_HZ, today=TODAY)
    assert r.flags[2] & BELOW_RANGE and r.e_v_per_m[2] > cert.level_range[0]   # every axis only a bound
    assert not r.flags[3] & BELOW_RANGE and r.e_v_per_m[3] == pytest.approx(5.0, rel=1e-3)
    assert r.e_v_per_m[0] == 0 and r.flags[0] & BELOW_RANGE
    assert np.isnan(r.e_v_per_m[1]) and r.flags[1] & ABOVE_RANGE
    assert "above range" in flag_names(r.flags[1])


def test_frequency_out_of_range_is_clamped_and_flagged():
    cert = synthetic_cert()
    counts = true_counts([5.0, 0, 0], 6e9)[None, :]
    r_edge = calibrate_axes(cert, counts, 6e9, today=TODAY)
    r_out = calibrate_axes(cert, counts, 9e9, today=TODAY)
    assert not r_edge.flags[0] & FREQ_OUT and r_out.flags[0] & FREQ_OUT
    np.testing.assert_allclose(r_out.e_v_per_m, r_edge.e_v_per_m)   # clamped to the table edge


def test_expired_certificate_warns_on_every_result():
    counts = np.array([true_counts([5.0, 1, 1], REF_HZ)] * 4)
    r = calibrate_axes(synthetic_cert(), counts, REF_HZ, today=dt.date(2027, 7, 1))
    assert np.all(r.flags & EXPIRED) and any("expired" in w for w in r.warnings)
    ok = calibrate_axes(synthetic_cert(), counts, REF_HZ, today=TODAY)
    assert not np.any(ok.flags & EXPIRED) and ok.warnings == ()


def test_near_field_gives_no_plane_wave_h_or_s():
    counts = np.array([true_counts([5.0, 1, 1], REF_HZ)] * 3)
    r = calibrate_axes(synthetic_cert(), counts, REF_HZ, near_field=np.array([True, False, True]), today=TODAY)
    assert np.isnan(r.s_w_per_m2[[0, 2]]).all() and np.isnan(r.h_a_per_m[[0, 2]]).all()
    assert np.isfinite(r.s_w_per_m2[1]) and np.all(np.isfinite(r.e_v_per_m))
    assert list(r.flags & NEAR_FIELD) == [NEAR_FIELD, 0, NEAR_FIELD]


def test_unknown_frequency_takes_largest_reading_and_widens_u():
    cert = synthetic_cert()
    counts = np.array([true_counts([5.0, 5.0, 5.0], REF_HZ)])
    known = calibrate_axes(cert, counts, REF_HZ, temp_c=23.0, today=TODAY)
    band = calibrate_axes(cert, counts, (4e8, 3e9), temp_c=23.0, today=TODAY)
    unknown = calibrate_axes(cert, counts, None, temp_c=23.0, today=TODAY)
    corr, flags = frequency_correction_db(cert, None)
    grid = np.union1d(np.geomspace(1e8, 6e9, 500), TABLE_F)
    brute = np.max([[np.interp(np.log10(f), np.log10(ax.freq_hz), ax.correction_db) for ax in cert.axes]
                    for f in grid], axis=0)
    np.testing.assert_allclose(corr, brute, atol=1e-9)   # table points are in the grid: exact maximum
    assert flags & FREQ_ASSUMED and unknown.flags[0] & FREQ_ASSUMED and band.flags[0] & FREQ_ASSUMED
    assert unknown.e_v_per_m[0] >= band.e_v_per_m[0] >= known.e_v_per_m[0] * 0.999
    assert unknown.u_expanded_db[0] > band.u_expanded_db[0] > known.u_expanded_db[0]


def test_temperature_correction():
    cert = synthetic_cert(temp_coeff_db_per_c=0.02)
    counts = np.array([true_counts([5.0, 0, 0], REF_HZ)])
    warm = calibrate_axes(cert, counts, REF_HZ, temp_c=33.0, today=TODAY)
    ref = calibrate_axes(cert, counts, REF_HZ, temp_c=23.0, today=TODAY)
    assert 20 * np.log10(warm.e_v_per_m[0] / ref.e_v_per_m[0]) == pytest.approx(-0.2, abs=1e-9)


def test_below_range_meets_the_first_point_exactly():
    # hypothesis found this: a clamp to field[0] stepped 8.9e-16 below exp(log(field[0])) at the first point
    ax = AxisCalibration("x", 0.0, (1.0, 2.0), (5.0, 6.0), (1e8, 1e9), (0.0, 0.0))
    e, _ = linearise(ax, np.array([0.5, 1.0]))
    assert e[0] == e[1]


@settings(max_examples=50, deadline=None)
@given(st.lists(st.floats(1.0, 1e8), min_size=2, max_size=12, unique=True),
       st.lists(st.floats(0.01, 1e3), min_size=12, max_size=12, unique=True),
       st.lists(st.floats(0.0, 2e8), min_size=2, max_size=200))
def test_linearisation_is_monotone(counts_pts, field_pts, queries):
    n = len(counts_pts)
    ax = AxisCalibration("x", 0.0, tuple(sorted(counts_pts)), tuple(sorted(field_pts)[:n]), (1e8, 1e9), (0.0, 0.0))
    q = np.sort(np.asarray(queries))
    e, _ = linearise(ax, q)
    finite = np.isfinite(e)
    assert np.all(np.diff(e[finite]) >= 0)
    assert np.all(~finite == (q > ax.counts_above_zero[-1]))


# --- dipole + receiver -----------------------------------------------------------------------------

def _dipole(**changes):
    f = np.geomspace(30e6, 1e9, 9)
    # AF of a half-wave dipole (2.15 dBi) into 50 ohm: 20log10(f_MHz) - 29.77 - 2.15 (see test_units.py)
    af = 20 * np.log10(f / 1e6) - 29.77 - 2.15
    us = (Component("antenna_factor", 1.0, "dB", "normal", 2.0), Component("cable_loss", 0.1, "dB", "normal", 2.0),
          Component("receiver_level", 0.6, "dB", "rectangular"))
    cert = DipoleCertificate("DIP-1", "7", "RX-1", "8", "Synthetic lab", "SYN-D-1", dt.date(2026, 6, 15),
                             dt.date(2027, 6, 15), (30e6, 1e9), (0.0, 120.0), tuple(f), tuple(af),
                             (30e6, 1e9), (0.5, 3.0), 0.4, us)
    return dataclasses.replace(cert, **changes)


def test_spectrum_equation_and_published_af():
    cert = _dipole()
    f = np.array([30e6, 100e6, 300e6, 1e9])
    r = calibrate_spectrum(cert, f, np.array([40.0, 40.0, 40.0, 40.0]), "x", today=TODAY)
    cable = np.interp(np.log10(f), np.log10([30e6, 1e9]), [0.5, 3.0])
    expect = 40.0 + (20 * np.log10(f / 1e6) - 31.92) + cable + 0.4
    np.testing.assert_allclose(r.e_dbuv_per_m, expect, atol=1e-9)
    np.testing.assert_allclose(r.e_v_per_m, 10 ** ((expect - 120) / 20))
    assert not np.any(r.flags) and np.all(r.u_expanded_db > 0)


def test_orientations_sum_in_power_and_flags():
    cert = _dipole()
    f = np.array([100e6, 200e6, 2e9])
    rs = [calibrate_spectrum(cert, f, np.array(v), o, today=TODAY)
          for o, v in (("x", [50.0, 60.0, 50.0]), ("y", [50.0, np.nan, 50.0]), ("z", [50.0, 200.0, 50.0]))]
    tot = combine_orientations(rs)
    assert tot.orientation == "xyz"
    np.testing.assert_allclose(tot.e_v_per_m[0], rs[0].e_v_per_m[0] * np.sqrt(3))
    assert tot.e_dbuv_per_m[0] == pytest.approx(rs[0].e_dbuv_per_m[0] + 10 * np.log10(3))
    assert rs[1].flags[1] & BELOW_RANGE and np.isnan(rs[2].e_v_per_m[1]) and rs[2].flags[1] & ABOVE_RANGE
    assert np.isnan(tot.e_v_per_m[1]) and tot.flags[1] & ABOVE_RANGE
    assert tot.flags[2] & FREQ_OUT and not tot.flags[0] & FREQ_OUT


def test_spectrum_near_field_and_expired():
    r = calibrate_spectrum(_dipole(), [100e6], [50.0], "y", near_field=True, today=dt.date(2028, 1, 1))
    assert np.isnan(r.s_w_per_m2[0]) and np.isfinite(r.e_v_per_m[0])
    assert r.flags[0] & NEAR_FIELD and r.flags[0] & EXPIRED and "expired" in r.warnings[0]


# --- the demo certificates against the simulated instruments they were derived from ---------------

def _demo_models():
    import tomllib
    from importlib import resources

    from meterlink.simulators import instruments as sim
    sc = tomllib.loads(resources.files("meterlink.simulators.scenarios").joinpath("demo.toml").read_text(encoding="utf-8"))
    return sim, sim.ProbeModel.from_dict(sc["probe"]), sim.ReceiverModel.from_dict(sc["receiver"])


def test_demo_probe_certificate_recovers_simulated_fields_within_u():
    from meterlink.physics.certificate import load_certificate
    sim, probe, _ = _demo_models()
    cert = load_certificate("demo-probe")
    rng = np.random.default_rng(11)
    errs, us, naive = [], [], []
    for _ in range(120):
        f = float(np.exp(rng.uniform(np.log(40e6), np.log(5.5e9))))
        d = np.abs(rng.normal(size=3))
        e = float(np.exp(rng.uniform(np.log(0.5), np.log(15.0)))) * d / np.linalg.norm(d)
        temp = float(rng.uniform(10, 35))
        counts, over = sim.probe_counts(probe, e[None, :], [f], temp, rng, n_average=4)
        assert not over.any()
        r = calibrate_axes(cert, counts[None, :], f, temp_c=temp, today=TODAY)
        assert r.flags[0] == 0
        errs.append(20 * np.log10(r.e_v_per_m[0] / np.linalg.norm(e)))
        us.append(r.u_expanded_db[0])
        raw = calibrate_axes(identity_certificate(counts_per_v2m2=probe.counts_per_v2m2), counts[None, :], f)
        naive.append(20 * np.log10(raw.e_v_per_m[0] / np.linalg.norm(e)))
    errs, us = np.abs(errs), np.array(us)
    assert np.mean(errs <= us) >= 0.95 and np.all(errs <= 1.5 * us)
    assert np.median(errs) < 0.4 and np.median(np.abs(naive)) > 2 * np.median(errs)


def test_demo_dipole_certificate_recovers_simulated_fields_within_u():
    from meterlink.physics.certificate import load_certificate
    sim, _, rx = _demo_models()
    cert = load_certificate("demo-dipole")
    rng = np.random.default_rng(12)
    f = np.geomspace(40e6, 5.5e9, 25)
    e_xyz = np.abs(rng.normal(size=(25, 3))) * 0.05           # V/m per orientation, incoherent
    rs = [calibrate_spectrum(cert, f, sim.receiver_levels_dbuv(rx, e_xyz[:, i], f, rng), o, today=TODAY)
          for i, o in enumerate("xyz")]
    tot = combine_orientations(rs)
    err = np.abs(20 * np.log10(tot.e_v_per_m / np.linalg.norm(e_xyz, axis=1)))
    assert not np.any(tot.flags & (FREQ_OUT | ABOVE_RANGE))
    ok = ~(tot.flags & BELOW_RANGE).astype(bool)
    assert ok.mean() > 0.9 and np.all(err[ok] <= tot.u_expanded_db[ok])


def test_h_probe_gives_h_and_plane_wave_equivalent_e():
    # quantity H: the tables hold A/m; E = Z0*H and S = Z0*H^2 (plane wave, CODATA Z0)
    cert = dataclasses.replace(identity_certificate(level_range_v_per_m=(0.001, 1.0)), quantity="H")
    counts = np.array([[1000 * 0.05**2, 0, 0], [1000 * 0.05**2, 0, 0]])
    r = calibrate_axes(cert, counts, 1e9, near_field=[False, True], today=TODAY)
    assert r.h_a_per_m == pytest.approx([0.05, 0.05])
    assert r.e_v_per_m[0] == pytest.approx(0.05 * units.Z0_OHM) and np.isnan(r.e_v_per_m[1])
    assert r.s_w_per_m2[0] == pytest.approx(units.Z0_OHM * 0.05**2) and np.isnan(r.s_w_per_m2[1])
    assert np.isnan(r.axes_v_per_m[1]).all()
