"""Spatial schemes, the power-domain spatial average and point assessment (pure functions)."""

import math

import pytest
from hypothesis import given, strategies as st

from meterlink.errors import MeterlinkError
from meterlink.survey.assess import assess, broadband_reference, source_factor
from meterlink.survey.model import FollowUp, Point, Sample, Site, Source, SurveyPlan
from meterlink.survey.spatial import custom, scheme_from, spatial_average, three_heights, vertical_line


def test_spatial_average_is_power_domain_hand_worked():
    # Hand-worked: 2, 4 and 6 V/m -> sqrt((4 + 16 + 36) / 3) = sqrt(56/3) = 4.3205 V/m, not the field mean 4.0.
    # Power-domain spatial averaging as in ECC Recommendation (02)04 (three heights; from memory).
    assert spatial_average([2.0, 4.0, 6.0]) == pytest.approx(math.sqrt(56 / 3), rel=1e-12)
    assert spatial_average([2.0, 4.0, 6.0]) == pytest.approx(4.3205, abs=5e-5)
    assert spatial_average([2.0, 4.0, 6.0]) != pytest.approx(4.0, abs=0.1)


@given(st.lists(st.floats(0.0, 1e3), min_size=1, max_size=20))
def test_power_mean_is_at_least_the_field_mean(values):
    # RMS >= arithmetic mean (power-mean inequality), equal only for equal values
    assert spatial_average(values) >= sum(values) / len(values) - 1e-9 * max(1.0, max(values))


def test_scheme_templates():
    # Three heights 1.1/1.5/1.7 m (ECC Rec (02)04, from memory); a vertical line from 0.2 to 1.8 m
    # (IEC 62232 spatial averaging, from memory): 5 points are 0.4 m apart.
    assert three_heights().heights_m == (1.1, 1.5, 1.7)
    assert vertical_line(5).heights_m == pytest.approx((0.2, 0.6, 1.0, 1.4, 1.8))
    assert vertical_line(9).heights_m[1] - vertical_line(9).heights_m[0] == pytest.approx(0.2)
    assert scheme_from("custom", heights_m=[0.5, 1.0]).heights_m == (0.5, 1.0)
    for bad in (lambda: vertical_line(1), lambda: custom([]), lambda: custom([-1.0]), lambda: scheme_from("zigzag")):
        with pytest.raises(MeterlinkError):
            bad()
    with pytest.raises(MeterlinkError):
        spatial_average([])


def test_broadband_reference_is_the_lowest_level_in_the_band():
    # ICNIRP 1998 (Health Phys 74(4)) Table 7, general public: 28 V/m for 10-400 MHz and 1.375 f^0.5
    # (f in MHz) for 400-2000 MHz, lowest just above 400 MHz: 1.375 * 20 = 27.5 V/m; 6-minute average.
    r = broadband_reference("icnirp-1998", "public", (30e6, 6e9))
    assert r.e_v_per_m == pytest.approx(27.5, rel=1e-6)
    assert r.averaging_time_s == 360.0
    # ICNIRP 2020 (Health Phys 118(5)) Table 5, whole body, general public: 30-min average;
    # at 900 MHz alone 1.375 f^0.5 = 41.25 V/m
    r = broadband_reference("icnirp-2020", "public", 900e6)
    assert r.e_v_per_m == pytest.approx(41.25, rel=1e-9)
    assert r.averaging_time_s == 1800.0


def _plan(**kw):
    base = dict(site=Site("Example site"), standard="icnirp-1998", tier="public", rule="guarded",
                certificate="demo-probe", points=())
    return SurveyPlan(**{**base, **kw})


def _sample(e, h=1.5, u=1.0, coverage=1.0, e_max=None):
    return Sample(h, (0.0, 0.0, h), e, e if e_max is None else e_max, (e, 0.0, 0.0), u, 5, coverage, 0.0, 4.0)


def test_assess_spatial_point_hand_worked():
    # Far-field E scales with sqrt(P) (E = sqrt(Z0 P G / (4 pi)) / d): 250 W -> 400 W is a factor sqrt(1.6) on E.
    plan = _plan(sources=(Source("A", 900e6, power_w=250.0, max_power_w=400.0), Source("B", 100e6)),
                 followup=FollowUp(percent_field=15.0))
    ref = broadband_reference("icnirp-1998", "public", (30e6, 6e9))
    r = assess(plan, Point("p", "spatial"), (_sample(2.0, 1.1), _sample(4.0, 1.5), _sample(6.0, 1.7)), ref)
    e = math.sqrt(56 / 3)
    assert r.e_v_per_m == pytest.approx(e)
    assert r.percent_field == pytest.approx(100 * e / 27.5, rel=1e-6)
    assert r.percent_power == pytest.approx(100 * (e / 27.5) ** 2, rel=1e-6)
    assert r.e_extrapolated_v_per_m == pytest.approx(e * math.sqrt(1.6))
    assert r.verdict == "compliant" and r.complete
    assert r.followup  # 15.7 % of the field level is above the 15 % threshold
    assert source_factor(plan.sources) == pytest.approx(math.sqrt(1.6))
    assert source_factor(plan.sources, 100e6) == 1.0      # no powers known: not extrapolated


def test_assess_guarded_rule_near_the_limit_is_a_conditional_pass():
    # ILAC-G8:09/2019 4.2.3, guard band w = U: 95 % of the field level with U = 1 dB (x 1.122)
    # straddles the limit and lies below it: conditional pass.
    plan = _plan()
    ref = broadband_reference("icnirp-1998", "public", (30e6, 6e9))
    r = assess(plan, Point("q", "average"), (_sample(0.95 * 27.5, u=1.0),), ref)
    assert r.verdict == "conditional pass" and r.complete
    r = assess(plan, Point("q", "average"), (_sample(1.05 * 27.5, u=1.0),), ref)
    assert r.verdict == "conditional fail"


def test_interrupted_or_short_timed_average_gets_no_conformity_statement():
    # A timed average interrupted at 0.5 % coverage of the ICNIRP 1998 6-min averaging time
    # (Health Phys 74(4), Table 7 notes) is no 6-min average: the value is reported, no verdict.
    plan = _plan()
    ref = broadband_reference("icnirp-1998", "public", (30e6, 6e9))
    assert ref.averaging_time_s == pytest.approx(360.0)
    r = assess(plan, Point("q", "average"), (_sample(1.0, coverage=0.005),), ref, interrupted=True)
    assert r.verdict == "not assessable" and r.verdict_extrapolated == "not assessable"
    assert not r.complete and any("interrupted" in w for w in r.warnings)
    assert "No conformity statement" in r.statement and r.e_v_per_m == pytest.approx(1.0)
    r = assess(plan, Point("q", "average"), (_sample(1.0),), ref, shortened=True)
    assert r.verdict == "not assessable" and "6-minute averaging time" in r.statement
    assert any("averaging time" in w for w in r.warnings)


def test_survey_point_outside_the_certificates_frequency_range_is_not_assessable():
    # A reading calibrated outside the certificate's frequency range (FREQ_OUT) has no known response
    # or uncertainty: the value is reported, no statement of conformity is made.
    import dataclasses
    from meterlink.physics.calibrate import FREQ_OUT
    plan = _plan()
    ref = broadband_reference("icnirp-1998", "public", (30e6, 6e9))
    r = assess(plan, Point("f"), (dataclasses.replace(_sample(1.0), flags=FREQ_OUT),), ref)
    assert r.verdict == "not assessable" and "calibrated frequency range" in r.statement


def test_survey_below_100_khz_judges_the_highest_reading_not_a_mean():
    # ICNIRP 1998 Table 7, general public, 3-150 kHz: E = 87 V/m with no time averaging below
    # 100 kHz (table notes). A spot whose rms over the capture is 40 V/m but whose highest single
    # reading is 90 V/m: 90/87 = 103 %, within U = 1 dB (x 1.122) of the limit and above it ->
    # conditional fail under the plan's guarded rule (the 40 V/m mean would have been 46 %, a pass).
    plan = _plan()
    ref = broadband_reference("icnirp-1998", "public", (20e3, 90e3))
    assert ref.averaging_time_s is None and ref.e_v_per_m == pytest.approx(87.0)
    r = assess(plan, Point("s", "spot"), (_sample(40.0, e_max=90.0),), ref)
    assert r.e_v_per_m == pytest.approx(90.0) and r.verdict == "conditional fail"


def test_near_field_point_carries_the_warning():
    plan = _plan()
    ref = broadband_reference("icnirp-1998", "public", (30e6, 6e9))
    r = assess(plan, Point("n", near_field=True), (_sample(3.0),), ref)
    assert any("near field" in w and "H was not measured" in w for w in r.warnings)


def test_dipole_capture_weights_sweeps_by_time_and_counts_missing_lines_at_the_floor():
    # Three sweeps at device times 0, 30 and 40 s (median interval 20 s, hold cap 60 s): weights
    # 30, 10 and 20 s (the last a median interval). Line A (900 MHz): 2, 4, 4 V/m ->
    # sqrt((4*30 + 16*10 + 16*20) / 60) = sqrt(10) = 3.162 V/m (equal weights: sqrt(12) = 3.464 V/m).
    # Line B (2.1 GHz) is absent from the second sweep (below the floor there): with a floor of
    # 0.5 V/m it counts at 0.5 V/m, so sqrt((1*30 + 0.25*10 + 1*20) / 60) = sqrt(0.875) = 0.935 V/m.
    # Hand-worked from the rms-over-time definition (power domain).
    from meterlink.survey.capture import Value, _sample

    def v(t, ems):
        return Value(0, int(t), float(t), 1.8e9 + t, 1.0, (1.0, 0.0, 0.0), 1.0, 0, False, ems)

    vals = [v(0, ((900e6, 2.0), (2.1e9, 1.0))), v(30, ((900e6, 4.0),)), v(40, ((900e6, 4.0), (2.1e9, 1.0)))]
    s = _sample(vals, 60.0, 1.5, None, floor=lambda f: 0.5)
    got = {f: e for _, f, e in s.emitters}
    assert got[900e6] == pytest.approx(math.sqrt(10.0), rel=1e-12)
    assert got[2.1e9] == pytest.approx(math.sqrt(0.875), rel=1e-12)
