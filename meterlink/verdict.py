"""Decision rules and conformity statements for exposure against a limit (ILAC-G8:2019), pure.

The rule is chosen before the assessment. Uncertainty is the expanded uncertainty U (k = 2)
in field decibels (20*log10); the guard band is applied multiplicatively, E * 10^(U/20), which
is the same test as (E/E_L)^2 * 10^(U/10) on a power ratio.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from meterlink.errors import MeterlinkError

COMPLIANT = "compliant"
NOT_COMPLIANT = "not compliant"
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
        "ILAC-G8:2019, simple acceptance (binary statement, w = 0)", True,
        "simple-acceptance rule (no guard band)"),
    "guarded": DecisionRule(
        "guarded", "U",
        "guarded acceptance (guard band w = U): compliant if measured + U is at or below the limit, "
        "not compliant if measured - U is above it, otherwise undecided",
        "ILAC-G8:2019, guard band w = U, non-binary statement", False,
        "guarded-acceptance rule (guard band w = U)"),
    "conservative": DecisionRule(
        "conservative", "U",
        "worst case (guard band w = U, binary): compliant only if measured + U is at or below the "
        "limit, otherwise treated as not compliant",
        "ILAC-G8:2019, guarded acceptance with a binary statement (w = U)", True,
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
    else:
        outcome = UNDECIDED
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


def decide_field(e_v_per_m: float, e_limit_v_per_m: float, u_expanded_db: float, rule,
                 k: float = 2.0) -> Verdict:
    """Decide on a field value against its reference level (works for H in A/m alike)."""
    e, lim = float(e_v_per_m), float(e_limit_v_per_m)
    if not (math.isfinite(e) and e >= 0):
        raise MeterlinkError(f"field value must be a finite number >= 0, got {e_v_per_m!r}")
    if not (math.isfinite(lim) and lim > 0):
        raise MeterlinkError(f"field limit must be a positive number, got {e_limit_v_per_m!r}")
    return decide_ratio((e / lim) ** 2, u_expanded_db, rule, k)
