"""Exposure ratios: multi-frequency sums by each standard's rule, extrapolation to maximum
power, the near-field guard and percent-of-limit in field and power terms (pure).

Reference levels and summation rules come from :mod:`meterlink.physics.limits`. Inputs are RMS values
already averaged over the standard's averaging time (see :mod:`meterlink.physics.averaging`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from meterlink.errors import MeterlinkError
from meterlink.physics.limits import reference_level, summation_rule
from meterlink.physics.units import Z0_OHM, format_frequency

#: Below this frequency a measurement point is treated as near field unless shown otherwise.
NEAR_FIELD_BELOW_HZ = 30e6
_UNIT_HZ = {"Hz": 1.0, "kHz": 1e3, "MHz": 1e6, "GHz": 1e9}
_SYM = {"e": "E", "h": "H", "s": "S"}


@dataclass(frozen=True)
class NearFieldFlag:
    """A point where the plane-wave relations may not hold; insufficient if E or H is missing."""

    freq_hz: float
    near_field: bool           # marked near field by the caller
    below_hz: float
    insufficient: bool
    message: str


def near_field_check(freq_hz: float, *, has_e: bool, has_h: bool,
                     near_field: bool = False) -> NearFieldFlag | None:
    """Flag a point below 30 MHz or marked near field (None if plane-wave relations apply)."""
    f = float(freq_hz)
    if f >= NEAR_FIELD_BELOW_HZ and not near_field:
        return None
    why = "marked near field" if near_field else f"below {format_frequency(NEAR_FIELD_BELOW_HZ)}"
    missing = [q for q, ok in (("E", has_e), ("H", has_h)) if not ok]
    if missing:
        msg = (f"{format_frequency(f)}: {why}; the standards ask for both E and H here and "
               f"{' and '.join(missing)} was not measured: insufficient, and power density is "
               "not derived from a single field")
    else:
        msg = f"{format_frequency(f)}: {why}; E and H assessed separately, no power density derived"
    return NearFieldFlag(f, bool(near_field), NEAR_FIELD_BELOW_HZ, bool(missing), msg)


def plane_wave_ok(freq_hz: float, near_field: bool = False) -> bool:
    """True where E, H and S may be converted with Z0 (far field, 30 MHz and up)."""
    return float(freq_hz) >= NEAR_FIELD_BELOW_HZ and not near_field


@dataclass(frozen=True)
class PercentOfLimit:
    """A value against its reference level in both terms; 50 % field is 25 % power."""

    percent_field: float       # 100 * E/E_L (or 100 * sqrt(S/S_L))
    percent_power: float       # 100 * (E/E_L)^2 (or 100 * S/S_L)
    label_field: str
    label_power: str


def percent_of_limit(value: float, limit: float, quantity: str = "e") -> PercentOfLimit:
    """Percent of the reference level for E ('e'), H ('h') or power density ('s')."""
    if quantity not in _SYM:
        raise MeterlinkError(f"quantity {quantity!r} is not one of e, h, s")
    v, lim = float(value), float(limit)
    if not (np.isfinite(v) and v >= 0 and np.isfinite(lim) and lim > 0):
        raise MeterlinkError(f"percent of limit needs a value >= 0 and a limit > 0, got {value!r}, {limit!r}")
    r = v / lim
    pf, pp = (100 * np.sqrt(r), 100 * r) if quantity == "s" else (100 * r, 100 * r * r)
    sym = "E" if quantity == "s" else _SYM[quantity]
    return PercentOfLimit(float(pf), float(pp), f"% of the {sym}-field reference level",
                          "% of the power-density reference level")


@dataclass(frozen=True)
class Extrapolated:
    """Measured and maximum-power values side by side (per emitter)."""

    measured: np.ndarray
    extrapolated: np.ndarray
    factor: np.ndarray          # multiplier applied: sqrt(P_max/P_meas) for fields, P ratio for S
    p_meas_w: np.ndarray
    p_max_w: np.ndarray
    quantity: str


def extrapolate(value, p_meas_w, p_max_w, quantity: str = "e") -> Extrapolated:
    """Scale a field (E, H) by sqrt(P_max/P_meas), or power density S by P_max/P_meas."""
    if quantity not in _SYM:
        raise MeterlinkError(f"quantity {quantity!r} is not one of e, h, s")
    v, pm, px = np.broadcast_arrays(*(np.asarray(a, dtype=float) for a in (value, p_meas_w, p_max_w)))
    if not (np.all(np.isfinite(pm)) and np.all(pm > 0) and np.all(np.isfinite(px)) and np.all(px > 0)):
        raise MeterlinkError("extrapolation needs positive, finite measured and maximum powers")
    if np.any(px < pm):
        raise MeterlinkError("extrapolation: a maximum power is below the power during the measurement")
    ratio = px / pm
    factor = ratio if quantity == "s" else np.sqrt(ratio)
    return Extrapolated(v.copy(), v * factor, factor, pm.copy(), px.copy(), quantity)


@dataclass(frozen=True)
class Term:
    """One emitter's contribution to one sum of a summation rule."""

    label: str
    freq_hz: float
    effect: str
    group: str
    quantity: str               # the ratio used, e.g. "(E/E_L)^2", "S/S_L", "E/E_L"
    measured: float             # the value in the numerator (SI)
    divisor: float              # reference level or formula value (SI)
    ratio: float                # contribution to the sum
    note: str


@dataclass(frozen=True)
class MultiFrequencyResult:
    """All terms, the sum of each (effect, group), the governing total and per-emitter shares."""

    standard: str
    tier: str
    terms: tuple[Term, ...]
    sums: dict                  # (effect, group) -> sum of its terms
    total: float                # the largest sum: each must not exceed 1
    governing: tuple[str, str] | None
    emitter_ratio: np.ndarray   # each emitter's contribution to the governing sum
    share: np.ndarray           # emitter_ratio / total
    flags: tuple[NearFieldFlag, ...]
    messages: tuple[str, ...]   # terms that could not be evaluated, and why
    source: str
    status: str
    complete: bool              # every term evaluated and no insufficient near-field point


def _divisor(term, level, q: str, f: float):
    if term.divisor == "formula":
        a, b, unit = term.formula
        return a * (f / _UNIT_HZ[unit]) ** b, f"divisor {a:g}*(f/{unit})^{b:g} from the summation rule"
    return getattr(level, {"e": "e_v_per_m", "h": "h_a_per_m", "s": "s_w_per_m2"}[q]), ""


def _evaluate(term, f, e, h, s, far, level, field_for_s):
    """(quantity label, numerator, divisor, ratio, note) or (None, reason) for one term."""
    q, notes = term.quantity, []
    if q == "s":
        use_field = (field_for_s and e is not None) or (s is None and level.s_w_per_m2 is None
                                                        and term.divisor == "reference_level")
        if use_field:
            src = "e" if e is not None else "h"
            x = e if src == "e" else h
            lim = level.e_v_per_m if src == "e" else level.h_a_per_m
            if x is None or lim is None:
                return None, "no S reference level and no measured field to compare"
            why = "field ratio chosen" if field_for_s else "no S reference level at this frequency"
            return (f"({_SYM[src]}/{_SYM[src]}_L)^2", x, lim, (x / lim) ** 2,
                    f"{why}: ({_SYM[src]}/{_SYM[src]}_L)^2 used")
        if s is None:
            if not far:
                return None, "near field: power density is not derived from a field"
            if e is not None:
                s = e * e / Z0_OHM
                notes.append("S = E^2/Z0 (far field)")
            elif h is not None:
                s = Z0_OHM * h * h
                notes.append("S = Z0*H^2 (far field)")
            else:
                return None, "nothing measured"
        x = s
    else:
        x = e if q == "e" else h
        if x is None:
            if not far:
                return None, f"near field: {_SYM[q]} not measured and not derivable"
            if q == "e" and (h is not None or s is not None):
                x = Z0_OHM * h if h is not None else np.sqrt(s * Z0_OHM)
                notes.append("E from plane-wave relation (far field)")
            elif q == "h" and (e is not None or s is not None):
                x = e / Z0_OHM if e is not None else np.sqrt(s / Z0_OHM)
                notes.append("H from plane-wave relation (far field)")
            else:
                return None, f"{_SYM[q]} not measured"
    div, dnote = _divisor(term, level, q, f)
    if div is None:
        return None, f"no {_SYM[q]} reference level at this frequency"
    if dnote:
        notes.append(dnote)
    sym = _SYM[q]
    label = f"{sym}/{sym}_L" if term.exponent == 1 else f"({sym}/{sym}_L)^{term.exponent}"
    if q == "s" and term.exponent == 1:
        label = "S/S_L"
    return label, float(x), float(div), float((x / div) ** term.exponent), "; ".join(notes)


def _column(a, n, name):
    if a is None:
        return [None] * n
    v = np.broadcast_to(np.asarray(a, dtype=float), (n,))
    if np.any(v[np.isfinite(v)] < 0):
        raise MeterlinkError(f"{name}: field values must not be negative")
    return [float(x) if np.isfinite(x) else None for x in v]


def multi_frequency(freq_hz, *, standard: str, tier: str, e_v_per_m=None, h_a_per_m=None,
                    s_w_per_m2=None, labels=None, near_field=False, kind: str = "whole_body",
                    field_ratio_for_s: bool = False) -> MultiFrequencyResult:
    """Exposure ratios of several emitters by the standard's summation rule (NaN = not measured).

    Terms of quantity S use measured S, else S = E^2/Z0 in the far field; ``field_ratio_for_s``
    uses (E/E_L)^2 instead where E was measured. Only rule terms of ``kind`` are evaluated."""
    f = np.atleast_1d(np.asarray(freq_hz, dtype=float))
    n = f.size
    if f.ndim != 1 or n == 0 or not np.all(np.isfinite(f) & (f > 0)):
        raise MeterlinkError("multi-frequency exposure needs a 1-D list of positive frequencies")
    es, hs, ss = (_column(a, n, nm) for a, nm in ((e_v_per_m, "E"), (h_a_per_m, "H"), (s_w_per_m2, "S")))
    nf = np.broadcast_to(np.asarray(near_field, dtype=bool), (n,))
    names = list(labels) if labels is not None else [format_frequency(x) for x in f]
    if len(names) != n:
        raise MeterlinkError(f"{len(names)} labels for {n} emitters")
    rule = summation_rule(standard, tier)
    groups: dict = {}
    for t in rule.terms:
        if t.kind == kind:
            groups.setdefault((t.effect, t.group or t.quantity), []).append(t)
    if not groups:
        raise MeterlinkError(f"{standard} {tier}: the summation rule has no {kind} terms")
    for g in groups.values():
        g.sort(key=lambda t: t.f_lo_hz)
    terms, flags, msgs = [], [], []
    level_checks: set[str] = set()  # what each reference level used was checked against
    contrib = {k: np.zeros(n) for k in groups}
    for i in range(n):
        fi, e, h, s = float(f[i]), es[i], hs[i], ss[i]
        if e is None and h is None and s is None:
            raise MeterlinkError(f"emitter {names[i]!r}: no E, H or S value")
        flag = near_field_check(fi, has_e=e is not None, has_h=h is not None, near_field=bool(nf[i]))
        if flag:
            flags.append(flag)
        far = plane_wave_ok(fi, bool(nf[i]))
        covered = False
        for key, g in groups.items():
            term = next((t for t in g if t.f_lo_hz <= fi <= t.f_hi_hz), None)
            if term is None:
                continue
            covered = True
            try:
                level = reference_level(standard, tier, fi, term.kind)
            except MeterlinkError as exc:
                msgs.append(f"{names[i]}: {exc}")
                continue
            level_checks.add(level.status)
            out = _evaluate(term, fi, e, h, s, far, level, field_ratio_for_s)
            if out[0] is None:
                msgs.append(f"{names[i]} ({key[0]}, {key[1]}): {out[1]}")
                continue
            label, x, div, ratio, note = out
            contrib[key][i] = ratio
            terms.append(Term(names[i], fi, key[0], key[1], label, x, div, ratio, note))
        if not covered:
            msgs.append(f"{names[i]}: {format_frequency(fi)} is outside the {standard} summation rule")
    sums = {k: float(np.sum(v)) for k, v in contrib.items()}
    gov = max(sums, key=sums.get) if any(v > 0 for v in sums.values()) else None
    total = sums[gov] if gov else 0.0
    er = contrib[gov].copy() if gov else np.zeros(n)
    share = er / total if total > 0 else np.zeros(n)
    return MultiFrequencyResult(standard, tier, tuple(terms), sums, total, gov, er, share,
                                tuple(flags), tuple(msgs), rule.source,
                                f"levels: {'; '.join(sorted(level_checks))}; summation rule: {rule.status}"
                                if level_checks else f"summation rule: {rule.status}",
                                not msgs and not any(fl.insufficient for fl in flags))
