"""The survey report: one self-contained HTML file (figures embedded as base64 PNG) and CSV files.

Every text that came from the device, the plan or the technician is HTML-escaped; CSV cells that a
spreadsheet would run as a formula are prefixed with a quote.
"""

from __future__ import annotations

import datetime as _dt
import math
from pathlib import Path

from meterlink.errors import MeterlinkError
from meterlink.reports.htmlpage import CSS, csv_cell, e, img, num, table, utc, verdict
from meterlink.reports.htmlpage import write_csv as write_rows

CAUTIONS = (
    "The values in this report describe the field at the listed points, at the time of measurement and, "
    "where stated, extrapolated to the maximum power declared for each source. They support, and do not "
    "replace, an exposure assessment by a qualified person under the regulations that apply at the site; "
    "local codes and licensed practice come first. Reference levels assume far-field, plane-wave "
    "conditions: closer than a few wavelengths to an antenna, or below 30 MHz, E and H must both be "
    "measured and the basic restrictions may govern. A broadband probe cannot tell sources apart; its "
    "value is compared with the most restrictive reference level in its band. Keep clear of energised "
    "antennas and observe the site's access rules, barriers and signage at all times.")

_CSS = CSS
_e, _f, _utc, _verdict, _table, _img = e, num, utc, verdict, table, img


def render_html(sv: dict, figures: dict[str, bytes]) -> str:
    """The report as one HTML string from a loaded survey (meterlink.survey.store.load_survey)."""
    from meterlink.cautions import SAFETY_LINE
    from meterlink.physics.limits import describe_standard
    from meterlink.physics.verdict import get_rule

    ses, site, pts = sv["session"], sv["site"], sv["points"]
    rule = get_rule(sv["decision_rule"])
    std = describe_standard(sv["standard"])
    title = sv["title"] or f"Survey of {site.get('name', '')}"
    due = sv["certificate_due"]
    expired = due and _dt.date.fromisoformat(due) < _dt.datetime.fromtimestamp(
        sv["created_utc"], _dt.timezone.utc).date()
    h = [f"<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'><title>{_e(title)}</title>"
         f"<style>{_CSS}</style></head><body>",
         f"<h1>{_e(title)}</h1>",
         f'<p class="caution"><strong>Safety.</strong> {_e(SAFETY_LINE)}</p>',
         f"<p class='note'>Survey session {int(sv['session_id'])}, measured {_e(_utc(sv['created_utc']))} to "
         f"{_e(_utc(sv['ended_utc']))}; report made {_e(_utc(_dt.datetime.now(_dt.timezone.utc).timestamp()))}, "
         f"meterlink {_e(sv['software_version'])}.</p>",
         "<h2 id='site'>Site</h2>",
         _table(["item", "value"], [(_e(k.replace("_", " ")), _e(v)) for k, v in site.items() if v not in (None, "")]),
         "<h2 id='sources'>Sources</h2>"]
    if sv["sources"]:
        h.append(_table(["source", "technology", "frequency (MHz)", "power during survey (W)", "maximum power (W)",
                         "field factor to maximum"],
                        [(_e(s["name"]), _e(s["technology"]), _f(s["freq_hz"] / 1e6), _f(s["power_w"], "{:g}"),
                          _f(s["max_power_w"], "{:g}"),
                          _f(math.sqrt(s["max_power_w"] / s["power_w"]) if s["power_w"] and s["max_power_w"] else None))
                         for s in sv["sources"]], numeric={2, 3, 4, 5}))
    else:
        h.append("<p>No sources listed: values are not extrapolated.</p>")
    h += ["<h2 id='instrument'>Instrument and calibration</h2>",
          _table(["item", "value"], [
              ("meter", _e(f"{ses.get('device_model') or ''} serial {ses.get('device_serial') or ''}")),
              ("firmware / protocol", _e(f"{ses.get('device_fw_version') or ''} / {ses.get('device_protocol_version') or ''}")),
              ("probe or antenna reported by the meter", _e(ses.get("device_probe_serial") or "")),
              ("certificate reference reported by the meter", _e(ses.get("device_cert_ref") or "")),
              ("certificate applied", _e(f"{sv['certificate_name']} (number {sv['certificate_number']})")),
              ("certificate due date", _e(due) + (" <span class='bad'>EXPIRED at the time of the survey</span>"
                                                   if expired else "")),
              ("certificate SHA-256", f"<code>{_e(sv['certificate_sha256'])}</code>"),
              ("sensor", _e(sv["sensor"])), ("port", _e(ses.get("port")))]),
          "<h2 id='basis'>Assessment basis (fixed before measuring)</h2>",
          _table(["item", "value"], [
              ("standard", _e(f"{std['title']} ({std['document']})")),
              ("tier", _e(std["tiers"].get(sv["tier"], sv["tier"]))),
              ("decision rule", _e(f"{rule.name}: {rule.description} ({rule.reference})")),
              ("broadband reference level", _e(f"{sv['e_ref_v_per_m']:.2f} V/m, the lowest E level from "
                                               f"{sv['band_lo_hz'] / 1e6:g} to {sv['band_hi_hz'] / 1e6:g} MHz "
                                               f"(at {sv['e_ref_freq_hz'] / 1e6:.1f} MHz)")),
              ("reference level check", _e(_check_status(sv))),
              ("averaging time", _e(f"{sv['averaging_time_s'] / 60:g} min" if sv["averaging_time_s"] else
                                    "none in the standard: the highest single reading is judged")),
              ("follow-up threshold", _e(_followup(sv)))])]
    h += ["<h2 id='points'>Points</h2>",
          "<p class='note'>Values are RMS in time (power domain); spatial averages are sqrt(mean(E²)) over the "
          "heights; a sweep is the maximum single reading. U is the expanded uncertainty (k = 2).</p>",
          _table(["#", "point", "mode", "height (m)", "E (V/m)", "max (V/m)", "U (dB)", "% of E level",
                  "% of power level", "verdict", "follow-up", "notes"],
                 [(str(p["point_no"]), _e(p["label"]), _e(p["scheme"]), _heights(p), _f(p["e_v_per_m"]),
                   _f(p["e_max_v_per_m"]), _f(p["u_expanded_db"], "{:.2f}"), _f(p["percent_field"], "{:.1f}"),
                   _f(p["percent_power"], "{:.1f}"), _verdict(p["verdict"]),
                   "<span class='und'>frequency-selective measurement needed</span>" if p["followup"] else "",
                   _e("; ".join([x for x in [p["notes"], *p["warnings"]] if x])
                      + ("" if p["complete"] else " INCOMPLETE")))
                  for p in pts], numeric={0, 3, 4, 5, 6, 7, 8})]
    h += ["<h2 id='statements'>Statements</h2><ul>"] + [f"<li><strong>{_e(p['label'])}</strong>: "
                                                         f"{_e(p['statement'])}</li>" for p in pts] + ["</ul>"]
    h += ["<h2 id='extrapolation'>Measured and extrapolated to maximum power</h2>",
          _table(["point", "E measured (V/m)", "E extrapolated (V/m)", "% power measured", "% power extrapolated",
                  "verdict measured", "verdict extrapolated"],
                 [(_e(p["label"]), _f(p["e_v_per_m"]), _f(p["e_extrapolated_v_per_m"]), _f(p["percent_power"], "{:.1f}"),
                   _f(p["percent_power_extrapolated"], "{:.1f}"), _verdict(p["verdict"]),
                   _verdict(p["verdict_extrapolated"])) for p in pts], numeric={1, 2, 3, 4}),
          "<p class='note'>A broadband value is scaled by the largest field factor of the listed sources (worst "
          "case); frequency-selective lines are scaled by their own source's factor, unlisted lines by 1.</p>"]
    sel = [p for p in pts if p["emitters"]]
    h.append("<h2 id='exposure-ratio'>Total exposure ratio (frequency-selective)</h2>")
    if sel:
        h.append(_table(["point", "total exposure ratio", "extrapolated", "strongest emitter"],
                        [(_e(p["label"]), _f(p["exposure_ratio"], "{:.4f}"), _f(p["exposure_ratio_extrapolated"], "{:.4f}"),
                          _e(max(p["emitters"], key=lambda m: m["share"] or 0)["name"])) for p in sel], numeric={1, 2}))
    else:
        h.append("<p>No frequency-selective data in this survey.</p>")
    h.append("<h2 id='plots'>Figures</h2>")
    for key, alt in (("walk", "field along the walk"), ("points", "per-point percent of the reference level"),
                     ("shares", "emitter shares")):
        if key in figures:
            h.append(f"<figure>{_img(figures[key], alt)}<figcaption class='note'>{_e(alt)}</figcaption></figure>")
    h += ["<h2 id='cautions'>Cautions</h2>", f'<p class="caution">{_e(SAFETY_LINE)}</p>', f"<p>{_e(CAUTIONS)}</p>",
          "</body></html>"]
    return "\n".join(h)


def _check_status(sv) -> str:
    """What the broadband level (and, for frequency-selective points, the summation rule) was
    checked against, from the packaged tables."""
    from meterlink.errors import MeterlinkError
    from meterlink.physics.limits import NOT_CHECKED, reference_level, summation_rule

    try:
        level = reference_level(sv["standard"], sv["tier"], sv["e_ref_freq_hz"]).status
    except MeterlinkError:
        level = NOT_CHECKED
    try:
        rule = summation_rule(sv["standard"], sv["tier"]).status
    except MeterlinkError:
        return f"level: {level}"
    return f"level: {level}; multi-frequency summation rule: {rule}"


def _followup(sv) -> str:
    parts = []
    if sv["followup_v_per_m"] is not None:
        parts.append(f"{sv['followup_v_per_m']:g} V/m")
    if sv["followup_percent"] is not None:
        parts.append(f"{sv['followup_percent']:g} % of the E reference level")
    return " or ".join(parts) if parts else "none set"


def _heights(p) -> str:
    hs = [s["height_m"] for s in p["samples"]]
    return ", ".join(f"{x:.2f}" for x in hs) if len(hs) > 1 else _f(p["height_m"], "{:.2f}")


_cell, _csv = csv_cell, write_rows


def write_csv(sv: dict, out: Path) -> list[Path]:
    cols = ["point_no", "label", "mode", "scheme", "x_m", "y_m", "lat_deg", "lon_deg", "height_m", "near_field",
            "duration_s", "n_readings", "e_v_per_m", "e_max_v_per_m", "ex_v_per_m", "ey_v_per_m", "ez_v_per_m",
            "u_expanded_db", "coverage", "complete", "e_limit_v_per_m", "percent_field", "percent_power",
            "exposure_ratio", "verdict", "followup", "e_extrapolated_v_per_m", "percent_power_extrapolated",
            "exposure_ratio_extrapolated", "verdict_extrapolated", "notes"]
    files = {"points.csv": (cols, [[p[c] for c in cols] for p in sv["points"]]),
             "samples.csv": (["point_no", "label", "sample_no", "height_m", "x_m", "y_m", "e_v_per_m", "e_max_v_per_m",
                              "u_expanded_db", "n_readings", "coverage"],
                             [[p["point_no"], p["label"], s["sample_no"], s["height_m"], s["x_m"], s["y_m"],
                               s["e_v_per_m"], s["e_max_v_per_m"], s["u_expanded_db"], s["n_readings"], s["coverage"]]
                              for p in sv["points"] for s in p["samples"]]),
             "sources.csv": (["name", "technology", "freq_hz", "power_w", "max_power_w"],
                             [[s["name"], s["technology"], s["freq_hz"], s["power_w"], s["max_power_w"]]
                              for s in sv["sources"]]),
             "emitters.csv": (["point_no", "label", "emitter", "freq_hz", "e_v_per_m", "e_extrapolated_v_per_m",
                               "ratio", "share"],
                              [[p["point_no"], p["label"], m["name"], m["freq_hz"], m["e_v_per_m"],
                                m["e_extrapolated_v_per_m"], m["ratio"], m["share"]]
                               for p in sv["points"] for m in p["emitters"]]),
             "trace.csv": (["point_no", "sample_no", "boot", "seq", "t_utc", "t_device_s", "e_v_per_m", "x_m", "y_m",
                            "z_m", "used"], [[t[c] for c in ("point_no", "sample_no", "boot", "seq", "t_utc",
                                                               "t_device_s", "e_v_per_m", "x_m", "y_m", "z_m", "used")]
                                             for t in sv["trace"]])}
    paths = []
    for name, (head, rows) in files.items():
        _csv(out / name, head, rows)
        paths.append(out / name)
    return paths


def write_report(db_path, session_id: int, out_dir) -> Path:
    """Write report.html and the CSV files of a survey session into out_dir; returns the HTML path."""
    from meterlink.storage.store import Store
    from meterlink.survey import plots
    from meterlink.survey.store import load_survey

    out = Path(out_dir)
    if not Path(db_path).is_file():
        raise MeterlinkError(f"database {str(db_path)!r} does not exist")
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise MeterlinkError(f"cannot create report directory {str(out)!r}: {exc.strerror}") from None
    with Store(db_path, readonly=True) as store:      # a report only reads
        sv = load_survey(store, int(session_id))
    pts = sv["points"]
    thr = [v for v in (sv["followup_v_per_m"], None if sv["followup_percent"] is None
                       else sv["followup_percent"] / 100 * sv["e_ref_v_per_m"]) if v is not None]
    figures = {}
    if sv["trace"]:
        figures["walk"] = plots.walk_plot(sv["trace"], pts, sv["e_ref_v_per_m"], min(thr) if thr else None)
    if pts:
        figures["points"] = plots.points_plot(pts)
    sel = [p for p in pts if p["emitters"]]
    if sel:
        figures["shares"] = plots.shares_plot(max(sel, key=lambda p: p["exposure_ratio"] or 0))
    html_path = out / "report.html"
    html_path.write_text(render_html(sv, figures), encoding="utf-8")
    write_csv(sv, out)
    return html_path
