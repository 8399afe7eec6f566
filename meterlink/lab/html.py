"""Human-readable certificate: one self-contained HTML page (template certificate.html, autoescaped),
plots as PNG; the same page renders to PDF (meterlink.reports.templating.write_pdf)."""

from __future__ import annotations

import math

import numpy as np

from meterlink.reports.htmlpage import figure_png
from meterlink.lab.certify import Calibration, Comparison
from meterlink.lab.session import LabError


def _png(fig) -> bytes:
    import matplotlib.pyplot as plt

    png = figure_png(fig, dpi=90)
    plt.close(fig)
    return png


def _plots(cal: Calibration) -> list[bytes]:
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    out = []
    fr = cal.response
    fig, ax = plt.subplots(figsize=(7, 3.5))
    for i, a in enumerate("xyz"):
        ax.semilogx(fr.freq_hz, fr.cf_axes_db[:, i], "o-", label=f"axis {a}")
    if np.any(np.isfinite(fr.cf_total)):
        ax.semilogx(fr.freq_hz, fr.cf_total_db, "k--", label="total")
    ax.set(xlabel="frequency (Hz)", ylabel="CF (dB)", title="Response against frequency")
    ax.grid(True, which="both", alpha=.3)
    ax.legend()
    out.append(_png(fig))
    fig, ax = plt.subplots(figsize=(7, 3.5))
    for li in cal.linearity:
        ax.semilogx(li.levels_v_per_m, li.deviation_db, "o-", label=f"axis {li.axis}")
    ax.set(xlabel="field (V/m)", ylabel="deviation (dB)", title="Linearity at the check levels")
    ax.grid(True, which="both", alpha=.3)
    ax.legend()
    out.append(_png(fig))
    fig = plt.figure(figsize=(4.5, 4.5))
    ax = fig.add_subplot(projection="polar")
    for iso in cal.isotropy:
        th = np.radians(np.append(iso.angles_deg, iso.angles_deg[0]))
        ax.plot(th, np.append(iso.deviation_db, iso.deviation_db[0]), "o-",
                label=f"{iso.freq_hz / 1e6:g} MHz, tilt {iso.tilt_deg:g} deg")
    ax.set_title("Isotropy: deviation from the mean (dB)")
    ax.legend(loc="lower left", fontsize=7)
    out.append(_png(fig))
    tr = cal.temperature
    if tr is not None:
        fig, ax = plt.subplots(figsize=(7, 3.2))
        ax.errorbar(tr.temp_c, tr.change_db, yerr=2 * tr.u_a_db, fmt="o", label="indicated (2 x Type A)")
        span = np.linspace(tr.temp_c.min(), tr.temp_c.max(), 2)
        ax.plot(span, tr.fitted_db(span), "k--", label=f"slope {tr.coeff_db_per_c:+.4f} dB/degC")
        ax.set(xlabel="chamber temperature (degC)", ylabel="indicated / reference (dB)",
               title=f"Temperature response at {tr.freq_hz / 1e6:g} MHz")
        ax.grid(True, alpha=.3)
        ax.legend()
        out.append(_png(fig))
    return out


#: The lab's statements a certificate carries in place of the survey reports' exposure cautions.
RESULTS_STATEMENT = ("The results in this certificate relate only to the item calibrated, as identified above, "
                     "at the time and under the conditions of its calibration.")
REPRODUCTION_STATEMENT = "This certificate may be reproduced only in full, unless the laboratory approves an extract in writing."


def coverage_probability_pct(k: float) -> float:
    """Coverage probability of +/- k standard deviations of a normal distribution (JCGM 100:2008 G.1.3)."""
    return 100.0 * math.erf(k / math.sqrt(2.0))


def render(cal: Calibration, comparison: Comparison | None = None, template_dir=None) -> str:
    """The whole certificate page as a string, laid out by the certificate.html template (restyled
    from template_dir when given). It carries the lab's statements, not the exposure cautions; a
    session without the items a certificate must state is refused (LabError naming them)."""
    from meterlink.reports.templating import render as render_template

    c, s = cal.certificate, cal.session
    missing = s.missing_certificate_items()
    if missing:
        raise LabError(f"certificate {c.certificate_number}: the session lacks {', '.join(missing)} "
                       "(see docs/lab.md, session file)")
    fr, tr, b = cal.response, cal.temperature, cal.budget
    if tr is not None:
        temperature_text = (f"Fitted slope {tr.coeff_db_per_c:+.4f} dB/degC, standard uncertainty "
                            f"{tr.u_coeff_db_per_c:.4f} dB/degC; stated on the certificate as "
                            f"{c.temp_coeff_db_per_c:+.4f} dB/degC (half-width {c.temp_coeff_halfwidth_db_per_c:.3f}) "
                            f"about {c.temp_ref_c:g} degC, corrected when a reading's temperature is known.")
    else:
        temperature_text = (f"Temperature coefficient not measured in this calibration: {c.temp_coeff_db_per_c:+.4f} "
                            f"dB/degC (half-width {c.temp_coeff_halfwidth_db_per_c:.3f}) carried from the previous "
                            f"certificate or the default.")
    title = f"Calibration certificate {c.certificate_number}"
    k, u = b.budget.k, b.u_expanded_db
    issued = (s.issue_date or s.cal_date).isoformat()
    return render_template(
        "certificate.html", template_dir, required=RESULTS_STATEMENT,
        title=title, ident=f"{title}, {c.model} s/n {c.serial}, {c.lab}",
        lab=c.lab, lab_address=s.lab_address, results_statement=RESULTS_STATEMENT,
        reproduction_statement=REPRODUCTION_STATEMENT, certificate_number=c.certificate_number,
        plots=_plots(cal), notice=comparison.notice if comparison else "", comparison=comparison,
        issue_date=issued, signatory=s.signatory,
        summary_rows=[
            ("certificate number", c.certificate_number), ("laboratory", c.lab), ("date of issue", issued),
            ("customer", s.customer.name), ("customer address", s.customer.address)],
        item_rows=[("description", c.model), ("serial number", c.serial),
                   *([("condition on receipt", s.item_condition)] if s.item_condition else []),
                   *([("received", s.received_date.isoformat())] if s.received_date else [])],
        method_rows=[
            ("field method", f"{s.method.kind}: {s.method.relation()}"),
            *([("procedure", s.procedure)] if s.procedure else []),
            ("orientation convention", s.orientation),
            ("date of calibration", c.cal_date.isoformat()),
            ("place", s.location or f"the laboratory, {s.lab_address}"),
            ("conditions", f"ambient temperature {s.ambient.temp_c:g} degC, relative humidity {s.ambient.humidity_pct:g} %"),
            ("operator", s.operator or "-"),
            ("reference frequency", f"{c.ref_freq_hz / 1e6:g} MHz"),
            ("valid range", f"{c.freq_range_hz[0] / 1e6:g}..{c.freq_range_hz[1] / 1e6:g} MHz, "
                            f"{c.level_range[0]:g}..{c.level_range[1]:g} V/m"),
            # ISO/IEC 17025:2017 7.8.4.3: only an interval agreed with the customer is stated
            ("calibration due (as agreed with the customer)", c.due_date.isoformat()) if c.due_date else
            ("calibration interval", "not stated: none was agreed with the customer; the user's own calibration "
                                     "programme sets when to recalibrate")],
        uncertainty_text=(f"The expanded uncertainty U = {u:.2f} dB stated with the results is the combined standard "
                          f"uncertainty multiplied by the coverage factor k = {k:g}, which for a normal distribution "
                          f"gives a coverage probability of approximately {coverage_probability_pct(k):.0f} %. It was "
                          "evaluated following JCGM 100:2008 (GUM); the budget follows."),
        traceability_text=(f"The reference field was set by the {s.method.kind} method from quantities measured with "
                           "the reference standards below. Each was calibrated under the certificate named and was "
                           "within its calibration period on the date of calibration; through them the results are "
                           "metrologically traceable to the International System of Units (SI)."),
        reference_rows=[(r.name, r.certificate_number, r.calibrated_by or "-", r.due_date.isoformat())
                        for r in s.references],
        response_rows=[[f"{f / 1e6:g}", *(f"{v:.4f}" for v in fr.cf_axes[j]), *(f"{v:+.3f}" for v in fr.cf_axes_db[j]),
                        f"{fr.cf_total[j]:.4f}", f"{fr.cf_total_db[j]:+.3f}", f"{u:.2f}"]
                       for j, f in enumerate(fr.freq_hz)],
        u_expanded_db=f"{u:.2f}", k=f"{k:g}",
        linearity_rows=[(li.axis, f"{li.fit.a_counts_per_v2m2:.1f}", f"{li.fit.knee_v_per_m:.2f}",
                         f"{li.fit.square_law_end_fit_v_per_m:.2f}", f"{li.fit.square_law_end_measured_v_per_m:g}",
                         f"{li.max_abs_db:.3f}") for li in cal.linearity],
        isotropy_rows=[(f"{i.freq_hz / 1e6:g}", f"{i.tilt_deg:g}", f"+/- {i.plus_minus_db:.3f}", f"{i.max_min_db:.3f}")
                       for i in cal.isotropy],
        temperature_rows=None if tr is None else [
            (f"{t:g}", f"{y:+.3f}", f"{u_:.3f}") for t, y, u_ in zip(tr.temp_c, tr.change_db, tr.u_a_db)],
        temperature_text=temperature_text,
        budget_rows=[(r.name, f"{r.value:.3f}", r.distribution, f"{r.divisor:.3f}", f"{r.sensitivity:g}",
                      f"{r.u_db:.3f}", n) for r, n in zip(b.budget.rows, b.notes)]
        + [("combined standard uncertainty u_c", "", "", "", "", f"{b.budget.u_c_db:.3f}", ""),
           (f"expanded uncertainty U (k = {k:g})", "", "", "", "", f"{u:.3f}",
            f"coverage probability about {coverage_probability_pct(k):.0f} %")],
        comparison_rows=[] if not comparison else [
            (f"{r.freq_hz / 1e6:g}", f"{r.as_found_db:+.3f}", f"{r.as_left_db:+.3f}", *(f"{d:+.3f}" for d in r.drift_db),
             r.as_found, r.as_left) for r in comparison.rows])
