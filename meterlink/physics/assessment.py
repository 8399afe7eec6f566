"""Assessing a recorded session against a standard: time-averaged exposure, both percent terms, verdict.

Pure functions of calibrated series (FieldSeries / SpectrumSeries) plus the reference-level data;
`assess_session` is the thin I/O wrapper that reads the series from a Store.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from meterlink.physics import units
from meterlink.physics.averaging import HOLD_FACTOR, running_average
from meterlink.physics.calibrate import ABOVE_RANGE, BELOW_RANGE, FREQ_ASSUMED, FREQ_OUT
from meterlink.errors import MeterlinkError
from meterlink.physics.exposure import multi_frequency, near_field_check
from meterlink.physics.streaming import FieldStats
from meterlink.physics.limits import ReferenceLevel, most_restrictive_level, reference_level
from meterlink.physics.verdict import Verdict, decide_field, decide_ratio, get_rule, lower_bound, not_assessable, upper_bound

WHOLE_BODY = "whole_body"


@dataclass(frozen=True)
class Emitter:
    """One frequency of a frequency-selective assessment."""

    freq_hz: float
    e_v_per_m: float          # time average (power domain) over the sweeps
    term_ratio: float         # this emitter's term in the governing sum
    quantity: str             # which ratio the term uses, e.g. "S/S_L" or "(E/E_L)^2"
    share: float              # fraction of the total exposure ratio


@dataclass(frozen=True)
class Assessment:
    """The result of assessing one session; every number carries its label."""

    session_id: int
    standard: str
    tier: str
    tier_label: str
    rule: str
    mode: str                         # "broadband" or "frequency-selective"
    frequency_note: str
    window_s: float | None
    peak_v_per_m: float
    t_peak_utc: float | None
    value_v_per_m: float              # the time-averaged value judged (max complete running average, or record mean)
    t_value_end_utc: float | None
    value_complete: bool              # a full averaging window with enough coverage
    coverage: float
    limit_v_per_m: float | None
    limit_derived: bool
    total_exposure_ratio: float       # power terms: (E/E_L)^2 for broadband, the standard's sum otherwise
    u_expanded_db: float
    verdict: Verdict
    source: str
    status: str
    certificate: str
    n_values: int
    emitters: tuple[Emitter, ...] = ()
    notes: tuple[str, ...] = field(default_factory=tuple)
    #: "time average" over window_s, or "instantaneous" where the standard gives no averaging time
    averaging: str = "time average"
    #: highest window reaching outside the record (start/end): never the standard's average
    partial_v_per_m: float | None = None

    @property
    def percent_field(self) -> float:
        return 100.0 * math.sqrt(self.total_exposure_ratio)

    @property
    def percent_power(self) -> float:
        return 100.0 * self.total_exposure_ratio


@dataclass(frozen=True)
class Temperatures:
    """Meter temperatures reported during a measurement, and the certificate's stated range."""

    span_c: tuple[float, float] | None     # lowest and highest reported (degC); None: none reported
    range_c: tuple[float, float] | None    # where the certificate's coefficient and uncertainty hold; None: not stated


def temperature_check(t: Temperatures | None) -> tuple[str | None, str | None]:
    """(reason for no verdict, note). Outside the certificate's temperature range its temperature
    correction and uncertainty are unknown, as outside its frequency range: no conformity statement."""
    if t is None:
        return None, None
    seen = (f"{t.span_c[0]:.1f}..{t.span_c[1]:.1f} degC" if t.span_c and t.span_c[0] != t.span_c[1]
            else f"{t.span_c[0]:.1f} degC" if t.span_c else None)
    if t.range_c is None:
        return None, ("the certificate states no temperature range for its temperature coefficient and uncertainty"
                      + (f": the meter's temperatures ({seen}) were not checked against one" if seen else ""))
    lo, hi = t.range_c
    if t.span_c is None:
        return None, f"the meter reported no temperature: not checked against the certificate's {lo:g}..{hi:g} degC"
    out = [x for x in t.span_c if not lo <= x <= hi]
    if not out:
        return None, None
    worst = max(out, key=lambda x: max(lo - x, x - hi))
    return (f"the meter's temperature reached {worst:.1f} degC (reported {seen}), outside the certificate's "
            f"temperature range {lo:g}..{hi:g} degC where its temperature coefficient and uncertainty hold"), None


def governing_level(standard: str, tier: str, freq_hz=None, band=None, fallback_range=None) -> tuple[ReferenceLevel, str]:
    """The reference level to judge a broadband reading by, and a note saying how it was chosen.

    A declared frequency is used as it is; for a band (or, with nothing declared, the
    certificate's frequency range) the most restrictive E level in the band is taken.
    """
    if freq_hz:
        rl = reference_level(standard, tier, float(freq_hz), WHOLE_BODY)
        return rl, f"declared frequency {units.format_frequency(float(freq_hz))}"
    lo, hi = band if band else (fallback_range or (None, None))
    if not lo or not hi:
        raise MeterlinkError("no frequency declared and no band known: give --freq or --band")
    best = most_restrictive_level(standard, tier, lo, hi, WHOLE_BODY)
    how = "declared band" if band else "no frequency declared: certificate range"
    return best, (f"{how} {units.format_frequency(lo)}-{units.format_frequency(hi)}; most restrictive level "
                  f"at {units.format_frequency(best.freq_hz)}")


def averaging_time_s(standard: str, tier: str, freq_hz=None, band=None) -> float | None:
    """The averaging time to judge by at a frequency or over a band; None: instantaneous values.

    Over a band a broadband probe cannot tell where the field is, so the shortest averaging time
    of any row in the band applies, and none at all if any row prescribes none (e.g. below
    100 kHz in ICNIRP 1998, Tables 6-7 notes): the conservative choice, never an invented time.
    """
    if freq_hz:
        return reference_level(standard, tier, float(freq_hz), WHOLE_BODY).averaging_time_s
    lo, hi = float(min(band)), float(max(band))
    grid = [lo * (hi / lo) ** (i / 200) for i in range(201)] if hi > lo else [lo]
    found = []
    for f in grid:
        try:
            found.append(reference_level(standard, tier, f, WHOLE_BODY))
        except MeterlinkError:
            pass
    edges = {x for r in found for x in (r.band_lo_hz, r.band_hi_hz) if lo < x < hi}
    for x in edges:
        for f in (x * (1 - 1e-9), x * (1 + 1e-9)):
            try:
                found.append(reference_level(standard, tier, f, WHOLE_BODY))
            except MeterlinkError:
                pass
    times = [r.averaging_time_s for r in found]
    if not times or any(t is None for t in times):
        return None
    return float(min(times))


def _time_average(t_s, e, window_s):
    """(value, t_end, complete, coverage, partial max): the highest complete running average, or
    the whole-record power-domain mean (complete False) when no window of length T lies inside;
    with no averaging time (window_s None), the highest instantaneous value."""
    ok = np.isfinite(e)
    t_s, e = t_s[ok], e[ok]
    if e.size == 0:
        return math.nan, None, False, 0.0, None
    if window_s is None:
        i = int(np.argmax(e))
        return float(e[i]), float(t_s[i]), True, 1.0, None
    if e.size == 1:
        return float(e[0]), float(t_s[0]), False, 0.0, None
    ra = running_average(t_s, e, window_s)
    part = ra.partial & np.isfinite(ra.e_rms_v_per_m)
    pmax = float(np.max(ra.e_rms_v_per_m[part])) if part.any() else None
    if np.any(ra.complete):
        i = int(np.nanargmax(np.where(ra.complete, ra.e_rms_v_per_m, -np.inf)))
        return float(ra.e_rms_v_per_m[i]), float(ra.t_end_s[i]), True, float(ra.coverage[i]), pmax
    # shorter than the averaging time: power-domain mean over what was recorded (reported, not judged)
    dt = np.diff(t_s)
    hold = np.append(dt, np.median(dt))
    mean = math.sqrt(float(np.sum(e * e * hold) / np.sum(hold)))
    return mean, float(t_s[-1]), False, min(1.0, float(np.sum(hold) / window_s)), pmax


def assess_field(series, standard: str, tier: str, rule: str, *, freq_hz=None, band=None,
                 fallback_range=None, near_field: bool = False, has_h: bool = False) -> Assessment:
    """Assess a broadband (isotropic probe) series against a standard's whole-body level."""
    governing_level(standard, tier, freq_hz, band, fallback_range)     # no frequency known: a clear error first
    window = averaging_time_s(standard, tier, freq_hz, band or fallback_range)
    return assess_field_stats(field_stats(series, window), series, standard, tier, rule, freq_hz=freq_hz,
                              band=band, fallback_range=fallback_range, near_field=near_field, has_h=has_h)


def field_stats(series, window_s) -> FieldStats:
    """The statistics assess_field judges, from a series held in memory."""
    e = np.asarray(series.e_v_per_m, dtype=float)
    t = np.asarray(series.t_utc, dtype=float)
    flags = np.asarray(series.flags)
    finite = np.isfinite(e)
    n_above = int(np.count_nonzero(flags & ABOVE_RANGE))
    n_below = int(np.count_nonzero(flags & BELOW_RANGE))
    freq_out, freq_assumed = bool(np.any(flags & FREQ_OUT)), bool(np.any(flags & FREQ_ASSUMED))
    if not finite.any():
        return FieldStats(0, math.nan, math.nan, math.nan, None, False, 0.0, None, math.nan, n_above, n_below,
                          freq_out, freq_assumed)
    ipk = int(np.nanargmax(np.where(finite, e, -np.inf)))
    value, t_end, complete, coverage, pmax = _time_average(t, e, window_s)
    u = float(np.nanmax(np.asarray(series.u_expanded_db)[finite]))
    return FieldStats(int(finite.sum()), float(e[ipk]), float(t[ipk]), value, t_end, complete, coverage, pmax, u,
                      n_above, n_below, freq_out, freq_assumed)


def assess_field_stats(st: FieldStats, series, standard: str, tier: str, rule: str, *, freq_hz=None, band=None,
                       fallback_range=None, near_field: bool = False, has_h: bool = False) -> Assessment:
    """Judge a broadband record from its statistics (held in memory or streamed, see physics.streaming).

    ``series`` gives only session_id, certificate_name, warnings and temperatures."""
    r = get_rule(rule)
    rl, fnote = governing_level(standard, tier, freq_hz, band, fallback_range)
    window = averaging_time_s(standard, tier, freq_hz, band or fallback_range)
    notes = list(series.warnings)
    above, below, freq_out = st.n_above, st.n_below, st.freq_out
    if above:
        notes.append(f"{above} readings above the probe's calibrated range: the average is a lower bound")
    if below:
        notes.append(f"{below} readings below the calibrated range (reported at the range floor, an upper bound)")
    if st.freq_assumed:
        notes.append("frequency not known exactly: worst-case frequency correction applied")
    nf = near_field_check(rl.freq_hz, has_e=True, has_h=has_h, near_field=near_field)
    if nf is not None:
        notes.append(nf.message)
    t_reason, t_note = temperature_check(getattr(series, "temperatures", None))
    if t_note:
        notes.append(t_note)
    if st.n_finite == 0:
        raise MeterlinkError(f"session {series.session_id} has no usable calibrated values")
    value, t_end, complete, coverage, pmax = st.value_v_per_m, st.t_value_end_s, st.complete, st.coverage, \
        st.partial_max_v_per_m
    if window is None:
        notes.append(f"{standard} prescribes no averaging time here: instantaneous values are compared "
                     f"(the highest reading is judged)")
    elif not complete:
        notes.append(f"no complete {window / 60:g}-minute window inside the record (shorter than the averaging "
                     f"time, or too many gaps): the power-domain mean over the recorded time is reported as a "
                     f"partial value, not as the standard's average")
    if not complete:
        pmax = None                      # the partial mean above already says it
    if pmax is not None and window is not None:
        notes.append(f"partial windows at the start of the record (shorter than {window / 60:g} min, not the "
                     f"standard's average) reach at most {pmax:.4g} V/m")
    u = st.u_max_db
    limit = rl.e_v_per_m
    verdict = decide_field(value, limit, u, r)
    reasons = []
    if freq_out:
        what = (f"declared frequency {units.format_frequency(float(freq_hz))}" if freq_hz else
                f"declared band {units.format_frequency(band[0])}-{units.format_frequency(band[1])}" if band
                else "frequency")
        rng = (f" ({units.format_frequency(fallback_range[0])}-{units.format_frequency(fallback_range[1])})"
               if fallback_range else "")
        reasons.append(f"the {what} lies outside the certificate's calibrated frequency range{rng}, "
                       f"where the probe's response and uncertainty are unknown")
    if window is not None and not complete:
        reasons.append(f"the {window / 60:g}-minute average is incomplete (coverage {100 * coverage:.1f} % of one "
                       f"window)")
    if t_reason:
        reasons.append(t_reason)
    if reasons:
        verdict = not_assessable(verdict, "; ".join(reasons))
    else:
        if above:
            verdict = lower_bound(verdict, "readings above the probe's calibrated range make the value a lower bound")
        if nf is not None:
            verdict = lower_bound(verdict, nf.message.rstrip("."))
        if below:
            verdict = upper_bound(verdict, "readings below the calibrated range make the value an upper bound")
    return Assessment(series.session_id, standard, tier, rl.tier_label, r.name, "broadband", fnote, window,
                      st.peak_v_per_m, st.t_peak_s, value, t_end, complete, coverage, limit, rl.e_derived,
                      verdict.ratio_power, u, verdict, rl.source, rl.status, series.certificate_name,
                      st.n_finite, (), tuple(notes),
                      "instantaneous" if window is None else "time average", pmax)


def sweep_weights_s(t_s) -> np.ndarray:
    """Seconds each sweep stands for: until the next sweep, at most ``HOLD_FACTOR`` median
    intervals (a longer gap is not filled), the last one a median interval (as in averaging.py)."""
    t = np.asarray(t_s, dtype=float)
    if t.size < 2:
        return np.ones(t.size)
    dt = np.diff(t)
    med = float(np.median(dt)) if np.median(dt) > 0 else 1.0
    return np.minimum(np.append(dt, med), HOLD_FACTOR * med)


def assess_spectrum(series, standard: str, tier: str, rule: str, *, near_field: bool = False,
                    floor_v_per_m=None) -> Assessment:
    """Assess frequency-selective (dipole) sweeps: per-frequency power-domain time average, standard's sum rule.

    A line below the receiver's floor in a sweep is not 0 V/m: with ``floor_v_per_m`` (one
    orientation's floor per frequency, :func:`meterlink.physics.calibrate.floor_e_v_per_m`) it counts at
    sqrt(3) times the floor (all three orientations just below it), an upper bound, and is flagged.
    Sweeps are weighted by the time each stands for, not equally.
    """
    r = get_rule(rule)
    full = series.orientations == series.orientations.max() if series.orientations.size else []
    e_sw = np.asarray(series.e_v_per_m[full], dtype=float)   # sweeps that saw every orientation
    seen = np.isfinite(e_sw).any(axis=0)
    if not seen.any():
        raise MeterlinkError(f"session {series.session_id} has no emitter above the receiver's floor")
    freqs = series.freq_hz[seen]
    e_sw = e_sw[:, seen]
    below = ~np.isfinite(e_sw)
    # orientations that did not see a line in a sweep (all three where the line is NaN)
    n_seen = getattr(series, "n_seen", None)
    missing = (np.where(below, 0, 3 - np.asarray(n_seen)[full][:, seen]) if n_seen is not None
               else np.zeros(e_sw.shape, dtype=np.int64))
    missing = np.where(below, 3, np.clip(missing, 0, 3))
    notes = list(series.warnings)
    if floor_v_per_m is not None and missing.any():
        fl = np.asarray(floor_v_per_m, dtype=float)[seen]
        below = missing > 0
        # each unseen orientation is "< floor": at most the floor, an upper bound
        e_sw = np.sqrt(np.where(np.isfinite(e_sw), e_sw, 0.0) ** 2 + missing * fl[None, :] ** 2)
        notes.append(f"{int(missing.sum())} orientation values below the receiver's floor counted as "
                     f"'< floor' (upper bound: at the floor)")
    elif below.any():
        e_sw = np.where(below, 0.0, e_sw)
        notes.append(f"{int(below.sum())} line values below the receiver's floor counted as 0 V/m "
                     f"(no floor known): the total is not an upper bound")
    t_sw = np.asarray(series.t_utc[full], dtype=float)
    order = np.argsort(t_sw, kind="stable")
    t_sw, e_sw, below = t_sw[order], e_sw[order], below[order]
    w = sweep_weights_s(t_sw)
    p = e_sw ** 2
    window = None
    try:
        window = averaging_time_s(standard, tier, band=(float(freqs.min()), float(freqs.max())))
    except MeterlinkError:
        pass
    mf_args = dict(standard=standard, tier=tier, near_field=near_field)
    span = float(t_sw[-1] - t_sw[0] + w[-1]) if t_sw.size else 0.0
    if window is None:
        # no averaging time in the standard: each sweep is judged as it stands; the largest sum governs
        totals = [multi_frequency(freqs, e_v_per_m=np.sqrt(p[i]), **mf_args).total for i in range(t_sw.size)]
        k = int(np.argmax(totals))
        e_mean, t_value, complete, coverage = np.sqrt(p[k]), float(t_sw[k]), True, 1.0
        notes.append(f"{standard} prescribes no averaging time over these frequencies: each sweep is judged as "
                     f"it stands (the largest total is reported)")
    else:
        e_mean, t_value, complete, coverage = _spectrum_window(t_sw, p, w, window, freqs, mf_args)
        if not complete:
            notes.append(f"sweeps cover {span / 60:.3g} min, less than the {window / 60:g}-minute averaging time: "
                         f"the time-weighted mean over the recorded sweeps is reported as a partial value, "
                         f"not as the standard's average")
    mf = multi_frequency(freqs, e_v_per_m=e_mean, **mf_args)
    total = float(mf.total)
    u = float(np.max(series.u_expanded_db[seen]))
    verdict = decide_ratio(total, u, r)
    emitters = [Emitter(float(f), float(e_mean[i]), float(mf.emitter_ratio[i]), _term_quantity(mf, float(f)),
                        float(mf.share[i])) for i, f in enumerate(freqs)]
    emitters.sort(key=lambda em: -em.share)
    notes += list(mf.messages)
    over = freqs[(series.flags[seen] & ABOVE_RANGE) != 0]
    if over.size:
        notes.append("receiver above its calibrated level range at " + ", ".join(units.format_frequency(f) for f in over)
                     + ": those emitters are lower bounds")
    out = freqs[(series.flags[seen] & FREQ_OUT) != 0]
    t_reason, t_note = temperature_check(getattr(series, "temperatures", None))
    if t_note:
        notes.append(t_note)
    reasons = []
    if window is not None and not complete:
        reasons.append(f"the {window / 60:g}-minute average is incomplete (sweeps cover {100 * coverage:.1f} % of "
                       f"one window)")
    if out.size:
        reasons.append("lines at " + ", ".join(units.format_frequency(f) for f in out)
                       + " lie outside the certificate's calibrated frequency range")
    if t_reason:
        reasons.append(t_reason)
    if reasons:
        verdict = not_assessable(verdict, "; ".join(reasons))
    else:
        if over.size:
            verdict = lower_bound(verdict, "the receiver was overloaded at some emitters, so those values are lower "
                                           "bounds; add attenuation and measure again")
        if floor_v_per_m is not None and below.any():
            verdict = upper_bound(verdict, "lines below the receiver's floor were counted at the floor, so the "
                                           "total is an upper bound")
    peak = float(np.sqrt(p.sum(axis=1)).max())      # largest total (all emitters) of one sweep
    rms_total = float(np.sqrt(np.sum(e_mean**2)))
    return Assessment(series.session_id, standard, tier, _tier_label(standard, tier, freqs), r.name,
                      "frequency-selective", f"{freqs.size} emitters in {int(np.count_nonzero(full))} sweeps",
                      window, peak, None, rms_total, t_value, complete, coverage, None, False, total, u, verdict,
                      mf.source, mf.status, series.certificate_name, int(np.count_nonzero(full)), tuple(emitters),
                      tuple(notes), "instantaneous" if window is None else "time average")


#: Windows evaluated exactly with the summation rule; beyond this, the largest by a linear proxy.
_EXACT_WINDOWS = 2000


def _spectrum_window(t, p, w, window, freqs, mf_args):
    """(E per line, end time, complete, coverage) of the complete window of length T with the largest
    total exposure ratio; the time-weighted mean of all sweeps (incomplete) when none lies inside."""
    start, end = t, t + w          # each sweep stands for [t_i, t_i + w_i)
    cum = np.concatenate([np.zeros((1, p.shape[1])), np.cumsum(p * w[:, None], axis=0)])
    cw = np.concatenate([[0.0], np.cumsum(w)])
    ks = np.flatnonzero(end - start[0] >= window * (1 - 1e-9))     # windows inside the record
    js = np.searchsorted(end, end[ks] - window, side="right")       # first sweep ending inside each
    covered = cw[ks + 1] - cw[js]
    ok = (covered >= 0.9 * window - 1e-9) & (covered > 0)
    ks, js, covered = ks[ok], js[ok], covered[ok]
    if ks.size == 0:
        mean_p = cum[-1] / cw[-1]
        return np.sqrt(mean_p), float(end[-1]), False, min(1.0, float(cw[-1]) / window)
    mean_p = (cum[ks + 1] - cum[js]) / covered[:, None]
    if ks.size > _EXACT_WINDOWS:
        # rank the windows by each line's share of the whole-record sum (exact for squared terms),
        # then evaluate the summation rule exactly on the leading ones
        whole = cum[-1] / cw[-1]
        mf = multi_frequency(freqs, e_v_per_m=np.sqrt(whole), **mf_args)
        coef = np.divide(mf.emitter_ratio, whole, out=np.zeros_like(whole), where=whole > 0)
        cand = np.argsort(mean_p @ coef)[-200:]
    else:
        cand = np.arange(ks.size)
    totals = [multi_frequency(freqs, e_v_per_m=np.sqrt(mean_p[c]), **mf_args).total for c in cand]
    c = int(cand[int(np.argmax(totals))])
    return np.sqrt(mean_p[c]), float(end[ks[c]]), True, min(1.0, float(covered[c]) / window)


def _term_quantity(mf, freq_hz: float) -> str:
    """The ratio an emitter's term uses in the governing sum, e.g. 'S/S_L'."""
    for term in mf.terms:
        if term.freq_hz == freq_hz and (term.effect, term.group) == mf.governing:
            return term.quantity
    return ""


def _tier_label(standard, tier, freqs) -> str:
    try:
        return reference_level(standard, tier, float(freqs[0]), WHOLE_BODY).tier_label
    except MeterlinkError:
        return tier
