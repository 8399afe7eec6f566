"""Decision rules (ILAC-G8:09/2019 4.2.1-4.2.3: simple and guarded acceptance) at and around the limits."""

import math

import pytest

from meterlink.errors import MeterlinkError
from meterlink.physics.verdict import RULES, decide_field, decide_ratio, get_rule, lower_bound, not_assessable

U = 3.0   # expanded uncertainty, dB (k = 2)
GUARD = 10 ** (U / 20)      # field factor of the guard band: 1.4125


def test_rules_and_lookup():
    assert {"simple", "guarded", "conservative"} <= set(RULES)
    assert get_rule("Guarded").guard == "U" and get_rule("simple").guard == "none"
    with pytest.raises(MeterlinkError, match="known"):
        get_rule("lenient")


def test_simple_acceptance_at_and_around_the_limit():
    # ILAC-G8:2019 simple acceptance, w = 0: compliant iff measured <= limit.
    assert decide_field(41.25, 41.25, U, "simple").outcome == "compliant"
    assert decide_field(41.25 * (1 - 1e-9), 41.25, U, "simple").outcome == "compliant"
    assert decide_field(41.25 * (1 + 1e-9), 41.25, U, "simple").outcome == "not compliant"


def test_guarded_acceptance_limit():
    # ILAC-G8:2019 guard band w = U: acceptance limit E_L / 10^(U/20) = 41.25/1.41254 = 29.203 V/m.
    lim = 41.25
    acc = lim / GUARD
    assert acc == pytest.approx(29.203, abs=1e-3)
    at = decide_field(acc, lim, U, "guarded")
    assert at.outcome == "compliant"
    assert at.acceptance_limit_ratio == pytest.approx(10 ** (-U / 10))
    assert decide_field(acc * (1 - 1e-6), lim, U, "guarded").outcome == "compliant"
    assert decide_field(acc * (1 + 1e-6), lim, U, "guarded").outcome == "conditional pass"
    # Rejection side: measured - U above the limit -> not compliant; exactly on it -> conditional fail.
    rej = lim * GUARD
    assert decide_field(rej, lim, U, "guarded").outcome == "conditional fail"
    assert decide_field(rej * (1 + 1e-6), lim, U, "guarded").outcome == "not compliant"
    assert decide_field(lim, lim, U, "guarded").outcome == "conditional pass"
    # The worst-case rule turns both conditional zones into not compliant.
    assert decide_field(lim, lim, U, "conservative").outcome == "not compliant"
    assert decide_field(acc, lim, U, "conservative").outcome == "compliant"


def test_ratio_form_and_percent_terms():
    # A total exposure ratio of 0.25 is 50 % in field terms; U = 3 dB multiplies the power
    # ratio by 10^0.3 = 1.995 -> 0.499 <= 1, compliant under the guarded rule.
    v = decide_ratio(0.25, U, "guarded")
    assert v.outcome == "compliant"
    assert v.percent_field == pytest.approx(50.0) and v.percent_power == pytest.approx(25.0)
    assert v.ratio_field == pytest.approx(0.5) and v.k == 2.0
    assert "guarded" in v.statement and "ILAC-G8:2019 4.2.3" in v.statement
    assert "50.0 %" in v.statement and "25.0 %" in v.statement
    # Field and ratio forms agree.
    assert decide_field(20.0, 27.7, U, "guarded").ratio_power == pytest.approx((20 / 27.7) ** 2)
    assert decide_ratio(0.6, U, "guarded").outcome == "conditional pass"
    assert decide_ratio(0.6, 0.0, "guarded").outcome == "compliant"


def test_bad_values():
    for args in ((-1.0, U), (math.nan, U), (0.5, -1.0), (0.5, math.inf)):
        with pytest.raises(MeterlinkError):
            decide_ratio(*args, "simple")
    with pytest.raises(MeterlinkError):
        decide_field(1.0, 0.0, U, "simple")


def test_guarded_rule_reports_the_four_ilac_g8_outcomes():
    # ILAC-G8:09/2019 4.2.3 (non-binary statement with guard band w = U, Figure 5): pass below
    # TL - w, conditional pass between TL - w and TL, conditional fail between TL and TL + w, fail
    # above TL + w. With U = 3 dB the field guard factor is 10^(3/20) = 1.41254, so against
    # TL = 100 %: pass <= 70.79 %, conditional pass 70.8-100 %, conditional fail 100-141.25 %, fail above.
    lim = 100.0
    got = [decide_field(e, lim, U, "guarded").outcome for e in (70.0, 71.0, 99.9, 100.1, 141.0, 142.0)]
    assert got == ["compliant", "conditional pass", "conditional pass", "conditional fail",
                   "conditional fail", "not compliant"]
    # The binary rules (4.2.1 simple, 4.2.2 binary with guard band) keep two outcomes.
    assert {decide_field(e, lim, U, "simple").outcome for e in (71.0, 99.9)} == {"compliant"}
    assert {decide_field(e, lim, U, "simple").outcome for e in (100.1, 141.0)} == {"not compliant"}
    assert {decide_field(e, lim, U, "conservative").outcome for e in (71.0, 100.1, 141.0)} == {"not compliant"}
    # The statement names the outcome and the clause.
    v = decide_field(100.1, lim, U, "guarded")
    assert v.statement.startswith("Conditional fail under the guarded-acceptance rule")


def test_not_assessable_keeps_the_value_and_drops_the_statement():
    v = decide_ratio(0.25, U, "guarded")
    na = not_assessable(v, "record incomplete")
    assert na.outcome == "not assessable" and na.reason == "record incomplete"
    assert na.percent_field == pytest.approx(50.0) and "No conformity statement" in na.statement
    assert "compliant" not in na.statement.lower().replace("no conformity", "")
    # A lower bound that already fails stands; a lower bound that passes proves nothing.
    assert lower_bound(decide_ratio(4.0, U, "guarded"), "over range").outcome == "not compliant"
    assert lower_bound(decide_ratio(1.2, U, "guarded"), "over range").outcome == "conditional fail"
    assert lower_bound(v, "over range").outcome == "not assessable"
