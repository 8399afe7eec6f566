"""From antenna-factor readings to the dipole certificate the host loads (meterlink-cert/1, kind
dipole-receiver) and the lab's certificate page.

The new certificate carries the measured antenna factor and its expanded uncertainty; what this
procedure does not calibrate (the receiver, its level correction and range, the field cable and their
uncertainty components) is carried from the base certificate (--previous, else the packaged
demo-dipole), which must be for the same antenna serial. The page states the previous AF beside the
new one (as found / as left of the antenna factor).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np

from meterlink.lab.afcal import AfBench, SubSpec
from meterlink.lab.session import LabError, LabSession
from meterlink.physics.antenna_cal import (AfBudgetInputs, AfPoint, SubBudgetInputs, af_budget, af_point, sub_budget,
                                           sub_point)
from meterlink.physics.calibrate import af_db_per_m
from meterlink.physics.certificate import KIND_DIPOLE, DipoleCertificate
from meterlink.physics.uncertainty import Budget, Component
from meterlink.physics.units import Z0_OHM


def _up(x: float, step: float = 0.01) -> float:
    """Round up to a multiple of step, as a certificate states an uncertainty."""
    return round(math.ceil(x / step - 1e-9) * step, 10)


@dataclass(frozen=True)
class AfCalibration:
    session: LabSession
    bench: AfBench
    points: tuple[AfPoint, ...]
    budgets: tuple[Budget, ...]           # one per point
    notes: tuple[str, ...]                # the budget rows' notes (the same for every point)
    base: DipoleCertificate
    certificate: DipoleCertificate
    left_out_freq_hz: tuple[float, ...] = ()   # frequencies with a single repeat (a stopped run): no Type A
    method: str = "standard-field"             # or "substitution" (points are then SubPoints)
    sub: SubSpec | None = None                 # the reference antenna of a substitution

    @property
    def u_expanded_db(self) -> np.ndarray:
        return np.array([b.u_expanded_db for b in self.budgets])


def budget_inputs(session: LabSession, cls=AfBudgetInputs):
    """The default inputs (AfBudgetInputs, or SubBudgetInputs for a substitution) with the session's [budget]
    values of the same names."""
    names = set(cls.__dataclass_fields__)
    try:
        return cls().replace({k: v for k, v in session.budget.items() if k in names})
    except ValueError as exc:
        raise LabError(f"session budget: {exc}") from None


def check_base(session: LabSession, base) -> None:
    """The base certificate must be a dipole certificate of the same antenna (checked before any RF is on)."""
    if base.kind != KIND_DIPOLE:
        raise LabError(f"{base.source or base.certificate_number}: not a dipole certificate (kind {base.kind})")
    if base.serial != session.probe_serial:
        raise LabError(f"base certificate {base.certificate_number} is for antenna s/n {base.serial}, not "
                       f"{session.probe_serial}: give the antenna's own previous certificate (--previous)")


def _repeats(readings, with_what: str) -> tuple[dict, tuple]:
    """The readings by frequency where there are two or more repeats, and the frequencies left out."""
    by_f: dict[float, list] = {}
    for r in readings:
        by_f.setdefault(r.freq_hz, []).append(r)
    left_out = tuple(sorted(f for f, v in by_f.items() if len(v) < 2))
    by_f = {f: v for f, v in by_f.items() if len(v) >= 2}
    if len(by_f) < 2:
        raise LabError(f"{len(by_f)} frequencies measured with {with_what}two or more repeats: an antenna-factor "
                       "table needs two or more")
    return by_f, left_out


def analyse(session: LabSession, bench: AfBench, readings, base: DipoleCertificate) -> AfCalibration:
    """Points, budgets and the new dipole certificate."""
    check_base(session, base)
    by_f, left_out = _repeats(readings, "")
    inputs = budget_inputs(session)
    pts, buds, notes = [], [], ()
    for f in sorted(by_f):
        p = af_point(by_f[f], float(bench.tx_gain_dbi(f)), bench.distance_m, float(bench.rx_cable_db(f)))
        b, notes = af_budget(p, inputs, bench.distance_m)
        pts.append(p)
        buds.append(b)
    cert = _certificate(session, base, pts, buds)
    return AfCalibration(session, bench, tuple(pts), tuple(buds), notes, base, cert, left_out)


def analyse_substitution(session: LabSession, bench: AfBench, sub: SubSpec, readings, base: DipoleCertificate
                         ) -> AfCalibration:
    """Points, budgets and the new dipole certificate from substitution readings (SubReading)."""
    check_base(session, base)
    by_f, left_out = _repeats(readings, "both antennas and ")
    inputs = budget_inputs(session, SubBudgetInputs)
    pts, buds, notes = [], [], ()
    for f in sorted(by_f):
        p = sub_point(by_f[f], float(sub.ref_af_db_per_m(f)))
        b, notes = sub_budget(p, inputs)
        pts.append(p)
        buds.append(b)
    cert = _certificate(session, base, pts, buds)
    return AfCalibration(session, bench, tuple(pts), tuple(buds), notes, base, cert, left_out, "substitution", sub)


def _certificate(session: LabSession, base: DipoleCertificate, pts, buds) -> DipoleCertificate:
    """The new dipole certificate: the measured AF and its U; the rest carried from the base certificate."""
    f = tuple(p.freq_hz for p in pts)
    lo, hi = f[0], f[-1]
    if not (base.cable_freq_hz[0] <= lo and hi <= base.cable_freq_hz[-1]):
        raise LabError(f"base certificate {base.certificate_number}: its cable-loss table does not cover "
                       f"{lo / 1e6:g}..{hi / 1e6:g} MHz")
    u_af = _up(max(b.u_expanded_db for b in buds))
    us = tuple(Component("antenna_factor", u_af, "dB", "normal", 2.0) if c.name == "antenna_factor" else c
               for c in base.uncertainties)
    cert = replace(base, model=session.probe_model, serial=session.probe_serial, lab=session.lab,
                   certificate_number=session.certificate_number, cal_date=session.cal_date,
                   due_date=session.due_date, freq_range_hz=(lo, hi), af_freq_hz=f,
                   af_db_per_m=tuple(round(p.af_db_per_m, 2) + 0.0 for p in pts), uncertainties=us, source="")
    return cert


def summary(cal: AfCalibration) -> dict:
    """The results as data (the CLI's --json)."""
    prev = af_db_per_m(cal.base, [p.freq_hz for p in cal.points])
    def extra(p):
        if cal.method == "substitution":
            return {"ref_af_db_per_m": p.af_ref_db_per_m, "ratio_db": p.ratio_db}
        return {"e_v_per_m": p.e_v_per_m, "port_dbuv": p.port_dbuv}
    return {"certificate_number": cal.certificate.certificate_number, "procedure": "dipole-af", "method": cal.method,
            "points": [{"freq_hz": p.freq_hz, "af_db_per_m": p.af_db_per_m, "u_expanded_db": b.u_expanded_db,
                        "k": b.k, "u_a_db": p.u_a_db, **extra(p), "previous_af_db_per_m": float(pv)}
                       for p, b, pv in zip(cal.points, cal.budgets, prev)],
            "u_antenna_factor_db": next(c.value for c in cal.certificate.uncertainties if c.name == "antenna_factor"),
            "base_certificate": cal.base.certificate_number, "left_out_freq_hz": list(cal.left_out_freq_hz)}


def _plot(cal: AfCalibration) -> bytes:
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from meterlink.reports.htmlpage import figure_png

    f = np.array([p.freq_hz for p in cal.points])
    af = np.array([p.af_db_per_m for p in cal.points])
    fig, ax = plt.subplots(figsize=(7, 3.5))
    ax.errorbar(f, af, yerr=cal.u_expanded_db, fmt="o", capsize=3, label="measured, with U (k = 2)")
    fg = np.geomspace(f[0], f[-1], 100)
    ax.semilogx(fg, af_db_per_m(cal.base, fg), "k--", label=f"previous ({cal.base.certificate_number})")
    ax.set(xlabel="frequency (Hz)", ylabel="AF (dB/m)", title="Antenna factor into 50 ohm")
    ax.grid(True, which="both", alpha=.3)
    ax.legend()
    png = figure_png(fig, dpi=90)
    plt.close(fig)
    return png


def render(cal: AfCalibration, template_dir=None) -> str:
    """The lab's certificate page (template af_certificate.html), with the lab's statements."""
    from meterlink.lab.html import REPRODUCTION_STATEMENT, RESULTS_STATEMENT, coverage_probability_pct
    from meterlink.reports.templating import render as render_template

    c, s, bn, base = cal.certificate, cal.session, cal.bench, cal.base
    missing = s.missing_certificate_items()
    if missing:
        raise LabError(f"certificate {c.certificate_number}: the session lacks {', '.join(missing)} "
                       "(see docs/lab.md, session file)")
    title = f"Calibration certificate {c.certificate_number}"
    issued = (s.issue_date or s.cal_date).isoformat()
    u = cal.u_expanded_db
    worst = int(np.argmax(u))
    wb = cal.budgets[worst]
    prev = af_db_per_m(base, [p.freq_hz for p in cal.points])
    u_af = next(x.value for x in c.uncertainties if x.name == "antenna_factor")
    return render_template(
        "af_certificate.html", template_dir, required=RESULTS_STATEMENT,
        title=title, ident=f"{title}, {c.model} s/n {c.serial}, {c.lab}", lab=c.lab, lab_address=s.lab_address,
        results_statement=RESULTS_STATEMENT, reproduction_statement=REPRODUCTION_STATEMENT,
        certificate_number=c.certificate_number, plot=_plot(cal), issue_date=issued, signatory=s.signatory,
        summary_rows=[("certificate number", c.certificate_number), ("laboratory", c.lab), ("date of issue", issued),
                      ("customer", s.customer.name), ("customer address", s.customer.address)],
        item_rows=[("description", c.model), ("serial number", c.serial),
                   *([("condition on receipt", s.item_condition)] if s.item_condition else []),
                   *([("received", s.received_date.isoformat())] if s.received_date else [])],
        method_rows=[
            *(_method_rows(cal) if cal.method == "substitution" else [
                ("method", "standard field: transmitting antenna of known gain, net power measured, far field"),
                ("relation", f"E = sqrt(Z0 P G / (4 pi)) / d, Z0 = {Z0_OHM:.3f} ohm; AF = E / V into 50 ohm"),
                ("distance", f"{bn.distance_m:g} m on boresight; far field taken as d >= 2 D^2 / lambda and d >= "
                             f"lambda, D = {bn.largest_dimension_m:g} m"),
                ("field", f"about {bn.field_v_per_m:g} V/m at each frequency (set from the net power, then measured)")]),
            ("analyser", f"RBW {bn.rbw_hz:g} Hz, span {bn.span_hz:g} Hz, {bn.points} points, rms detector; "
                         "the tone's level at its peak"),
            *([("procedure", s.procedure)] if s.procedure else []),
            ("date of calibration", c.cal_date.isoformat()),
            ("place", s.location or f"the laboratory, {s.lab_address}"),
            ("conditions", f"ambient temperature {s.ambient.temp_c:g} degC, relative humidity "
                           f"{s.ambient.humidity_pct:g} %"),
            ("operator", s.operator or "-"),
            ("valid range", f"{c.freq_range_hz[0] / 1e6:g}..{c.freq_range_hz[1] / 1e6:g} MHz"),
            *([("left out", ", ".join(f"{f / 1e6:g} MHz" for f in cal.left_out_freq_hz)
                + ": one repeat only (the run stopped), no Type A evaluation")] if cal.left_out_freq_hz else []),
            ("calibration due", c.due_date.isoformat())],
        result_rows=[[f"{p.freq_hz / 1e6:g}", f"{p.af_db_per_m:.2f}", f"{10 ** (p.af_db_per_m / 20):.3f}",
                      f"{b.u_expanded_db:.2f}", f"{b.k:g}", f"{pv:.2f}", f"{p.af_db_per_m - pv:+.2f}"]
                     for p, b, pv in zip(cal.points, cal.budgets, prev)],
        u_af=f"{u_af:.2f}", k=f"{wb.k:g}",
        carried_text=(f"Not calibrated here and carried unchanged from certificate {base.certificate_number} "
                      f"({base.lab}, {base.cal_date.isoformat()}) into the certificate file the host loads: the "
                      f"receiver {base.receiver_model} s/n {base.receiver_serial} (level correction "
                      f"{base.receiver_level_correction_db:+g} dB, range {base.level_range_dbuv[0]:g}.."
                      f"{base.level_range_dbuv[1]:g} dBuV), the field cable's loss table and their uncertainty "
                      "components."),
        uncertainty_text=(f"Each expanded uncertainty U is the combined standard uncertainty multiplied by the coverage "
                          f"factor k = {wb.k:g}, which for a normal distribution gives a coverage probability of "
                          f"approximately {coverage_probability_pct(wb.k):.0f} %, evaluated following JCGM 100:2008 "
                          f"(GUM). The certificate file states U = {u_af:.2f} dB for the antenna factor, the largest "
                          f"over the frequencies. The budget at {cal.points[worst].freq_hz / 1e6:g} MHz (the largest U) "
                          + ("follows; at the other frequencies only the repeatability differs."
                             if cal.method == "substitution" else
                             "follows; at the other frequencies only the repeatability and the generator stability "
                             "differ.")),
        budget_rows=[(r.name, f"{r.value:.3f}", r.distribution, f"{r.divisor:.3f}", f"{r.sensitivity:g}",
                      f"{r.u_db:.3f}", n) for r, n in zip(wb.rows, cal.notes)]
        + [("combined standard uncertainty u_c", "", "", "", "", f"{wb.u_c_db:.3f}", ""),
           (f"expanded uncertainty U (k = {wb.k:g})", "", "", "", "", f"{wb.u_expanded_db:.3f}",
            f"coverage probability about {coverage_probability_pct(wb.k):.0f} %")],
        traceability_text=(
            (f"The field was measured with the reference antenna {cal.sub.ref_name} (certificate "
             f"{cal.sub.ref_certificate}) and the antenna under calibration was compared with it in the same field; "
             "the net power was monitored with the reference standards below. Each was calibrated under the "
             "certificate named and was within its calibration period on the date of calibration; through them the "
             "results are metrologically traceable to the International System of Units (SI).")
            if cal.method == "substitution" else
            ("The standard field was set from the net power measured with the reference standards below "
             "and the transmitting antenna's calibrated gain. Each was calibrated under the certificate "
             "named and was within its calibration period on the date of calibration; through them the "
             "results are metrologically traceable to the International System of Units (SI).")),
        reference_rows=[(r.name, r.certificate_number, r.calibrated_by or "-", r.due_date.isoformat())
                        for r in s.references])


def _method_rows(cal: AfCalibration) -> list[tuple[str, str]]:
    """The method table of a substitution certificate."""
    bn, sub = cal.bench, cal.sub
    return [
        ("method", "substitution: a reference antenna of known antenna factor measures the field, then the antenna "
                   "under calibration replaces it at the same place in the same field"),
        ("relation", "AF = AF_ref * V_ref / V (into 50 ohm), each voltage referred to the net power into the "
                     "transmitting antenna read with it; both antennas through the same cable to the analyser"),
        ("reference antenna", f"{sub.ref_name}, certificate {sub.ref_certificate}; its antenna factor interpolated "
                              "linearly in log-frequency"),
        ("set-up", f"transmitting antenna at {bn.distance_m:g} m; about {bn.field_v_per_m:g} V/m at each frequency "
                   "(set from the net power, not relied on)")]
