"""Multi-frequency sums, extrapolation, near-field guard and percent of limit."""

import math

import numpy as np
import pytest

from meterlink.errors import MeterlinkError
from meterlink.physics.exposure import (
    extrapolate,
    multi_frequency,
    near_field_check,
    percent_of_limit,
)
from meterlink.physics.units import Z0_OHM

NAN = float("nan")


def test_icnirp_2020_public_whole_body_three_emitters():
    # ICNIRP 2020 (Health Phys. 118(5)) Table 5, general public, whole body, 30 min:
    #   30-400 MHz: E = 27.7 V/m, S = 2 W/m2;  400-2000 MHz: E = 1.375 f^0.5, S = f/200 (f in MHz)
    #   -> 900 MHz: E_L = 41.25 V/m, S_L = 4.5 W/m2;  2-300 GHz: S = 10 W/m2.
    # Summation (ICNIRP 2020 Appendix / eq. for simultaneous exposure): squared field ratios to
    # 30 MHz, S/S_L above, as encoded in meterlink.physics.limits. Worked by hand:
    #   100 MHz, 13.85 V/m: (13.85/27.7)^2 = 0.25, but S = E^2/Z0 = 0.50918 W/m2 -> S/S_L = 0.25459
    #   900 MHz, 20.625 V/m: (20.625/41.25)^2 = 0.25; S/S_L = 1.12916/4.5 = 0.25093
    #   2.1 GHz, S = 2.5 W/m2: 2.5/10 = 0.25
    r = multi_frequency([100e6, 900e6, 2.1e9], standard="icnirp-2020", tier="public",
                        e_v_per_m=[13.85, 20.625, NAN], s_w_per_m2=[NAN, NAN, 2.5],
                        labels=["fm", "gsm", "umts"])
    e_terms = {t.label: t for t in r.terms if t.group == "E whole body"}
    assert {t.quantity for t in e_terms.values()} == {"S/S_L"}
    assert e_terms["fm"].ratio == pytest.approx(13.85**2 / Z0_OHM / 2.0, rel=1e-12)
    assert e_terms["fm"].ratio == pytest.approx(0.25459, abs=1e-5)
    assert "E^2/Z0" in e_terms["fm"].note
    assert e_terms["gsm"].divisor == pytest.approx(4.5)
    assert e_terms["gsm"].ratio == pytest.approx(0.25093, abs=1e-5)
    assert e_terms["umts"].ratio == pytest.approx(0.25, rel=1e-12)
    total = 13.85**2 / Z0_OHM / 2.0 + 20.625**2 / Z0_OHM / 4.5 + 0.25
    assert r.total == pytest.approx(total, rel=1e-12)
    assert r.share == pytest.approx(np.array([0.25459, 0.25093, 0.25]) / total, abs=1e-4)
    assert r.share.sum() == pytest.approx(1.0)
    assert r.complete and not r.flags
    # The same emitters with field ratios where E was measured: the hand values 0.25 each.
    rf = multi_frequency([100e6, 900e6, 2.1e9], standard="icnirp-2020", tier="public",
                         e_v_per_m=[13.85, 20.625, NAN], s_w_per_m2=[NAN, NAN, 2.5],
                         field_ratio_for_s=True)
    fe = [t for t in rf.terms if t.group == "E whole body"]
    assert [t.quantity for t in fe] == ["(E/E_L)^2", "(E/E_L)^2", "S/S_L"]
    assert [t.ratio for t in fe] == pytest.approx([0.25, 0.25, 0.25], rel=1e-12)
    assert rf.total == pytest.approx(0.75, rel=1e-12)
    # Rounded tables: (E/E_L)^2 and S/S_L differ by about 1.8 % at 100 MHz (27.7^2/377 = 2.04).
    assert r.total / rf.total - 1 == pytest.approx(0.0073, abs=5e-4)


def test_icnirp_1998_thermal_formula_term():
    # ICNIRP 1998 (Health Phys. 74(4)) eq. (10): for 100 kHz-1 MHz the E term is (E_i/c)^2 with
    # c = 87/f^0.5 V/m (f in MHz), as encoded in meterlink.physics.limits (status: partly verified).
    # 0.25 MHz, E = 87 V/m: c = 87/0.5 = 174 V/m -> (87/174)^2 = 0.25.
    r = multi_frequency([0.25e6], standard="icnirp-1998", tier="public",
                        e_v_per_m=[87.0], h_a_per_m=[0.1])
    t = next(t for t in r.terms if t.effect == "thermal" and t.group == "E")
    assert t.divisor == pytest.approx(174.0)
    assert t.ratio == pytest.approx(0.25)
    assert "from the summation rule" in t.note


def test_near_field_e_only_is_insufficient():
    # Below 30 MHz (or marked near field) the standards ask for E and H (ICNIRP 2020 Table 5
    # notes: 0.1-30 MHz both E and H must comply); no S from E there.
    flag = near_field_check(10e6, has_e=True, has_h=False)
    assert flag.insufficient and "H" in flag.message and "not derived" in flag.message
    assert near_field_check(900e6, has_e=True, has_h=False) is None
    marked = near_field_check(900e6, has_e=True, has_h=False, near_field=True)
    assert marked.insufficient and "marked near field" in marked.message
    both = near_field_check(10e6, has_e=True, has_h=True)
    assert both is not None and not both.insufficient
    r = multi_frequency([10e6], standard="icnirp-2020", tier="public", e_v_per_m=[20.0])
    assert not r.complete and r.flags[0].insufficient
    assert all(t.quantity != "S/S_L" for t in r.terms)
    assert any("H" in m for m in r.messages)
    # Marked near field at 900 MHz: the S term is not derived from E at all.
    rn = multi_frequency([900e6], standard="icnirp-2020", tier="public", e_v_per_m=[20.0],
                         near_field=True)
    assert rn.terms == () and not rn.complete
    assert any("power density is not derived" in m for m in rn.messages)


def test_extrapolation_to_maximum_power():
    # Field scales with sqrt(P): 4 V/m at 25 % of maximum power -> 4*sqrt(4) = 8 V/m
    # (far-field relation E ~ sqrt(P), common practice, e.g. IEC 62232 extrapolation).
    x = extrapolate([4.0, 1.0], p_meas_w=[25.0, 10.0], p_max_w=[100.0, 10.0])
    assert x.extrapolated == pytest.approx([8.0, 1.0])
    assert x.measured == pytest.approx([4.0, 1.0])
    assert x.factor == pytest.approx([2.0, 1.0])
    s = extrapolate(0.1, 25.0, 100.0, quantity="s")
    assert float(s.extrapolated) == pytest.approx(0.4)
    with pytest.raises(MeterlinkError, match="below"):
        extrapolate(4.0, 100.0, 25.0)
    with pytest.raises(MeterlinkError):
        extrapolate(4.0, 0.0, 25.0)


def test_percent_field_and_power():
    # 50 % of the field limit is 25 % of the power-density limit ((E/E_L)^2, definition).
    p = percent_of_limit(13.85, 27.7)
    assert p.percent_field == pytest.approx(50.0) and p.percent_power == pytest.approx(25.0)
    assert "field" in p.label_field and "power" in p.label_power
    ps = percent_of_limit(1.0, 4.0, quantity="s")
    assert ps.percent_power == pytest.approx(25.0) and ps.percent_field == pytest.approx(50.0)
    with pytest.raises(MeterlinkError):
        percent_of_limit(1.0, 0.0)


def test_bad_input():
    with pytest.raises(MeterlinkError):
        multi_frequency([-1.0], standard="icnirp-2020", tier="public", e_v_per_m=[1.0])
    with pytest.raises(MeterlinkError, match="no E, H or S"):
        multi_frequency([900e6], standard="icnirp-2020", tier="public", e_v_per_m=[NAN])
    with pytest.raises(MeterlinkError):
        multi_frequency([900e6], standard="no-such", tier="public", e_v_per_m=[1.0])
    assert math.isfinite(multi_frequency([900e6], standard="fcc-1310", tier="public",
                                         e_v_per_m=[1.0]).total)
