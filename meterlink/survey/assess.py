"""From captured samples to an assessed point: limit, percent in both terms, verdict, extrapolation,
follow-up flag (pure; uses limits, exposure and verdict)."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from meterlink.errors import MeterlinkError
from meterlink.physics.exposure import multi_frequency, near_field_check, percent_of_limit
from meterlink.physics.limits import most_restrictive_level
from meterlink.survey.model import Emitter, Point, PointResult, Sample, Source, SurveyPlan
from meterlink.survey.spatial import spatial_average
from meterlink.physics.calibrate import ABOVE_RANGE, BELOW_RANGE, FREQ_OUT
from meterlink.physics.verdict import decide_field, decide_ratio, lower_bound, not_assessable, upper_bound

#: An emitter matches a listed source when their frequencies agree within this fraction.
MATCH_REL = 0.005
MIN_COVERAGE = 0.9


@dataclass(frozen=True)
class Broadband:
    """The E reference level a broadband value is compared with: the lowest over the band."""

    e_v_per_m: float
    freq_hz: float
    averaging_time_s: float | None   # None: the standard prescribes none here (instantaneous values)
    band_hz: tuple[float, float]
    source: str


def broadband_reference(standard: str, tier: str, band_hz: tuple[float, float] | float) -> Broadband:
    """Lowest whole-body E reference level over a band (or at one frequency): a broadband probe
    cannot tell frequencies apart, so the most restrictive level applies (common practice)."""
    if np.ndim(band_hz) == 0:
        lo = hi = float(band_hz)
    else:
        lo, hi = float(band_hz[0]), float(band_hz[1])
    from meterlink.physics.assessment import averaging_time_s

    best = most_restrictive_level(standard, tier, lo, hi)
    # the shortest averaging time in the band, none if any row prescribes none: never a default
    avg = averaging_time_s(standard, tier, lo if lo == hi else None, None if lo == hi else (lo, hi))
    return Broadband(float(best.e_v_per_m), float(best.freq_hz), None if avg is None else float(avg),
                     (lo, hi), best.source)


def source_factor(sources: tuple[Source, ...], freq_hz: float | None = None) -> float:
    """Field extrapolation factor: of the matching source for a frequency, or for a broadband value
    the largest of all sources (worst case: all the field from the source with most headroom)."""
    fac = [(s, s.extrapolation_factor) for s in sources if s.extrapolation_factor]
    if freq_hz is not None:
        m = [f for s, f in fac if abs(s.freq_hz - freq_hz) <= MATCH_REL * s.freq_hz]
        return m[0] if m else 1.0
    return max([f for _, f in fac], default=1.0)


def _name(sources, f):
    m = [s.name for s in sources if abs(s.freq_hz - f) <= MATCH_REL * s.freq_hz]
    return m[0] if m else f"{f / 1e6:.3f} MHz"


def _highest_sweep(plan: SurveyPlan, samples: tuple[Sample, ...], near_field: bool) -> dict[float, float] | None:
    """The lines of the single sweep with the largest total by the standard's summation rule; None
    without per-sweep data. Where the standard prescribes no averaging time, values are compared as
    they stand (instantaneous), never as a mean over the capture."""
    best, best_total = None, -np.inf
    for s in samples:
        for sweep in s.sweeps:
            if not sweep:
                continue
            f = np.array([x[0] for x in sweep])
            total = multi_frequency(f, standard=plan.standard, tier=plan.tier,
                                    e_v_per_m=np.array([x[1] for x in sweep]), near_field=near_field).total
            if total > best_total:
                best, best_total = dict(sweep), total
    return best


def _emitters(plan: SurveyPlan, samples: tuple[Sample, ...], near_field: bool, instantaneous: bool = False):
    """Per-frequency E averaged over the samples in power (or, with no averaging time in the standard,
    of the highest single sweep), the summation-rule totals, measured and extrapolated; None without
    frequency-selective data."""
    if not any(s.emitters for s in samples):
        return None
    power: dict[float, float] = {}
    for s in samples:
        for _, f, e in s.emitters:
            power[f] = power.get(f, 0.0) + e * e / len(samples)
    peak = _highest_sweep(plan, samples, near_field) if instantaneous else None
    if peak:
        power = {f: e * e for f, e in peak.items()}
    freqs = np.array(sorted(power))
    e = np.sqrt([power[f] for f in freqs])
    fac = np.array([source_factor(plan.sources, f) for f in freqs])
    names = [_name(plan.sources, f) for f in freqs]
    res = multi_frequency(freqs, standard=plan.standard, tier=plan.tier, e_v_per_m=e, labels=names,
                          near_field=near_field)
    res_x = multi_frequency(freqs, standard=plan.standard, tier=plan.tier, e_v_per_m=e * fac, labels=names,
                            near_field=near_field)
    ems = tuple(Emitter(n, float(f), float(v), float(v * k), float(r), float(sh))
                for n, f, v, k, r, sh in zip(names, freqs, e, fac, res.emitter_ratio, res.share))
    return ems, res, res_x


def point_temperatures(samples: tuple[Sample, ...], range_c: tuple[float, float] | None):
    """The meter's temperatures over a point's samples against the certificate's stated range."""
    from meterlink.physics.assessment import Temperatures

    spans = [s.temp_span_c for s in samples if s.temp_span_c is not None]
    return Temperatures((min(a for a, _ in spans), max(b for _, b in spans)) if spans else None, range_c)


def assess(plan: SurveyPlan, point: Point, samples: tuple[Sample, ...], ref: Broadband, *,
           interrupted: bool = False, shortened: bool = False, warnings: tuple[str, ...] = (),
           temperatures=None) -> PointResult:
    """Combine a point's samples (power domain) and judge the result by the plan's decision rule.

    temperatures (meterlink.physics.assessment.Temperatures, see point_temperatures): outside the
    certificate's temperature range there is no verdict; None: not checked."""
    from meterlink.physics.assessment import temperature_check

    if not samples:
        raise MeterlinkError(f"point {point.label!r}: no readings were captured")
    e_s = np.array([s.e_v_per_m for s in samples])
    e = spatial_average(e_s) if len(samples) > 1 else float(e_s[0])
    u = max(s.u_expanded_db for s in samples)
    axes = tuple(float(spatial_average([s.axes_v_per_m[i] for s in samples])) for i in range(3))
    n = sum(s.n_readings for s in samples)
    cov = min(s.coverage for s in samples)
    complete = not interrupted and cov >= MIN_COVERAGE
    warn = list(warnings)
    if interrupted:
        warn.append("interrupted: the average is incomplete")
    elif cov < MIN_COVERAGE:
        warn.append(f"coverage {100 * cov:.0f} % of the time: incomplete")
    if shortened and ref.averaging_time_s:
        warn.append(f"shorter than the standard's averaging time of {ref.averaging_time_s / 60:g} min")
    instantaneous = ref.averaging_time_s is None
    t_reason, t_note = temperature_check(temperatures)
    if t_note:
        warn.append(t_note)
    if point.near_field:
        nf = near_field_check(ref.freq_hz, has_e=True, has_h=False, near_field=True)
        warn.append(nf.message if nf else "marked near field")
    sel = _emitters(plan, samples, point.near_field, instantaneous)
    if instantaneous:
        what = "sweep (largest total by the summation rule)" if sel is not None else "reading"
        warn.append(f"the standard prescribes no averaging time here: the highest single {what} is judged")
    ratio = ratio_x = None
    ems = ()
    if sel is not None:
        ems, res, res_x = sel
        ratio, ratio_x = float(res.total), float(res_x.total)
        ver = decide_ratio(ratio, u, plan.rule)
        ver_x = decide_ratio(ratio_x, u, plan.rule)
        e_x = float(np.sqrt(sum(m.e_extrapolated_v_per_m ** 2 for m in ems)))
        pct_f, pct_p, pct_px = ver.percent_field, ver.percent_power, ver_x.percent_power
        warn += list(res.messages)
    else:
        if instantaneous:     # compare instantaneous values, not a mean over the capture
            e = float(max(s.e_max_v_per_m for s in samples))
        e_x = e * source_factor(plan.sources)
        ver = decide_field(e, ref.e_v_per_m, u, plan.rule)
        ver_x = decide_field(e_x, ref.e_v_per_m, u, plan.rule)
        pol = percent_of_limit(e, ref.e_v_per_m, "e")
        pct_f, pct_p = pol.percent_field, pol.percent_power
        pct_px = percent_of_limit(e_x, ref.e_v_per_m, "e").percent_power
    flags = 0
    for s in samples:
        flags |= s.flags
    reasons = []
    if interrupted or cov < MIN_COVERAGE:
        reasons.append(f"the capture is incomplete (coverage {100 * cov:.1f} %"
                       + (", interrupted)" if interrupted else ")"))
    if flags & FREQ_OUT:
        reasons.append("the frequency lies outside the certificate's calibrated frequency range, where the "
                       "instrument's response and uncertainty are unknown")
    if shortened and not instantaneous:
        reasons.append(f"the capture is shorter than the standard's {ref.averaging_time_s / 60:g}-minute "
                       f"averaging time")
    if t_reason:
        reasons.append(t_reason)
    if reasons:        # an incomplete average gets no conformity statement, only the measured value
        complete = False
        ver, ver_x = (not_assessable(v, "; ".join(reasons)) for v in (ver, ver_x))
    elif flags & ABOVE_RANGE:    # a reading or a line beyond the instrument's range: the value is a lower bound
        why = "part of the field was above the instrument's calibrated range, so the value is only a lower bound"
        ver, ver_x = (lower_bound(v, why) for v in (ver, ver_x))
    elif flags & BELOW_RANGE:    # readings or lines below the range counted at the floor: an upper bound
        why = "values below the instrument's range were counted at its floor, so the value is an upper bound"
        ver, ver_x = (upper_bound(v, why) for v in (ver, ver_x))
    if flags & ABOVE_RANGE:
        complete = False
        warn.append("above the instrument's range: the value is a lower bound")
    verdict, statement, verdict_x = ver.outcome, ver.statement, ver_x.outcome
    thr = plan.followup.threshold_v_per_m(ref.e_v_per_m)
    follow = sel is None and thr is not None and e >= thr
    return PointResult(
        point=point, scheme=point.scheme.name if point.scheme else point.mode, e_v_per_m=float(e),
        e_max_v_per_m=float(max(s.e_max_v_per_m for s in samples)), axes_v_per_m=axes, u_expanded_db=float(u),
        n_readings=int(n), coverage=float(cov), complete=complete, flags=int(flags), warnings=tuple(warn),
        samples=tuple(samples), e_limit_v_per_m=ref.e_v_per_m, percent_field=float(pct_f),
        percent_power=float(pct_p), verdict=verdict, statement=statement, followup=bool(follow),
        e_extrapolated_v_per_m=float(e_x), percent_power_extrapolated=float(pct_px),
        verdict_extrapolated=verdict_x, exposure_ratio=ratio, exposure_ratio_extrapolated=ratio_x,
        emitters=ems, t_start_utc=min(s.t_start_utc for s in samples),
        t_end_utc=max(s.t_end_utc for s in samples),
        duration_s=float(sum(s.t_end_utc - s.t_start_utc for s in samples)))
