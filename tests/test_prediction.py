"""Predicted fields (meterlink.physics.prediction and prediction_compliance) against published
sources and hand-worked physics, each named beside its check.

Sources used and how far each was read:
- scipy.constants (mu_0, epsilon_0, CODATA): Z0 = sqrt(mu_0/epsilon_0) for E = sqrt(Z0*S).
- 47 CFR 1.1310 Table 1 (B), general population: 300-1500 MHz S = f/1500 mW/cm2, 1.5-100 GHz
  S = 1.0 mW/cm2 (as packaged in fcc-1310.toml, checked there against the e-CFR text).
- FCC OET Bulletin 65, Edition 97-01: the far-field equation S = P*G/(4*pi*R^2), the ground
  reflection factor 1.6 in field (1.6^2 = 2.56 in power density) and the cylindrical model for
  collinear arrays are the forms that bulletin uses; its worked examples could not be read (only
  an unreadable word-processor copy was stored; equations (5)-(7) as quoted elsewhere and a
  published distance table are checked in tests/test_prediction_published.py). The expected
  numbers below are hand-worked from the formulas (arithmetic shown), not values read in the
  bulletin.
- ITU-T K.52 Annex B: the three installation categories. Its EIRP threshold tables (Appendix III)
  were not read in a primary text; the K.52 tests check the decision logic on declared thresholds,
  not K.52's numbers.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from scipy import constants

from meterlink.physics.exposure import multi_frequency
from meterlink.physics.prediction import (
    OET65_GROUND_FACTOR,
    Pattern,
    PredictionError,
    Source,
    cylindrical_s,
    far_field_s,
    field_from_s,
    predict_points,
    relative_gain_db,
    source_s,
    transition_distance_m,
)
from meterlink.physics.prediction_compliance import (
    K52_INHERENT,
    K52_NORMAL,
    K52_PROVISIONAL,
    compliance_distance,
    exposure_grid,
    k52_class,
    max_eirp_w,
    predict_exposure,
)


def test_e_from_s_uses_z0_from_scipy_constants():
    # scipy.constants: Z0 = sqrt(mu_0/epsilon_0) = 376.730... ohm; E = sqrt(Z0*S).
    z0 = math.sqrt(constants.mu_0 / constants.epsilon_0)
    assert 376.73 < z0 < 376.731
    assert field_from_s(1.0) == pytest.approx(math.sqrt(z0), rel=1e-12)
    # hand-worked: S = 10 W/m^2 gives E = sqrt(3767.30) = 61.378 V/m
    assert field_from_s(10.0) == pytest.approx(61.378, abs=1e-3)


def test_far_field_power_density_hand_worked():
    # S = P*G/(4*pi*r^2): 100 W, G = 10 (10 dBi), r = 10 m -> 1000/1256.637 = 0.795775 W/m^2
    assert far_field_s(100.0, 10.0, 10.0) == pytest.approx(0.795775, rel=1e-6)
    # with the ground-reflection factor (1.6 in field, 1.6^2 = 2.56 in power; OET 65's form):
    assert OET65_GROUND_FACTOR == pytest.approx(2.56, rel=1e-12)
    assert far_field_s(100.0, 10.0, 10.0, ground_factor=2.56) == pytest.approx(2.037183, rel=1e-6)
    # the same through a Source at a point on its boresight (isotropic pattern)
    src = Source("s", 100.0, 10.0, 900e6, 0.0, 0.0, 10.0)
    assert source_s(src, 10.0, 0.0, 10.0) == pytest.approx(0.795775, rel=1e-6)


@given(st.floats(1.0, 1e3), st.floats(0.5, 500.0), st.floats(1.1, 10.0))
def test_inverse_square_law(p_w, r_m, k):
    # hand-worked physics: S(k*r) = S(r)/k^2 in the far field
    assert far_field_s(p_w, 1.0, k * r_m) == pytest.approx(far_field_s(p_w, 1.0, r_m) / k ** 2, rel=1e-12)


def test_cylindrical_model_hand_worked():
    # S = P*(360/bw)/(2*pi*R*L): 100 W, L = 4 m, R = 2 m, omni -> 100/50.2655 = 1.989437 W/m^2
    assert cylindrical_s(100.0, 2.0, 4.0) == pytest.approx(1.989437, rel=1e-6)
    # a 120 degree sector concentrates the same power into a third of the circle: x3
    assert cylindrical_s(100.0, 2.0, 4.0, 120.0) == pytest.approx(5.968310, rel=1e-6)
    # transition where the two models meet: R = G*L*bw/720 = 8*4*360/720 = 16 m, both 0.248680 W/m^2
    assert transition_distance_m(8.0, 4.0) == pytest.approx(16.0)
    assert far_field_s(100.0, 8.0, 16.0) == pytest.approx(0.248680, rel=1e-5)
    assert cylindrical_s(100.0, 16.0, 4.0) == pytest.approx(0.248680, rel=1e-5)


def test_cylindrical_model_used_only_near_the_array_and_within_its_height():
    g_dbi = 10 * math.log10(8.0)
    src = Source("collinear", 100.0, g_dbi, 150e6, 0.0, 0.0, 10.0, array_length_m=4.0)
    pp = predict_points(src, np.array([2.0, 2.0, 20.0]), 0.0, np.array([10.0, 13.0, 10.0]))
    # 2 m out at mid-height: cylindrical, 1.989437 W/m^2 (hand-worked above)
    assert pp.cylindrical.tolist() == [True, False, False]
    assert pp.s_w_per_m2[0] == pytest.approx(1.989437, rel=1e-6)
    # 3 m above the centre (outside the 4 m array's extent): far field at r = sqrt(13) m
    assert pp.s_w_per_m2[1] == pytest.approx(800.0 / (4 * math.pi * 13.0), rel=1e-9)
    # beyond the 16 m transition: far field 800/(4*pi*400) = 0.159155 W/m^2
    assert pp.s_w_per_m2[2] == pytest.approx(0.159155, rel=1e-5)


def test_pattern_is_3_db_down_at_half_the_beamwidth_and_floored():
    # the parabolic pattern's definition: 12*(angle/beamwidth)^2 dB is 3 dB at half the beamwidth
    p = Pattern(h_beamwidth_deg=65.0, v_beamwidth_deg=7.0, front_to_back_db=25.0, side_lobe_db=20.0)
    assert relative_gain_db(p, 32.5, 0.0) == pytest.approx(-3.0)
    assert relative_gain_db(p, 0.0, -3.5) == pytest.approx(-3.0)
    assert relative_gain_db(p, 180.0, 0.0) == pytest.approx(-25.0)
    assert relative_gain_db(p, 0.0, -60.0) == pytest.approx(-20.0)
    # 2 degrees of electrical downtilt: the beam's axis is 2 degrees below the horizon
    tilted = Pattern(65.0, 7.0, electrical_tilt_deg=2.0)
    assert relative_gain_db(tilted, 0.0, -2.0) == pytest.approx(0.0)
    # mechanical tilt tips the back lobe up: behind the antenna the axis is 2 degrees above
    mech = Pattern(65.0, 7.0, mechanical_tilt_deg=2.0)
    assert relative_gain_db(mech, 180.0, 2.0) == pytest.approx(-25.0)   # floored by front-to-back
    assert relative_gain_db(mech, 0.0, -2.0) == pytest.approx(0.0)


def test_pattern_reduces_density_off_boresight():
    src = Source("sector", 100.0, 10.0, 900e6, 0.0, 0.0, 10.0, azimuth_deg=90.0, pattern=Pattern(65.0))
    on = source_s(src, 10.0, 0.0, 10.0)          # due east: boresight
    half = source_s(src, 10 * math.cos(math.radians(32.5)), 10 * math.sin(math.radians(32.5)), 10.0)
    assert half == pytest.approx(on * 10 ** (-0.3), rel=1e-9)


# ------------------------------------------------------------------ compliance distance, EIRP


def test_compliance_distance_fcc_public_900_mhz_hand_worked():
    # 47 CFR 1.1310 Table 1 (B): 300-1500 MHz, S = f/1500 mW/cm2 = 900/1500 = 0.6 mW/cm2 = 6 W/m^2.
    # EIRP 1000 W (30 dBi into 1 W): r = sqrt(F*EIRP/(4*pi*S)) = sqrt(1000/75.398) = 3.641828 m,
    # with F = 2.56: sqrt(2560/75.398) = 5.826925 m.
    src = Source("s", 1.0, 30.0, 900e6, height_m=10.0)
    cd = compliance_distance(src, standard="fcc-1310", tier="public")
    assert cd.s_target_w_per_m2 == pytest.approx(6.0, rel=1e-9)
    assert cd.distance_m == pytest.approx(3.641828, rel=1e-6)
    cd_g = compliance_distance(src, standard="fcc-1310", tier="public", ground_factor=2.56)
    assert cd_g.distance_m == pytest.approx(5.826925, rel=1e-6)
    assert cd_g.level_status.startswith("checked against 47 CFR 1.1310 Table 1 (B)")
    # at 50 % of the level the distance grows by sqrt(2) (1/r^2 law)
    half = compliance_distance(src, standard="fcc-1310", tier="public", target_ratio=0.5)
    assert half.distance_m == pytest.approx(3.641828 * math.sqrt(2), rel=1e-6)


def test_max_eirp_hand_worked_and_round_trip():
    # 47 CFR 1.1310 Table 1 (B), 1.5-100 GHz: S = 1.0 mW/cm2 = 10 W/m^2.
    # EIRP = 4*pi*d^2*S/F = 4*pi*100*10 = 12566.37 W at 10 m without ground reflection
    assert max_eirp_w(10.0, 2.4e9, standard="fcc-1310", tier="public") == pytest.approx(12566.37, rel=1e-6)
    assert max_eirp_w(10.0, 2.4e9, standard="fcc-1310", tier="public", ground_factor=2.56) == pytest.approx(
        12566.37 / 2.56, rel=1e-6)
    # round trip: a source with exactly that EIRP has its compliance distance at 10 m
    for std, tier, f in (("fcc-1310", "public", 2.4e9), ("fcc-1310", "occupational", 900e6),
                         ("icnirp-2020", "public", 1.8e9), ("icnirp-1998", "occupational", 450e6)):
        eirp = max_eirp_w(10.0, f, standard=std, tier=tier, ground_factor=2.56)
        src = Source("s", eirp, 0.0, f)
        assert compliance_distance(src, standard=std, tier=tier, ground_factor=2.56).distance_m == pytest.approx(
            10.0, rel=1e-9)


def test_cylindrical_compliance_distance_inside_transition():
    # FCC Table 1 (A) occupational, 30-300 MHz: E 61.4 V/m, H 0.163 A/m; the packaged rule sums
    # (E/E_L)^2 and (H/H_L)^2, so the governing S is min(61.4^2/Z0, Z0*0.163^2) = 10.00705 W/m^2.
    # Omni collinear, 100 W, G = 8, L = 4 m: transition 16 m; cylindrical r = P/(2*pi*L*S)
    # = 100/(2*pi*4*10.00705) = 0.397607 m.
    z0 = math.sqrt(constants.mu_0 / constants.epsilon_0)
    s_t = min(61.4 ** 2 / z0, z0 * 0.163 ** 2)
    src = Source("c", 100.0, 10 * math.log10(8.0), 150e6, height_m=10.0, array_length_m=4.0)
    cd = compliance_distance(src, standard="fcc-1310", tier="occupational")
    assert cd.model.startswith("cylindrical")
    assert cd.s_target_w_per_m2 == pytest.approx(s_t, rel=1e-9)
    assert cd.distance_m == pytest.approx(100.0 / (2 * math.pi * 4.0 * s_t), rel=1e-9)
    assert cd.distance_m == pytest.approx(0.397607, rel=1e-5)


# ------------------------------------------------------------------ sums over sources


def test_two_sources_at_half_their_limits_sum_to_one():
    # 47 CFR 1.1310 Table 1 (B): 6 W/m^2 at 900 MHz, 10 W/m^2 at 2.4 GHz. Each source gives half its
    # limit at the point: EIRP = S*4*pi*r^2 with r = 10 m -> 3769.911 W and 6283.185 W. The fractions
    # of the limits add (the FCC summation rule as packaged; that clause is marked not yet checked).
    a = Source("a", 3769.911, 0.0, 900e6, 0.0, 0.0, 0.0)
    b = Source("b", 6283.185, 0.0, 2.4e9, 20.0, 0.0, 0.0)
    pred = predict_exposure([a, b], 10.0, 0.0, 0.0, standard="fcc-1310", tier="public", keep_sources=True)
    assert float(pred.total) == pytest.approx(1.0, rel=1e-6)
    assert pred.per_source.ravel().tolist() == pytest.approx([0.5, 0.5], rel=1e-6)
    # cross-check with the measurement-side sum (meterlink.physics.exposure) fed the same S values
    mf = multi_frequency([900e6, 2.4e9], standard="fcc-1310", tier="public", s_w_per_m2=[3.0, 5.0])
    assert float(pred.total) == pytest.approx(mf.total, rel=1e-6)


def test_grid_equals_pointwise_and_hand_value():
    srcs = [Source("a", 50.0, 15.0, 900e6, 0.0, 0.0, 5.0, 45.0, Pattern(65.0, 10.0, 3.0, 2.0)),
            Source("b", 20.0, 8.0, 2.1e9, 12.0, -3.0, 4.0, 200.0, Pattern(90.0, None)),
            Source("c", 25.0, 6.0, 156.8e6, -6.0, 4.0, 6.0, array_length_m=3.0),
            Source("d", 30.0, 8.0, 450e6, 10.0, 10.0, 2.0, array_length_m=3.0),   # grid height: cylindrical
            Source("e", 40.0, 12.0, 1.8e9, -10.0, -10.0, 1.0, 90.0, Pattern(65.0, None), array_length_m=2.0)]
    g = exposure_grid(srcs, standard="fcc-1310", tier="public", half_width_m=20.0, step_m=0.5, z_m=1.5)
    assert g.percent.shape == (81, 81)
    rng = np.random.default_rng(7)
    for iy, ix in zip(rng.integers(0, 81, 12), rng.integers(0, 81, 12)):
        p = predict_exposure(srcs, g.x_m[ix], g.y_m[iy], 1.5, standard="fcc-1310", tier="public")
        assert g.percent[iy, ix] == pytest.approx(100 * float(p.total), rel=1e-12)
    # every point, by the pointwise path on the whole mesh at once: among them the point straight
    # below the tilted sector "a" (no horizontal distance) and the collinear "c"'s cylindrical zone
    full = predict_exposure(srcs, g.x_m[None, :], g.y_m[:, None], 1.5, standard="fcc-1310", tier="public")
    assert np.allclose(g.percent, 100 * full.total, rtol=1e-12, atol=0)
    n_cyl = np.count_nonzero(full.cylindrical)
    assert n_cyl > 0 and g.cylindrical_fraction == pytest.approx(n_cyl / g.percent.size)
    # a single isotropic source: percent at 10 m horizontally, same height, by hand:
    # S = 1000/(4*pi*100) = 0.795775 W/m^2 against 6 W/m^2 (FCC Table 1 (B), 900 MHz) = 13.2629 %
    one = [Source("iso", 1000.0, 0.0, 900e6, 0.0, 0.0, 1.5)]
    g1 = exposure_grid(one, standard="fcc-1310", tier="public", half_width_m=10.0, step_m=10.0, z_m=1.5)
    assert g1.percent[1, 2] == pytest.approx(13.2629, rel=1e-5)


def test_below_30_mhz_says_plane_wave_equivalent():
    src = Source("hf", 100.0, 2.0, 7.1e6, height_m=10.0)
    pred = predict_exposure([src], 20.0, 0.0, 1.5, standard="fcc-1310", tier="public")
    assert any("below 30 MHz" in m for m in pred.messages)


# ------------------------------------------------------------------ K.52 categories


def test_k52_categories_from_declared_numbers():
    # ITU-T K.52 Annex B names the categories; the decision here rests on the declared threshold and
    # access distance (K.52's EIRPth table values were not read in a primary text, see module doc).
    small = Source("small", 0.5, 2.0, 2.4e9, height_m=3.0)
    k = k52_class(small, standard="fcc-1310", inherent_eirp_w=2.0)
    assert k.category == K52_INHERENT
    high = Source("high", 20.0, 15.0, 900e6, height_m=30.0)
    # FCC public 6 W/m^2: r = sqrt(632.46/75.398) = 2.896 m < 28 m (height less 2 m): normally compliant
    k = k52_class(high, standard="fcc-1310")
    assert k.category == K52_NORMAL and k.public_access_m == pytest.approx(28.0)
    assert k.public_distance_m == pytest.approx(2.896, abs=1e-3)
    # a rooftop where the public can come within 2 m: provisionally compliant
    k = k52_class(high, standard="fcc-1310", public_access_m=2.0)
    assert k.category == K52_PROVISIONAL and "access" in k.reason
    assert k.occupational_distance_m < k.public_distance_m


# ------------------------------------------------------------------ bad input


@pytest.mark.parametrize("kw", [dict(power_w=-1.0), dict(power_w=float("nan")), dict(freq_hz=0.0),
                                dict(gain_dbi=120.0), dict(array_length_m=0.0),
                                dict(pattern=Pattern(h_beamwidth_deg=0.0)),
                                dict(pattern=Pattern(v_beamwidth_deg=200.0))])
def test_bad_sources_are_refused_with_their_name(kw):
    base = dict(name="tx 1", power_w=10.0, gain_dbi=10.0, freq_hz=900e6, height_m=10.0)
    with pytest.raises(PredictionError, match="tx 1"):
        predict_points(Source(**(base | kw)), 1.0, 1.0, 1.0)


def test_uncovered_frequency_and_bad_requests():
    with pytest.raises(PredictionError):
        compliance_distance(Source("x", 1.0, 0.0, 200e9), standard="fcc-1310", tier="public")
    with pytest.raises(PredictionError):
        max_eirp_w(-1.0, 900e6, standard="fcc-1310", tier="public")
    with pytest.raises(PredictionError):
        predict_exposure([], 0.0, 0.0, 0.0, standard="fcc-1310", tier="public")
    with pytest.raises(PredictionError):
        exposure_grid([Source("a", 1.0, 0.0, 900e6)], standard="fcc-1310", tier="public",
                      half_width_m=100.0, step_m=0.01)


def test_grid_pattern_path_matches_the_pattern_definition():
    # the grid path evaluates relative_gain_db's model from turned coordinates (no angle wrapping);
    # at random points both must give the same density: S = F*EIRP/(4*pi*r^2) * 10^(G_rel/10)
    rng = np.random.default_rng(3)
    pat = Pattern(65.0, 8.0, electrical_tilt_deg=3.0, mechanical_tilt_deg=4.0)
    src = Source("s", 40.0, 17.0, 1.8e9, 5.0, -2.0, 25.0, azimuth_deg=300.0, pattern=pat)
    x, y, z = rng.uniform(-80, 80, 200), rng.uniform(-80, 80, 200), rng.uniform(0, 40, 200)
    dx, dy, dz = x - 5.0, y + 2.0, z - 25.0
    az = np.degrees(np.arctan2(dx, dy)) - 300.0
    el = np.degrees(np.arctan2(dz, np.hypot(dx, dy)))
    want = 2.56 * src.eirp_w / (4 * np.pi * (dx * dx + dy * dy + dz * dz)) * 10 ** (relative_gain_db(pat, az, el) / 10)
    assert source_s(src, x, y, z, ground_factor=2.56) == pytest.approx(want, rel=1e-9)


def test_far_field_distance_and_near_flag():
    from meterlink.physics.prediction import far_field_distance_m

    # lambda = c/f = 299792458/156.8e6 = 1.911942 m (c exact, scipy.constants); 2*L^2/lambda for
    # L = 3 m: 18/1.911942 = 9.414504 m (the usual 2*D^2/lambda criterion, common practice)
    src = Source("c", 25.0, 6.0, 156.8e6, height_m=5.0, array_length_m=3.0)
    assert far_field_distance_m(src) == pytest.approx(9.414504, rel=1e-6)
    assert far_field_distance_m(Source("d", 1.0, 0.0, 156.8e6)) == pytest.approx(1.911942, rel=1e-6)
    pp = predict_points(src, np.array([5.0, 20.0]), 0.0, 5.0)
    assert pp.near.tolist() == [True, False]
