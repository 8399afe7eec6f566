"""Report of a recorded (non-survey) session: instrument, calibration, assessment, field plot, events.

The standard, tier and decision rule are those recorded by the session's latest assessment (the
rule is fixed before the assessment, see `meterlink assess`), unless the caller names them.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from meterlink.reports import htmlpage as H
from meterlink.reports import templating as T
from meterlink.errors import MeterlinkError

CAUTIONS = (
    "These results describe the field at the probe's position during the recording. They support, and do "
    "not replace, an exposure assessment by a qualified person under the regulations that apply at the "
    "site; local codes and licensed practice come first. Reference levels assume far-field, plane-wave "
    "conditions: close to an antenna, or below 30 MHz, E and H must both be measured. A broadband probe "
    "cannot tell sources apart. Keep clear of energised antennas and observe the site's access rules.")


def _choices(store, sid, standard, tier, rule):
    if standard and tier and rule:
        return standard, tier, rule
    for ev in reversed(store.events(sid, "assessment")):
        d = ev["detail"]
        return standard or d.get("standard"), tier or d.get("tier"), rule or d.get("rule")
    raise MeterlinkError(f"session {sid} has not been assessed: run 'meterlink assess' first, or give "
                         f"--standard, --tier and --rule")


def _field_plot(series, a) -> bytes:
    from matplotlib.figure import Figure

    from meterlink.physics.averaging import running_average

    t = np.asarray(series.t_utc)
    e = np.asarray(series.e_v_per_m, dtype=float)
    ok = np.isfinite(e)
    fig = Figure(figsize=(8, 3.2))
    ax = fig.add_subplot()
    t0 = t[ok][0] if ok.any() else 0.0
    ax.plot((t[ok] - t0) / 60, e[ok], color="#b9c3c6", lw=0.8, label="E (each reading)")
    if a.window_s and ok.sum() > 2:
        ra = running_average(t[ok], e[ok], a.window_s)
        if np.any(ra.complete):
            y = np.where(ra.complete, ra.e_rms_v_per_m, np.nan)
            ax.plot((ra.t_end_s - t0) / 60, y, color="#2b6f77", lw=1.8,
                    label=f"{a.window_s / 60:g}-min running average")
        part = ra.partial & np.isfinite(ra.e_rms_v_per_m)
        if np.any(part):
            ax.plot((ra.t_end_s - t0) / 60, np.where(part, ra.e_rms_v_per_m, np.nan), color="#2b6f77", lw=1.0,
                    ls=":", label="partial windows (shorter than the averaging time)")
    if a.limit_v_per_m:
        ax.axhline(a.limit_v_per_m, color="#b3261e", ls="--", lw=1.2, label=f"reference level {a.limit_v_per_m:.4g} V/m")
    ax.set(xlabel="minutes from the first reading (device clock)", ylabel="E (V/m)")
    ax.set_ylim(bottom=0)
    ax.grid(alpha=0.3)
    ax.legend(loc="best", fontsize=8)
    return H.figure_png(fig)


def _shares_plot(a) -> bytes:
    from matplotlib.figure import Figure

    from meterlink.physics.units import format_frequency

    em = list(a.emitters)[:12]
    fig = Figure(figsize=(8, 0.35 * len(em) + 1.2))
    ax = fig.add_subplot()
    ax.barh([format_frequency(x.freq_hz) for x in em][::-1], [100 * x.share for x in em][::-1], color="#2b6f77")
    ax.set(xlabel="share of the total exposure ratio (%)")
    ax.grid(axis="x", alpha=0.3)
    return H.figure_png(fig)


def write_session_report(db_path, session_id: int, out_dir, *, standard=None, tier=None, rule=None,
                         template_dir=None, pdf: bool = False) -> Path:
    """Write report.html (and report.pdf when asked) and values.csv for a recorded session; returns
    the HTML path. The page is laid out by the session.html template (restyled from template_dir)."""
    from meterlink.physics.assessment import assess_field, assess_spectrum
    from meterlink.physics.certificate import parse_certificate
    from meterlink.reports.templating import PDF_HINT, pdf_available, render, template_dir as checked_dir
    from meterlink.reports.templating import write_outputs
    from meterlink.storage.processing import FieldSeries, calibrated_series
    from meterlink.reports.render import value_label
    from meterlink.storage.store import Store

    if not Path(db_path).is_file():
        raise MeterlinkError(f"database {str(db_path)!r} does not exist")
    checked_dir(template_dir)
    if pdf and not pdf_available():
        raise MeterlinkError(PDF_HINT)
    out = Path(out_dir)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise MeterlinkError(f"cannot create report directory {str(out)!r}: {exc.strerror}") from None
    with Store(db_path) as store:
        s = store.session(session_id)
        standard, tier, rule = _choices(store, session_id, standard, tier, rule)
        series = calibrated_series(store, session_id)
        cal = store.calibrations(session_id)[-1]
        cert = parse_certificate(cal["certificate_text"], "stored calibration")
        if isinstance(series, FieldSeries):
            band = (s["band_lo_hz"], s["band_hi_hz"]) if s.get("band_lo_hz") and s.get("band_hi_hz") else None
            a = assess_field(series, standard, tier, rule, freq_hz=s.get("freq_hz"), band=band,
                             fallback_range=cert.freq_range_hz, has_h=cert.quantity == "H")
        else:
            from meterlink.physics.calibrate import floor_e_v_per_m

            a = assess_spectrum(series, standard, tier, rule, floor_v_per_m=floor_e_v_per_m(cert, series.freq_hz))
        events = store.events(session_id)
    instrument_rows = [
        ("meter", f"{s.get('device_model')} serial {s.get('device_serial')}"),
        ("probe or antenna", s.get("device_probe_serial")),
        ("firmware / protocol", f"{s.get('device_fw_version')} / {s.get('device_protocol_version')}"),
        ("port", s.get("port")), ("session notes", s.get("notes")),
        ("certificate applied", cal["certificate_name"]), ("certificate due", cert.due_date),
        ("certificate SHA-256", cal["certificate_sha256"]),
        ("recorded", f"{T.utc(float(np.nanmin(series.t_utc)))} to {T.utc(float(np.nanmax(series.t_utc)))} "
                     f"(device clock)" if len(series.t_utc) else "-")]
    assessment_rows = [
        ("standard", f"{a.standard}, {a.tier_label}: {a.source}"),
        ("reference level check", a.status),
        ("decision rule", a.rule), ("mode", f"{a.mode}: {a.frequency_note}"),
        ("reference level", f"{T.num(a.limit_v_per_m, '{:.4g}')} V/m" + (" (derived)" if a.limit_derived else "")),
        ("averaging time", f"{a.window_s / 60:g} min" if a.window_s else
         "none in the standard: instantaneous values compared" if a.averaging == "instantaneous" else "-"),
        ("peak", f"{a.peak_v_per_m:.4g} V/m"),
        (value_label(a), f"{a.value_v_per_m:.4g} V/m (coverage {100 * a.coverage:.1f} %)"),
        *((("partial windows (start of record)", f"up to {a.partial_v_per_m:.4g} V/m, not the standard's average"),)
          if a.partial_v_per_m is not None else ()),
        ("expanded uncertainty", f"U = {a.u_expanded_db:.2f} dB (k = 2)"),
        ("percent of the field level", f"{a.percent_field:.1f} %"),
        ("percent of the power-density level", f"{a.percent_power:.1f} %")]
    field = isinstance(series, FieldSeries)
    if field:
        H.write_csv(out / "values.csv", ("reading_id", "t_utc", "e_v_per_m", "ex_v_per_m", "ey_v_per_m", "ez_v_per_m",
                                         "u_expanded_db", "flags"),
                    ([int(i), f"{t:.3f}", f"{v:.6g}", *(f"{x:.6g}" for x in ax), f"{u:.3f}", int(fl)]
                     for i, t, v, ax, u, fl in zip(series.reading_ids, series.t_utc, series.e_v_per_m,
                                                    series.axes_v_per_m, series.u_expanded_db, series.flags)))
    else:
        H.write_csv(out / "values.csv", ("freq_hz", "e_v_per_m", "term_ratio", "quantity", "share"),
                    ([x.freq_hz, x.e_v_per_m, x.term_ratio, x.quantity, x.share] for x in a.emitters))
    title = f"Exposure record, session {session_id}"
    page = render("session.html", template_dir, title=title,
                  ident=f"{title}: {s.get('device_model')} serial {s.get('device_serial')}",
                  a=a, instrument_rows=instrument_rows, assessment_rows=assessment_rows,
                  field_plot=_field_plot(series, a) if field else None,
                  shares_plot=None if field else _shares_plot(a),
                  event_rows=event_summary(events), cautions=CAUTIONS)
    html = out / "report.html"
    write_outputs(page, html, pdf)
    return html


_SEVERITY_RANK = {"error": 0, "warning": 1, "info": 2}


def event_summary(events) -> list[list]:
    """The events table: one row per kind (most severe kinds first), with how many, first and last time
    (UTC) and the latest message, so 51 repeated entries read as one line."""
    groups: dict[str, list] = {}
    for ev in events:
        groups.setdefault(ev["kind"], []).append(ev)
    rows = []
    for kind, evs in groups.items():
        evs = sorted(evs, key=lambda e: e["t_utc"] or 0.0)
        sev = min((e["severity"] for e in evs), key=lambda v: _SEVERITY_RANK.get(v, 3))
        rows.append([kind, sev, len(evs), T.utc(evs[0]["t_utc"]), T.utc(evs[-1]["t_utc"]) if len(evs) > 1 else "",
                     evs[-1]["message"] or ""])
    return sorted(rows, key=lambda r: (_SEVERITY_RANK.get(r[1], 3), -r[2], r[0]))
