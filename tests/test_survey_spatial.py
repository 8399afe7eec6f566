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


def _sample(e, h=1.5, u=1.0):
    return Sample(h, (0.0, 0.0, h), e, e, (e, 0.0, 0.0), u, 5, 1.0, 0.0, 4.0)


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


def test_assess_guarded_rule_near_the_limit_is_undecided_and_interrupted_is_incomplete():
    # ILAC-G8:2019 guarded acceptance, w = U: 95 % of the field level with U = 1 dB (x 1.122) straddles it
    plan = _plan()
    ref = broadband_reference("icnirp-1998", "public", (30e6, 6e9))
    r = assess(plan, Point("q", "average"), (_sample(0.95 * 27.5, u=1.0),), ref, interrupted=True, shortened=True)
    assert r.verdict == "undecided"
    assert not r.complete and any("interrupted" in w for w in r.warnings)
    assert any("averaging time" in w for w in r.warnings)


def test_near_field_point_carries_the_warning():
    plan = _plan()
    ref = broadband_reference("icnirp-1998", "public", (30e6, 6e9))
    r = assess(plan, Point("n", near_field=True), (_sample(3.0),), ref)
    assert any("near field" in w and "H was not measured" in w for w in r.warnings)
