"""Decision rules (ILAC-G8:2019 simple and guarded acceptance) at and around the limits."""

import math

import pytest

from meterlink.errors import MeterlinkError
from meterlink.verdict import RULES, decide_field, decide_ratio, get_rule

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
    assert decide_field(acc * (1 + 1e-6), lim, U, "guarded").outcome == "undecided"
    # Rejection side: measured - U above the limit -> not compliant; exactly on it -> undecided.
    rej = lim * GUARD
    assert decide_field(rej, lim, U, "guarded").outcome == "undecided"
    assert decide_field(rej * (1 + 1e-6), lim, U, "guarded").outcome == "not compliant"
    assert decide_field(lim, lim, U, "guarded").outcome == "undecided"
    # The worst-case rule turns the undecided zone into not compliant.
    assert decide_field(lim, lim, U, "conservative").outcome == "not compliant"
    assert decide_field(acc, lim, U, "conservative").outcome == "compliant"


def test_ratio_form_and_percent_terms():
    # A total exposure ratio of 0.25 is 50 % in field terms; U = 3 dB multiplies the power
    # ratio by 10^0.3 = 1.995 -> 0.499 <= 1, compliant under the guarded rule.
    v = decide_ratio(0.25, U, "guarded")
    assert v.outcome == "compliant"
    assert v.percent_field == pytest.approx(50.0) and v.percent_power == pytest.approx(25.0)
    assert v.ratio_field == pytest.approx(0.5) and v.k == 2.0
    assert "guarded" in v.statement and "ILAC-G8:2019" in v.statement
    assert "50.0 %" in v.statement and "25.0 %" in v.statement
    # Field and ratio forms agree.
    assert decide_field(20.0, 27.7, U, "guarded").ratio_power == pytest.approx((20 / 27.7) ** 2)
    assert decide_ratio(0.6, U, "guarded").outcome == "undecided"
    assert decide_ratio(0.6, 0.0, "guarded").outcome == "compliant"


def test_bad_values():
    for args in ((-1.0, U), (math.nan, U), (0.5, -1.0), (0.5, math.inf)):
        with pytest.raises(MeterlinkError):
            decide_ratio(*args, "simple")
    with pytest.raises(MeterlinkError):
        decide_field(1.0, 0.0, U, "simple")
