"""Human-readable certificate: one self-contained HTML page (template certificate.html, autoescaped),
plots as PNG; the same page renders to PDF (meterlink.reports.templating.write_pdf)."""

from __future__ import annotations

import numpy as np

from meterlink.cautions import SAFETY_LINE
from meterlink.reports.htmlpage import figure_png
from meterlink.lab.certify import Calibration, Comparison


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


def render(cal: Calibration, comparison: Comparison | None = None, safety_line: str = "", template_dir=None) -> str:
    """The whole page as a string, laid out by the certificate.html template (restyled from
    template_dir when given); it always ends with the cautions (meterlink.cautions by default)."""
    from meterlink.reports.templating import render as render_template

    c, s = cal.certificate, cal.session
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
    return render_template(
        "certificate.html", template_dir, title=title, ident=f"{title}, {c.model} s/n {c.serial}, {c.lab}",
        safety_line=safety_line or SAFETY_LINE, plots=_plots(cal),
        notice=comparison.notice if comparison else "", comparison=comparison,
        summary_rows=[
            ("probe", f"{c.model} s/n {c.serial}"), ("laboratory", c.lab), ("operator", s.operator or "-"),
            ("calibration date", c.cal_date.isoformat()), ("due", c.due_date.isoformat()),
            ("field method", f"{s.method.kind}: {s.method.relation()}"), ("orientation convention", s.orientation),
            ("ambient", f"{s.ambient.temp_c:g} degC, {s.ambient.humidity_pct:g} % RH"),
            ("reference frequency", f"{c.ref_freq_hz / 1e6:g} MHz"),
            ("valid range", f"{c.freq_range_hz[0] / 1e6:g}..{c.freq_range_hz[1] / 1e6:g} MHz, "
                            f"{c.level_range[0]:g}..{c.level_range[1]:g} V/m")],
        response_rows=[[f"{f / 1e6:g}", *(f"{v:.4f}" for v in fr.cf_axes[j]), *(f"{v:+.3f}" for v in fr.cf_axes_db[j]),
                        f"{fr.cf_total[j]:.4f}", f"{fr.cf_total_db[j]:+.3f}"] for j, f in enumerate(fr.freq_hz)],
        linearity_rows=[(li.axis, f"{li.fit.a_counts_per_v2m2:.1f}", f"{li.fit.knee_v_per_m:.2f}",
                         f"{li.fit.square_law_end_fit_v_per_m:.2f}", f"{li.fit.square_law_end_measured_v_per_m:g}",
                         f"{li.max_abs_db:.3f}") for li in cal.linearity],
        isotropy_rows=[(f"{i.freq_hz / 1e6:g}", f"{i.tilt_deg:g}", f"+/- {i.plus_minus_db:.3f}", f"{i.max_min_db:.3f}")
                       for i in cal.isotropy],
        temperature_rows=None if tr is None else [
            (f"{t:g}", f"{y:+.3f}", f"{u:.3f}") for t, y, u in zip(tr.temp_c, tr.change_db, tr.u_a_db)],
        temperature_text=temperature_text,
        budget_rows=[(r.name, f"{r.value:.3f}", r.distribution, f"{r.divisor:.3f}", f"{r.sensitivity:g}",
                      f"{r.u_db:.3f}", n) for r, n in zip(b.budget.rows, b.notes)]
        + [("combined standard uncertainty u_c", "", "", "", "", f"{b.budget.u_c_db:.3f}", ""),
           (f"expanded uncertainty U (k = {b.budget.k:g})", "", "", "", "", f"{b.u_expanded_db:.3f}",
            "about 95 % coverage")],
        comparison_rows=[] if not comparison else [
            (f"{r.freq_hz / 1e6:g}", f"{r.as_found_db:+.3f}", f"{r.as_left_db:+.3f}", *(f"{d:+.3f}" for d in r.drift_db),
             r.as_found, r.as_left) for r in comparison.rows])
