"""A survey site's outcome from its points' outcomes: the one rule the survey report's conclusion and
the `sessions` listing both use. No imports: the fast-starting `sessions` command loads it."""

#: Site outcomes, worst first: the site takes the worst outcome of its assessable points.
WORST_FIRST = ("not compliant", "conditional fail", "conditional pass", "compliant")


def site_outcome(verdicts) -> str:
    """The site's outcome: the worst of the points' outcomes that carry a conformity statement,
    "not assessable" when none does."""
    present = [v for v in verdicts if v in WORST_FIRST]
    return min(present, key=WORST_FIRST.index) if present else "not assessable"


def extrapolated_outcome(verdicts_extrapolated, has_max_power: bool) -> str | None:
    """The site's outcome at the maximum declared power: from the points' extrapolated outcomes, given
    only when some point has one and a maximum power was declared (a source, or a selective band's
    extrapolation); None otherwise."""
    extrap = [v for v in verdicts_extrapolated if v]
    return site_outcome(extrap) if extrap and has_max_power else None
