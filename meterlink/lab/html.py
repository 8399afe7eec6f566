"""Human-readable certificate: one self-contained HTML page, every text escaped, plots as base64 PNG."""

from __future__ import annotations

import numpy as np

from meterlink.reports.htmlpage import CSS, figure_png, img, table
from meterlink.reports.htmlpage import e as _e
from meterlink.lab.certify import Calibration, Comparison

_CSS = CSS + "td,th{text-align:right}"


def _table(head, rows) -> str:
    return table(head, [[_e(c) for c in r] for r in rows])


def _png(fig) -> str:
    import matplotlib.pyplot as plt

    png = figure_png(fig, dpi=90)
    plt.close(fig)
    return img(png, "plot")


def _plots(cal: Calibration) -> list[str]:
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


def render(cal: Calibration, comparison: Comparison | None = None, safety_line: str = "") -> str:
    """The whole page as a string."""
    c, s = cal.certificate, cal.session
    p = [f"<!DOCTYPE html><html><head><meta charset='utf-8'><title>Calibration certificate {_e(c.certificate_number)}"
         f"</title><style>{_CSS}</style></head><body>", f"<h1>Calibration certificate {_e(c.certificate_number)}</h1>"]
    p.append(_table(("item", "value"), [
        ("probe", f"{c.model} s/n {c.serial}"), ("laboratory", c.lab), ("operator", s.operator or "-"),
        ("calibration date", c.cal_date.isoformat()), ("due", c.due_date.isoformat()),
        ("field method", f"{s.method.kind}: {s.method.relation()}"), ("orientation convention", s.orientation),
        ("ambient", f"{s.ambient.temp_c:g} degC, {s.ambient.humidity_pct:g} % RH"),
        ("reference frequency", f"{c.ref_freq_hz / 1e6:g} MHz"),
        ("valid range", f"{c.freq_range_hz[0] / 1e6:g}..{c.freq_range_hz[1] / 1e6:g} MHz, "
                        f"{c.level_range[0]:g}..{c.level_range[1]:g} V/m")]))
    if comparison and comparison.notice:
        p.append(f"<p class='notice'>{_e(comparison.notice)}</p>")
    plots = _plots(cal)
    fr = cal.response
    p.append("<h2>Frequency response: calibration factor CF = E_reference / E_indicated</h2>" + plots[0])
    p.append(_table(["frequency (MHz)"] + [f"CF {a}" for a in "xyz"] + [f"CF {a} (dB)" for a in "xyz"]
                    + ["CF total", "CF total (dB)"],
                    [[f"{f / 1e6:g}", *(f"{v:.4f}" for v in fr.cf_axes[j]), *(f"{v:+.3f}" for v in fr.cf_axes_db[j]),
                      f"{fr.cf_total[j]:.4f}", f"{fr.cf_total_db[j]:+.3f}"] for j, f in enumerate(fr.freq_hz)]))
    p.append("<h2>Linearity</h2>" + plots[1])
    p.append(_table(("axis", "fitted a (counts per (V/m)^2)", "fitted knee (V/m)", "square law ends (fit, V/m)",
                     "square law ends (measured, V/m)", "largest check deviation (dB)"),
                    [(li.axis, f"{li.fit.a_counts_per_v2m2:.1f}", f"{li.fit.knee_v_per_m:.2f}",
                      f"{li.fit.square_law_end_fit_v_per_m:.2f}", f"{li.fit.square_law_end_measured_v_per_m:g}",
                      f"{li.max_abs_db:.3f}") for li in cal.linearity]))
    p.append("<h2>Isotropy (rotation about the handle axis)</h2>" + plots[2])
    p.append(_table(("frequency (MHz)", "tilt (deg)", "+/- dB about the mean", "max/min ratio (dB)"),
                    [(f"{i.freq_hz / 1e6:g}", f"{i.tilt_deg:g}", f"+/- {i.plus_minus_db:.3f}", f"{i.max_min_db:.3f}")
                     for i in cal.isotropy]))
    tr = cal.temperature
    if tr is not None:
        p.append("<h2>Temperature coefficient</h2>" + plots[3])
        p.append(_table(("chamber (degC)", "indicated / reference (dB)", "Type A (dB)"),
                        [(f"{t:g}", f"{y:+.3f}", f"{u:.3f}") for t, y, u in zip(tr.temp_c, tr.change_db, tr.u_a_db)]))
        p.append(f"<p>Fitted slope {tr.coeff_db_per_c:+.4f} dB/degC, standard uncertainty "
                 f"{tr.u_coeff_db_per_c:.4f} dB/degC; stated on the certificate as "
                 f"{c.temp_coeff_db_per_c:+.4f} dB/degC (half-width {c.temp_coeff_halfwidth_db_per_c:.3f}) "
                 f"about {c.temp_ref_c:g} degC, corrected when a reading's temperature is known.</p>")
    else:
        p.append(f"<p>Temperature coefficient not measured in this calibration: {c.temp_coeff_db_per_c:+.4f} "
                 f"dB/degC (half-width {c.temp_coeff_halfwidth_db_per_c:.3f}) carried from the previous "
                 f"certificate or the default.</p>")
    b = cal.budget
    p.append("<h2>Uncertainty budget of a calibration factor (JCGM 100:2008)</h2>")
    p.append(_table(("component", "value (dB)", "distribution", "divisor", "sensitivity", "u (dB)", "note"),
                    [(r.name, f"{r.value:.3f}", r.distribution, f"{r.divisor:.3f}", f"{r.sensitivity:g}",
                      f"{r.u_db:.3f}", n) for r, n in zip(b.budget.rows, b.notes)]
                    + [("combined standard uncertainty u_c", "", "", "", "", f"{b.budget.u_c_db:.3f}", ""),
                       (f"expanded uncertainty U (k = {b.budget.k:g})", "", "", "", "", f"{b.u_expanded_db:.3f}",
                        "about 95 % coverage")]))
    if comparison:
        p.append(f"<h2>As found / as left (previous certificate {_e(comparison.previous_number)})</h2>")
        p.append(_table(("frequency (MHz)", "as found (dB)", "as left (dB)", "drift x", "drift y", "drift z",
                         "as found", "as left"),
                        [(f"{r.freq_hz / 1e6:g}", f"{r.as_found_db:+.3f}", f"{r.as_left_db:+.3f}",
                          *(f"{d:+.3f}" for d in r.drift_db), r.as_found, r.as_left) for r in comparison.rows]))
        p.append(f"<p>{_e(comparison.statement)}</p>")
    if safety_line:
        p.append(f"<p class='caution'>{_e(safety_line)}</p>")
    p.append("</body></html>")
    return "\n".join(p)
