"""Decision rules and conformity statements for exposure against a limit (ILAC-G8:09/2019), pure.

The rule is chosen before the assessment. The non-binary guarded rule reports the four outcomes of
ILAC-G8:09/2019 4.2.3 (Figure 5): pass (here "compliant"), conditional pass, conditional fail and
fail ("not compliant"). A result the instrument or the record cannot support gets no conformity
statement at all: "not assessable", with the reason and the measured value only. Uncertainty is the expanded uncertainty U (k = 2)
in field decibels (20*log10); the guard band is applied multiplicatively, E * 10^(U/20), which
is the same test as (E/E_L)^2 * 10^(U/10) on a power ratio.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from meterlink.errors import MeterlinkError

COMPLIANT = "compliant"
NOT_COMPLIANT = "not compliant"
#: ILAC-G8:09/2019 4.2.3: measured value at or below the limit, but within U of it.
CONDITIONAL_PASS = "conditional pass"
#: ILAC-G8:09/2019 4.2.3: measured value above the limit, but by less than U.
CONDITIONAL_FAIL = "conditional fail"
#: No conformity statement: the value lies outside what the instrument or the record can support.
NOT_ASSESSABLE = "not assessable"
#: Outcomes in the order of the guarded rule's zones, then the no-statement outcome.
OUTCOMES = (COMPLIANT, CONDITIONAL_PASS, CONDITIONAL_FAIL, NOT_COMPLIANT, NOT_ASSESSABLE)
#: The undecided zone of tolerance checks (lab as-found / as-left); exposure verdicts use the two
#: conditional outcomes instead.
UNDECIDED = "undecided"
#: Relative tolerance on the acceptance limit, so a value exactly on it is not lost to rounding.
_REL_TOL = 1e-12


@dataclass(frozen=True)
class DecisionRule:
    """A decision rule: its guard band and where it comes from."""

    name: str
    guard: str          # "none" or "U"
    description: str
    reference: str
    binary: bool        # True: only compliant / not compliant
    title: str          # short name for statements


RULES: dict[str, DecisionRule] = {
    "simple": DecisionRule(
        "simple", "none",
        "simple acceptance (guard band w = 0): compliant if the measured value is at or below the limit",
        "ILAC-G8:2019 4.2.1, binary statement, simple acceptance (w = 0)", True,
        "simple-acceptance rule (no guard band)"),
    "guarded": DecisionRule(
        "guarded", "U",
        "guarded acceptance (guard band w = U): compliant if measured + U is at or below the limit, "
        "not compliant if measured - U is above it; in between, conditional pass (measured at or "
        "below the limit) or conditional fail (measured above it)",
        "ILAC-G8:2019 4.2.3, non-binary statement with guard band w = U", False,
        "guarded-acceptance rule (guard band w = U)"),
    "conservative": DecisionRule(
        "conservative", "U",
        "worst case (guard band w = U, binary): compliant only if measured + U is at or below the "
        "limit, otherwise treated as not compliant",
        "ILAC-G8:2019 4.2.2, binary statement with guard band (w = U)", True,
        "worst-case rule (guard band w = U, binary)"),
}


def get_rule(name: str) -> DecisionRule:
    """The decision rule called ``name``; MeterlinkError naming the known rules if unknown."""
    try:
        return RULES[str(name).strip().lower()]
    except KeyError:
        raise MeterlinkError(f"unknown decision rule {name!r} (known: {', '.join(RULES)})") from None


@dataclass(frozen=True)
class Verdict:
    """Outcome of a decision rule on one exposure ratio, with both percent terms."""

    outcome: str
    rule: str
    ratio_field: float              # E/E_L (sqrt of the power ratio)
    ratio_power: float              # (E/E_L)^2, S/S_L or a total exposure ratio
    percent_field: float
    percent_power: float
    u_expanded_db: float
    k: float
    acceptance_limit_ratio: float   # largest power ratio accepted as compliant
    statement: str
    reason: str = ""                # why there is no conformity statement (not assessable)


def _rule(rule) -> DecisionRule:
    return rule if isinstance(rule, DecisionRule) else get_rule(rule)


def decide_ratio(exposure_ratio_power: float, u_expanded_db: float, rule, k: float = 2.0) -> Verdict:
    """Decide on a power-domain exposure ratio ((E/E_L)^2, S/S_L or a multi-frequency total)."""
    r = _rule(rule)
    x = float(exposure_ratio_power)
    u = float(u_expanded_db)
    if not (math.isfinite(x) and x >= 0):
        raise MeterlinkError(f"exposure ratio must be a finite number >= 0, got {exposure_ratio_power!r}")
    if not (math.isfinite(u) and u >= 0):
        raise MeterlinkError(f"expanded uncertainty must be a finite number of dB >= 0, got {u_expanded_db!r}")
    guard = 10.0 ** (u / 10.0) if r.guard == "U" else 1.0    # power-ratio guard factor
    upper, lower = x * guard, x / guard
    if upper <= 1.0 + _REL_TOL:
        outcome = COMPLIANT
    elif r.binary or lower > 1.0 + _REL_TOL:
        outcome = NOT_COMPLIANT
    elif x <= 1.0 + _REL_TOL:
        outcome = CONDITIONAL_PASS      # measured at or below the limit, within U of it
    else:
        outcome = CONDITIONAL_FAIL      # measured above the limit, by less than U
    rf = math.sqrt(x)
    pf, pp = 100.0 * rf, 100.0 * x
    acc = 1.0 / guard
    if r.guard == "U":
        how = (f"measured {pf:.1f} % of the field reference level ({pp:.1f} % in power terms), "
               f"expanded uncertainty U = {u:.2f} dB (k = {k:g}); acceptance limit "
               f"{100 * math.sqrt(acc):.1f} % field / {100 * acc:.1f} % power")
    else:
        how = (f"measured {pf:.1f} % of the field reference level ({pp:.1f} % in power terms); "
               f"uncertainty U = {u:.2f} dB (k = {k:g}) not used as a guard band")
    statement = f"{outcome.capitalize()} under the {r.title}, {r.reference.split(',')[0]}: {how}."
    return Verdict(outcome, r.name, rf, x, pf, pp, u, float(k), acc, statement)


def not_assessable(verdict: Verdict, reason: str) -> Verdict:
    """The same measured figures with no conformity statement: only the value and why not."""
    how = (f"measured {verdict.percent_field:.1f} % of the field reference level "
           f"({verdict.percent_power:.1f} % in power terms), U = {verdict.u_expanded_db:.2f} dB (k = {verdict.k:g})")
    statement = f"Not assessable: {reason}. No conformity statement is made; {how}, reported as a measured value only."
    return Verdict(NOT_ASSESSABLE, verdict.rule, verdict.ratio_field, verdict.ratio_power, verdict.percent_field,
                   verdict.percent_power, verdict.u_expanded_db, verdict.k, verdict.acceptance_limit_ratio,
                   statement, reason)


def lower_bound(verdict: Verdict, reason: str) -> Verdict:
    """A verdict on a value that is only a lower bound: a fail stands, anything else is not assessable."""
    if verdict.outcome in (NOT_COMPLIANT, CONDITIONAL_FAIL):
        return verdict
    return not_assessable(verdict, reason)


def decide_field(e_v_per_m: float, e_limit_v_per_m: float, u_expanded_db: float, rule,
                 k: float = 2.0) -> Verdict:
    """Decide on a field value against its reference level (works for H in A/m alike)."""
    e, lim = float(e_v_per_m), float(e_limit_v_per_m)
    if not (math.isfinite(e) and e >= 0):
        raise MeterlinkError(f"field value must be a finite number >= 0, got {e_v_per_m!r}")
    if not (math.isfinite(lim) and lim > 0):
        raise MeterlinkError(f"field limit must be a positive number, got {e_limit_v_per_m!r}")
    return decide_ratio((e / lim) ** 2, u_expanded_db, rule, k)


def upper_bound(verdict: Verdict, reason: str) -> Verdict:
    """A verdict on a value that is only an upper bound: a pass stands, anything else is not assessable."""
    if verdict.outcome in (COMPLIANT, CONDITIONAL_PASS):
        return verdict
    return not_assessable(verdict, reason)
