"""Assessing a recorded session against a standard: time-averaged exposure, both percent terms, verdict.

Pure functions of calibrated series (FieldSeries / SpectrumSeries) plus the reference-level data;
`assess_session` is the thin I/O wrapper that reads the series from a Store.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from meterlink import units
from meterlink.averaging import running_average
from meterlink.calibrate import ABOVE_RANGE, BELOW_RANGE, FREQ_ASSUMED, FREQ_OUT
from meterlink.errors import MeterlinkError
from meterlink.exposure import multi_frequency, near_field_check
from meterlink.limits import ReferenceLevel, most_restrictive_level, reference_level
from meterlink.verdict import Verdict, decide_field, decide_ratio, get_rule

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

    @property
    def percent_field(self) -> float:
        return 100.0 * math.sqrt(self.total_exposure_ratio)

    @property
    def percent_power(self) -> float:
        return 100.0 * self.total_exposure_ratio


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


def _time_average(t_s, e, window_s):
    """Max complete running average, or the whole-record power-domain mean when none is complete."""
    ok = np.isfinite(e)
    t_s, e = t_s[ok], e[ok]
    if e.size == 0:
        return math.nan, None, False, 0.0
    if e.size == 1:
        return float(e[0]), float(t_s[0]), False, 0.0
    ra = running_average(t_s, e, window_s)
    if np.any(ra.complete):
        i = int(np.nanargmax(np.where(ra.complete, ra.e_rms_v_per_m, -np.inf)))
        return float(ra.e_rms_v_per_m[i]), float(ra.t_end_s[i]), True, float(ra.coverage[i])
    # shorter than the averaging time: power-domain mean over what was recorded
    dt = np.diff(t_s)
    hold = np.append(dt, np.median(dt))
    mean = math.sqrt(float(np.sum(e * e * hold) / np.sum(hold)))
    return mean, float(t_s[-1]), False, float(np.sum(hold) / window_s)


def assess_field(series, standard: str, tier: str, rule: str, *, freq_hz=None, band=None,
                 fallback_range=None, near_field: bool = False, has_h: bool = False) -> Assessment:
    """Assess a broadband (isotropic probe) series against a standard's whole-body level."""
    r = get_rule(rule)
    rl, fnote = governing_level(standard, tier, freq_hz, band, fallback_range)
    window = rl.averaging_time_s or 360.0
    e = np.asarray(series.e_v_per_m, dtype=float)
    t = np.asarray(series.t_utc, dtype=float)
    notes = list(series.warnings)
    flags = np.asarray(series.flags)
    above = int(np.count_nonzero(flags & ABOVE_RANGE))
    if above:
        notes.append(f"{above} readings above the probe's calibrated range: the average is a lower bound")
    below = int(np.count_nonzero(flags & BELOW_RANGE))
    if below:
        notes.append(f"{below} readings below the calibrated range (reported at the range floor, an upper bound)")
    if np.any(flags & FREQ_OUT):
        notes.append("declared frequency outside the certificate's range: correction held at the table edge")
    if np.any(flags & FREQ_ASSUMED):
        notes.append("frequency not known exactly: worst-case frequency correction applied")
    nf = near_field_check(rl.freq_hz, has_e=True, has_h=has_h, near_field=near_field)
    if nf is not None:
        notes.append(nf.message)
    finite = np.isfinite(e)
    if not finite.any():
        raise MeterlinkError(f"session {series.session_id} has no usable calibrated values")
    ipk = int(np.nanargmax(np.where(finite, e, -np.inf)))
    value, t_end, complete, coverage = _time_average(t, e, window)
    if not complete:
        notes.append(f"record shorter than the {window / 60:g}-minute averaging time (or too many gaps): "
                     f"the power-domain mean over the recorded time is judged instead")
    u = float(np.nanmax(series.u_expanded_db[finite])) if finite.any() else math.nan
    limit = rl.e_v_per_m
    verdict = decide_field(value, limit, u, r)
    if verdict.outcome == "compliant" and (above or nf is not None):
        verdict = decide_ratio(verdict.ratio_power, u, "guarded")
        verdict = Verdict("undecided", r.name, verdict.ratio_field, verdict.ratio_power, verdict.percent_field,
                          verdict.percent_power, u, verdict.k, verdict.acceptance_limit_ratio,
                          "Undecided: " + ("readings above the probe's range" if above else nf.message)
                          + "; the measurement cannot show compliance as it stands.")
    return Assessment(series.session_id, standard, tier, rl.tier_label, r.name, "broadband", fnote, window,
                      float(e[ipk]), float(t[ipk]), value, t_end, complete, coverage, limit, rl.e_derived,
                      verdict.ratio_power, u, verdict, rl.source, rl.status, series.certificate_name,
                      int(finite.sum()), (), tuple(notes))


def assess_spectrum(series, standard: str, tier: str, rule: str, *, near_field: bool = False) -> Assessment:
    """Assess frequency-selective (dipole) sweeps: per-frequency power-domain mean, standard's sum rule."""
    r = get_rule(rule)
    full = series.orientations == series.orientations.max() if series.orientations.size else []
    e_sw = series.e_v_per_m[full]          # only sweeps that saw every orientation the receiver uses
    p = np.where(np.isfinite(e_sw), e_sw, 0.0) ** 2
    seen = np.isfinite(e_sw).any(axis=0)
    if not seen.any():
        raise MeterlinkError(f"session {series.session_id} has no emitter above the receiver's floor")
    e_mean = np.sqrt(p.mean(axis=0))[seen]
    freqs = series.freq_hz[seen]
    mf = multi_frequency(freqs, standard=standard, tier=tier, e_v_per_m=e_mean, near_field=near_field)
    total = float(mf.total)
    u = float(np.max(series.u_expanded_db[seen]))
    verdict = decide_ratio(total, u, r)
    emitters = [Emitter(float(f), float(e_mean[i]), float(mf.emitter_ratio[i]), _term_quantity(mf, float(f)),
                        float(mf.share[i])) for i, f in enumerate(freqs)]
    emitters.sort(key=lambda em: -em.share)
    notes = list(series.warnings) + list(mf.messages)
    over = freqs[(series.flags[seen] & ABOVE_RANGE) != 0]
    if over.size:
        notes.append("receiver above its calibrated level range at " + ", ".join(units.format_frequency(f) for f in over)
                     + ": those emitters are lower bounds")
        if verdict.outcome == "compliant":
            verdict = Verdict("undecided", r.name, verdict.ratio_field, verdict.ratio_power, verdict.percent_field,
                              verdict.percent_power, u, verdict.k, verdict.acceptance_limit_ratio,
                              "Undecided: the receiver was overloaded at some emitters, so the measurement cannot "
                              "show compliance as it stands; add attenuation and measure again.")
    peak = float(np.sqrt(p.sum(axis=1)).max())      # largest total (all emitters) of one sweep
    window = None
    try:
        window = reference_level(standard, tier, float(freqs[np.argmax(e_mean)]), WHOLE_BODY).averaging_time_s
    except MeterlinkError:
        pass
    t_sw = series.t_utc[full]
    span = float(np.nanmax(t_sw) - np.nanmin(t_sw)) if t_sw.size > 1 else 0.0
    complete = bool(window and span >= window)
    if not complete:
        notes.append("sweeps cover less than the averaging time: the mean over the recorded sweeps is judged")
    rms_total = float(np.sqrt(np.sum(e_mean**2)))
    return Assessment(series.session_id, standard, tier, _tier_label(standard, tier, freqs), r.name,
                      "frequency-selective", f"{freqs.size} emitters in {int(np.count_nonzero(full))} sweeps",
                      window, peak,
                      None, rms_total, float(np.nanmax(series.t_utc)) if series.t_utc.size else None, complete,
                      min(1.0, span / window) if window else 0.0, None, False, total, u, verdict, mf.source,
                      mf.status, series.certificate_name, int(np.count_nonzero(full)), tuple(emitters), tuple(notes))


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
