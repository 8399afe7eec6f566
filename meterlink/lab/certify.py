"""From lab readings to a meterlink-cert/1 certificate; as-found / as-left against the previous one.

Conformity is decided per frequency against the specification tolerance T (two-sided, dB) with
a recorded decision rule of meterlink.physics.verdict (ILAC-G8:2019): simple |e| <= T; guarded with
w = U: conforming if |e| + U <= T, not conforming if |e| - U > T, else undecided; the worst-case
(binary) rule treats undecided as not conforming.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np

from meterlink.physics.calibrate import calibrate_axes
from meterlink.physics.certificate import FORMAT, KIND_PROBE, ProbeCertificate
from meterlink.lab import analysis as an
from meterlink.lab.budget import FIELD_STANDARD, LabBudget, calibration_budget
from meterlink.lab.session import AXES, LabError, LabSession
from meterlink.physics.uncertainty import Component
from meterlink.physics.verdict import COMPLIANT, NOT_COMPLIANT, UNDECIDED, get_rule

#: Without temperature steps: kept from the previous certificate, else these defaults.
TEMP_COEFF_DEFAULT_DB_PER_C, TEMP_COEFF_HALFWIDTH_DEFAULT_DB_PER_C = 0.0, 0.01


def _up(x: float, step: float = 0.01) -> float:
    """Round up to a multiple of step, as a certificate states an uncertainty or a bound."""
    return round(math.ceil(x / step - 1e-9) * step, 10)


@dataclass(frozen=True)
class Calibration:
    """Everything the analysis derived: the certificate and the tables behind it."""

    session: LabSession
    certificate: ProbeCertificate
    linearity: tuple[an.Linearity, ...]
    response: an.FrequencyResponse
    isotropy: tuple[an.Isotropy, ...]
    budget: LabBudget
    temperature: an.TemperatureResponse | None = None


def analyse(session: LabSession, results, previous: ProbeCertificate | None = None) -> Calibration:
    """Zero, linearity, frequency response, budget, isotropy -> certificate."""
    zero = an.zero_counts(results)
    tables = an.axis_tables(results, zero, session.ref_freq_hz)
    lin = an.linearity(results, tables)
    fr = an.frequency_response(results, tables)
    ua = [x for x in (*fr.u_a_axes_db.ravel(), *fr.u_a_total_db, *(u for li in lin for u in li.u_a_db))
          if np.isfinite(x)]
    budget = calibration_budget(session, max(ua, default=0.0))
    lo, hi = float(fr.freq_hz[0]), float(fr.freq_hz[-1])
    if not lo <= session.ref_freq_hz <= hi:
        raise LabError(f"reference frequency {session.ref_freq_hz:g} Hz is outside the swept {lo:g}..{hi:g} Hz")
    axes = tuple(replace(ax, freq_hz=tuple(float(f) for f in fr.freq_hz),
                         correction_db=tuple(round(float(c), 3) + 0.0 for c in fr.cf_axes_db[:, i]))
                 for i, ax in enumerate(tables))
    lin_db = max(0.05, _up(max(li.max_abs_db for li in lin)))
    ref = budget.part(FIELD_STANDARD)
    rest = budget.part([c.name for c in budget.components if c.name not in FIELD_STANDARD + ("repeatability",)])
    us = (Component("reference_field", _up(ref.u_expanded_db), "dB", "normal", 2.0),
          Component("linearity", lin_db, "dB", "rectangular"),
          Component("frequency_response", _up(rest.u_expanded_db), "dB", "normal", 2.0),
          Component("repeatability", _up(budget.part(["repeatability"]).u_c_db, 0.001), "dB", "normal", 1.0))
    tc = previous.temp_coeff_db_per_c if previous else TEMP_COEFF_DEFAULT_DB_PER_C
    tch = previous.temp_coeff_halfwidth_db_per_c if previous else TEMP_COEFF_HALFWIDTH_DEFAULT_DB_PER_C
    t_range = previous.temp_range_c if previous else None    # kept with the coefficient it belongs to,
    if t_range and not t_range[0] <= session.ambient.temp_c <= t_range[1]:   # if it holds at today's tables
        t_range = None
    levels = (min(ax.field[0] for ax in tables), max(ax.field[-1] for ax in tables))
    provisional = ProbeCertificate(session.probe_model, session.probe_serial, session.lab, session.certificate_number,
                                   session.cal_date, session.due_date, "E", float(session.ref_freq_hz), (lo, hi),
                                   levels, session.ambient.temp_c, tc, tch, 0.0, axes, us, FORMAT, KIND_PROBE,
                                   temp_range_c=t_range)
    iso = tuple(an.isotropy(results, provisional))
    if not iso:
        raise LabError("no isotropy readings in the session")
    cert = replace(provisional, isotropy_db=max(0.05, _up(max(i.plus_minus_db for i in iso))))
    temp = an.temperature_response(results, provisional, session.budget.get("chamber_temp_c", 0.5))
    if temp is not None:
        # measured: the slope, and as half-width the rectangular one of the same standard
        # uncertainty (sqrt(3) u), which is how the field budget reads it
        # the range where they hold: the climatic chamber's span (and the lab's own temperature,
        # at which the tables were measured); the straight line is not extrapolated beyond it
        t_lo = min(float(np.min(temp.temp_c)), session.ambient.temp_c)
        t_hi = max(float(np.max(temp.temp_c)), session.ambient.temp_c)
        cert = replace(cert, temp_coeff_db_per_c=round(temp.coeff_db_per_c, 4) + 0.0,
                       temp_coeff_halfwidth_db_per_c=_up(math.sqrt(3.0) * temp.u_coeff_db_per_c, 0.001),
                       temp_range_c=(t_lo, t_hi))
    return Calibration(session, cert, tuple(lin), fr, iso, budget, temp)


# --------------------------------------------------------------------------- as found / as left

def decide_tolerance(error_db: float, tolerance_db: float, u_db: float, rule) -> str:
    """Two-sided conformity of an error against +/- tolerance under a meterlink.physics.verdict rule."""
    r = get_rule(rule) if isinstance(rule, str) else rule
    e, w = abs(float(error_db)), (float(u_db) if r.guard == "U" else 0.0)
    if e + w <= tolerance_db + 1e-12:
        return COMPLIANT
    if r.binary or e - w > tolerance_db + 1e-12:
        return NOT_COMPLIANT
    return UNDECIDED


@dataclass(frozen=True)
class FreqComparison:
    freq_hz: float
    as_found_db: float            # total field error with the previous certificate, 20 log10(E_ind / E_ref)
    as_left_db: float             # the same readings with the new certificate
    as_found_axes_db: tuple[float, float, float]
    drift_db: tuple[float, float, float]   # per axis: as-found minus as-left indication (dB)
    as_found: str
    as_left: str


@dataclass(frozen=True)
class Comparison:
    previous_number: str
    rule: str
    rule_reference: str
    tolerance_db: float
    u_expanded_db: float
    rows: tuple[FreqComparison, ...]
    as_found: str
    as_left: str
    statement: str
    notice: str                   # out-of-tolerance notice, "" when as found conforms


def _worst(outcomes) -> str:
    return NOT_COMPLIANT if NOT_COMPLIANT in outcomes else UNDECIDED if UNDECIDED in outcomes else COMPLIANT


def compare(cal: Calibration, previous: ProbeCertificate, results) -> Comparison:
    """As found (previous certificate) and as left (new one) on the frequency-response readings."""
    s, new = cal.session, cal.certificate
    rule = get_rule(s.decision_rule)
    tol, u = s.spec.frequency_response_db, cal.budget.u_expanded_db
    rows = []
    for f in cal.response.freq_hz:
        f = float(f)
        tot = an.of(results, "frequency", freq_hz=f, axis="")

        def err(cert, r, i=None):
            res = calibrate_axes(cert, r.counts, f, today=cert.cal_date)
            e = res.e_v_per_m if i is None else res.axes_v_per_m[:, i]
            return float(20 * np.log10(np.nanmean(e) / r.step.e_ref_v_per_m))

        axes_found = tuple(err(previous, an.of(results, "frequency", freq_hz=f, axis=a)[0], i)
                           for i, a in enumerate(AXES))
        found = err(previous, tot[0]) if tot else max(axes_found, key=abs)
        left = err(new, tot[0]) if tot else None
        axes_left = tuple(err(new, an.of(results, "frequency", freq_hz=f, axis=a)[0], i) for i, a in enumerate(AXES))
        drift = np.subtract(axes_found, axes_left)   # change of each sensor's response since the previous cert
        if left is None:
            left = max(axes_left, key=abs)
        worst_found = max((found, *axes_found), key=abs)
        rows.append(FreqComparison(f, found, left, axes_found, tuple(float(d) for d in drift),
                                   decide_tolerance(worst_found, tol, u, rule), decide_tolerance(left, tol, u, rule)))
    af, al = _worst([r.as_found for r in rows]), _worst([r.as_left for r in rows])
    how = (f"specification +/- {tol:g} dB, expanded uncertainty U = {u:.2f} dB (k = 2), "
           f"decision rule: {rule.description} ({rule.reference})")
    statement = (f"As found (against certificate {previous.certificate_number}): {af}; "
                 f"as left (certificate {new.certificate_number}): {al}; {how}.")
    notice = ""
    if af == NOT_COMPLIANT:
        bad = [r for r in rows if r.as_found == NOT_COMPLIANT]
        worst = max(bad, key=lambda r: max(abs(x) for x in (r.as_found_db, *r.as_found_axes_db)))
        e = max((worst.as_found_db, *worst.as_found_axes_db), key=abs)
        notice = (f"OUT-OF-TOLERANCE NOTICE: probe {s.probe_model} s/n {s.probe_serial} was found outside its "
                  f"specification (+/- {tol:g} dB) at {len(bad)} of {len(rows)} frequencies, worst {e:+.2f} dB at "
                  f"{worst.freq_hz / 1e6:g} MHz, under the {rule.title}. Results measured with it under certificate "
                  f"{previous.certificate_number} (calibrated {previous.cal_date.isoformat()}) may be wrong and "
                  "should be reviewed.")
    return Comparison(previous.certificate_number, rule.name, rule.reference, tol, u, tuple(rows), af, al,
                      statement, notice)
