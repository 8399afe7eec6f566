"""The survey report: one self-contained HTML file (template survey.html, figures embedded as base64
PNG), optionally the same as PDF, and CSV files.

Every text that came from the device, the plan or the technician is autoescaped by the template; CSV
cells that a spreadsheet would run as a formula are prefixed with a quote.
"""

from __future__ import annotations

import datetime as _dt
from pathlib import Path

from meterlink.errors import MeterlinkError
from meterlink.reports.htmlpage import write_csv as write_rows
from meterlink.reports.digits import iso_utc
from meterlink.reports.templating import num
from meterlink.safetext import csv_cell

CAUTIONS = (
    "The values in this report describe the field at the listed points, at the time of measurement and, "
    "where stated, extrapolated to the maximum power declared for each source. They support, and do not "
    "replace, an exposure assessment by a qualified person under the regulations that apply at the site; "
    "local codes and licensed practice come first. Reference levels assume far-field, plane-wave "
    "conditions: closer than a few wavelengths to an antenna, or below 30 MHz, E and H must both be "
    "measured and the basic restrictions may govern. A broadband probe cannot tell sources apart; its "
    "value is compared with the most restrictive reference level in its band. Keep clear of energised "
    "antennas and observe the site's access rules, barriers and signage at all times.")

from meterlink.survey.outcome import WORST_FIRST as _WORST_FIRST, extrapolated_outcome, site_outcome

_REPORT_KEYS = {"number", "revision", "assessor", "qualification", "organisation", "date", "reviewer",
                "reviewer_qualification", "review_date", "revision_note"}


def conclusion(sv: dict) -> dict:
    """What a reader needs first: outcome under the chosen rule (as measured and at maximum declared
    power), the highest percent of the reference level and where, the follow-ups, the points without
    a conformity statement and why."""
    pts = sv["points"]
    measured = [p for p in pts if p["percent_power"] is not None]
    top = max(measured, key=lambda p: p["percent_power"], default=None)
    # a selective point at the label of a broadband point above the threshold is that point's follow-up
    selective = {p["label"] for p in pts if p["mode"] == "selective"}
    has_max = bool(sv["sources"]) or any(b["extrapolation"] for s in sv.get("selective", []) for b in s["bands"])
    return {"outcome": site_outcome(p["verdict"] for p in pts),
            "outcome_extrapolated": extrapolated_outcome((p["verdict_extrapolated"] for p in pts), has_max),
            "n_points": len(pts), "top": top, "n_selective": len(selective),
            "followup": [p for p in pts if p["followup"] and p["label"] not in selective],
            "followup_done": [p for p in pts if p["followup"] and p["label"] in selective],
            "not_assessable": [p for p in pts if p["verdict"] not in _WORST_FIRST or not p["complete"]]}


def _plan_doc(sv: dict) -> dict:
    import tomllib
    try:
        return tomllib.loads(sv.get("plan_text") or "")
    except tomllib.TOMLDecodeError:
        return {}


def report_meta(sv: dict, overrides: dict | None = None) -> dict:
    """Report number, revision, sign-off (assessor, qualification, organisation, date), the person who
    checked it (reviewer, reviewer_qualification, review_date) and what this revision changed
    (revision_note) from the plan's [report] table, options overriding; every value is text ("" when
    not given)."""
    rep = _plan_doc(sv).get("report", {})
    where = sv.get("plan_path") or "the stored plan"
    if not isinstance(rep, dict):
        raise MeterlinkError(f"plan {where}: [report] must be a table")
    extra = sorted(set(rep) - _REPORT_KEYS)
    if extra:
        raise MeterlinkError(f"plan {where}: [report]: unknown key {extra[0]!r} (known: {', '.join(sorted(_REPORT_KEYS))})")
    meta = {k: str(rep.get(k, "")) for k in sorted(_REPORT_KEYS)}
    meta.update({k: str(v) for k, v in (overrides or {}).items() if v not in (None, "")})
    meta["revision"] = meta["revision"] or "0"
    return meta


def point_photos(sv: dict) -> dict[str, list[tuple[str, str]]]:
    """Per point label, its photos as (file name, data: URI): those kept in the database (copied when
    the point was measured, schema version 11); for a point with none kept (a survey recorded before),
    read from the files the plan names (relative to the plan's folder), a missing or non-image file
    being a one-line error."""
    from meterlink.survey.photos import photo_entry, read_photo, time_taken

    from meterlink.survey.plan import _Ctx, _photos

    kept = sv.get("photos") or {}
    out = {p["label"]: kept[p["point_no"]] for p in sv["points"] if p["point_no"] in kept}
    base = Path(sv.get("plan_path") or ".").parent
    for i, pt in enumerate(_plan_doc(sv).get("point", []), 1):
        if not isinstance(pt, dict) or pt.get("label") in out:
            continue
        for ph in _photos(_Ctx(str(sv.get("plan_path")), base), pt.get("photos", []), f"point {i}"):
            mime, data = read_photo(ph, pt.get("label"))
            out.setdefault(pt.get("label"), []).append(
                photo_entry(Path(ph.path).name, mime, data, ph.caption, ph.direction_deg, *time_taken(data, ph.path)))
    return out


def compass(deg) -> str:
    """A direction of view as degrees from north with its 16-point compass name: '250 deg (WSW)'."""
    if deg is None:
        return ""
    names = ("N", "NNE", "NE", "ENE", "E", "ESE", "SE", "SSE", "S", "SSW", "SW", "WSW", "W", "WNW", "NW", "NNW")
    return f"{deg:g}\u00b0 from north ({names[int((deg % 360) / 22.5 + 0.5) % 16]})"


def render_html(sv: dict, figures: dict[str, bytes], template_dir=None, meta: dict | None = None, *,
                comparisons=(), gis_files=(), positions=None, made_utc: float | None = None,
                revisions: list | None = None, draft: bool = True, conditions: dict | None = None) -> str:
    """The report as one HTML string from a loaded survey (meterlink.survey.store.load_survey),
    laid out by the survey.html template (restyled from template_dir when given); revisions is the
    revision history (meterlink.survey.revisions.history), draft whether this one is not issued;
    conditions (plan.site_conditions' form) the site conditions given at render, over the plan's."""
    from meterlink.survey.plan import site_conditions

    from meterlink.physics.limits import describe_standard
    from meterlink.physics.verdict import get_rule
    from meterlink.reports.templating import render

    site = sv["site"]
    title = sv["title"] or f"Survey of {site.get('name', '')}"
    due = sv["certificate_due"]
    expired = bool(due) and _dt.date.fromisoformat(due) < _dt.datetime.fromtimestamp(
        sv["created_utc"], _dt.timezone.utc).date()
    meta = report_meta(sv, meta)
    made_utc = _dt.datetime.now(_dt.timezone.utc).timestamp() if made_utc is None else made_utc
    # on every printed page: a draft cannot pass for the issued revision
    number = (f"report {meta['number']} rev. {meta['revision']}{' DRAFT' if draft else ''}, " if meta["number"]
              else "")
    conditions = {"weather": "", "temperature_degc": None, "humidity_percent": None, "transmitter": None,
                  **site_conditions(_plan_doc(sv), sv.get("plan_path") or "the stored plan"), **(conditions or {})}
    return render("survey.html", template_dir, sv=sv, ses=sv["session"], pts=sv["points"], title=title,
                  ident=f"{title}, {number}survey session {int(sv['session_id'])}", expired=expired,
                  meta=meta, conclusion=conclusion(sv), photos=point_photos(sv),
                  made_utc=made_utc, conditions=conditions, revisions=revisions or [], draft=draft,
                  compass=compass,
                  site_rows=[(k.replace("_", " "), v) for k, v in site.items() if v not in (None, "")],
                  std=describe_standard(sv["standard"]), rule=get_rule(sv["decision_rule"]),
                  check_status=_check_status(sv), followup=_followup(sv), heights=_heights,
                  strongest=lambda p: max(p["emitters"], key=lambda m: m["share"] or 0)["name"],
                  figures=figures, cautions=CAUTIONS, comparisons=list(comparisons), gis_files=list(gis_files),
                  positions=positions if positions is not None else _positions(sv),
                  predicted_u_db=_prediction_u(sv), declared_name=_declared_name(sv))


def _positions(sv, summary: dict | None = None) -> dict:
    """Rows of the positions table, the GNSS port and how readings were matched to fixes in time (from the
    survey's closing gnss_summary event detail, when given; empty without a receiver)."""
    rows = []
    for p in sv["points"]:
        for s in p["samples"]:
            rows.append([p["point_no"], p["label"], s["sample_no"], num(s.get("lat_deg"), "{:.6f}"),
                         num(s.get("lon_deg"), "{:.6f}"), num(s.get("alt_m"), "{:.1f}"), num(s.get("pos_u_m"), "{:.1f}"),
                         s.get("fix_utc"), f"{s.get('n_positioned') or 0} of {s['n_readings']}"])
    return {"port": sv.get("gnss_port"), "rows": rows, "timing": _timing_note(summary or {})}


def _timing_note(d: dict) -> str:
    """How positions were matched to readings in time: the offset between the readings' time and GNSS
    time and the receiver's output delay, declared (and taken out) or not."""
    if d.get("offset_s") is None:
        return ""
    text = (f"Each reading was given the position at its own time on the receiver's track: readings' time "
            f"minus GNSS time was {d['offset_s']:+.3f} s (median of {d.get('offset_n')} fixes, spread "
            f"{d.get('offset_spread_s') or 0:.3f} s). ")
    if d.get("output_delay_s") is not None:
        where = "--gps-output-delay" if d.get("output_delay_from") == "option" else "the plan's gnss_output_delay_s"
        return text + (f"The receiver's output delay (from a fix's epoch to its sentences) was declared as "
                       f"{d['output_delay_s']:.3f} s ({where}) and taken out of that offset.")
    return text + ("No output delay of the receiver was declared: the offset includes it, so positions may "
                   "lag the readings by that delay (often 0.05 to 0.5 s) times the walking speed.")


def _prediction_u(sv):
    import json

    d = json.loads(sv["declared_json"]) if sv.get("declared_json") else {}
    return d.get("prediction_u_db")


def _declared_name(sv) -> str:
    import json

    if not sv.get("declared_json"):
        return ""
    d = json.loads(sv["declared_json"])
    return f"{d.get('name', '')} ({d.get('path', '')}), origin: {d.get('origin', '')}"


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
    return ", ".join(f"{x:.2f}" for x in hs) if len(hs) > 1 else num(p["height_m"], "{:.2f}")


_cell, _csv = csv_cell, write_rows


_GEO = ("lat_deg", "lon_deg", "alt_m", "pos_u_m", "fix_utc", "n_positioned")   # GNSS columns (schema version 7)


_TRACE = ("point_no", "sample_no", "boot", "seq", "t_utc", "t_device_s", "e_v_per_m", "x_m", "y_m", "z_m", "used",
          "lat_deg", "lon_deg", "alt_m", "pos_u_m", "fix_utc", "fix_quality", "n_sats", "hdop")


def write_csv(sv: dict, out: Path) -> list[Path]:
    cols = ["point_no", "label", "mode", "scheme", "x_m", "y_m", "lat_deg", "lon_deg", "height_m", "near_field",
            "duration_s", "n_readings", "e_v_per_m", "e_max_v_per_m", "ex_v_per_m", "ey_v_per_m", "ez_v_per_m",
            "u_expanded_db", "coverage", "complete", "e_limit_v_per_m", "percent_field", "percent_power",
            "exposure_ratio", "verdict", "followup", "e_extrapolated_v_per_m", "percent_power_extrapolated",
            "exposure_ratio_extrapolated", "verdict_extrapolated", "notes"]
    files = {"points.csv": (cols, [[p[c] for c in cols] for p in sv["points"]]),
             "samples.csv": (["point_no", "label", "sample_no", "height_m", "x_m", "y_m", "e_v_per_m", "e_max_v_per_m",
                              "u_expanded_db", "n_readings", "coverage"] + list(_GEO),
                             [[p["point_no"], p["label"], s["sample_no"], s["height_m"], s["x_m"], s["y_m"],
                               s["e_v_per_m"], s["e_max_v_per_m"], s["u_expanded_db"], s["n_readings"], s["coverage"]]
                              + [iso_utc(s.get(c)) if c == "fix_utc" else s.get(c) for c in _GEO]
                              for p in sv["points"] for s in p["samples"]]),
             "sources.csv": (["name", "technology", "freq_hz", "power_w", "max_power_w"],
                             [[s["name"], s["technology"], s["freq_hz"], s["power_w"], s["max_power_w"]]
                              for s in sv["sources"]]),
             "emitters.csv": (["point_no", "label", "emitter", "freq_hz", "e_v_per_m", "e_extrapolated_v_per_m",
                               "ratio", "share"],
                              [[p["point_no"], p["label"], m["name"], m["freq_hz"], m["e_v_per_m"],
                                m["e_extrapolated_v_per_m"], m["ratio"], m["share"]]
                               for p in sv["points"] for m in p["emitters"]]),
             # times a person reads: ISO 8601 UTC (the device's own seconds stay seconds)
             "trace.csv": (list(_TRACE), [[iso_utc(t.get(c)) if c in ("t_utc", "fix_utc") else t.get(c)
                                           for c in _TRACE] for t in sv["trace"]])}
    if sv.get("selective"):
        head = ["point_no", "label", "band", "technology", "freq_hz", "bandwidth_hz", "rbw_hz", "e_v_per_m",
                "u_expanded_db", "e_limit_v_per_m", "percent_field", "exposure_ratio", "share", "power_factor",
                "e_at_max_v_per_m", "exposure_ratio_at_max", "antenna_sha256", "analyser_idn"]
        files["selective.csv"] = (head, [[sp["point_no"], sp["label"], b["name"]] + [b[c] for c in head[3:16]]
                                         + [sp["antenna_sha256"], sp["analyser_idn"]]
                                         for sp in sv["selective"] for b in sp["bands"]])
    paths = []
    for name, (head, rows) in files.items():
        _csv(out / name, head, rows)
        paths.append(out / name)
    return paths


def write_report(db_path, session_id: int, out_dir, *, template_dir=None, pdf: bool = False,
                 meta: dict | None = None, issue: bool = False, as_issued: bool = False,
                 info: dict | None = None, conditions: dict | None = None) -> Path:
    """Write report.html (and report.pdf when asked) and the CSV files of a survey session into
    out_dir; returns the HTML path. meta overrides the plan's [report] (number, revision, sign-off).

    An issued number and revision (meterlink.survey.revisions) is written as issued when the content is
    the same, refused when it differs; issue=True keeps this revision as issued; as_issued=True writes the
    kept copy of an issued revision whatever the survey holds now. info, when given, gets
    "revision_state": "draft", "issued" (issued now) or "as issued" (the kept copy written again).

    conditions: site conditions given now (plan.site_conditions' form), key by key over the plan's
    [conditions] ([transmitter] as a whole) and over those given for the latest issued revision of the
    number (which a later render says too). They are kept with an issued revision and count in its
    content digest."""
    from meterlink.survey import revisions as rv
    from meterlink.reports.templating import PDF_HINT, pdf_available, template_dir as checked_dir, write_outputs
    from meterlink.storage.store import Store
    from meterlink.survey import plots
    from meterlink.survey.store import load_survey

    out = Path(out_dir)
    if not Path(db_path).is_file():
        raise MeterlinkError(f"database {str(db_path)!r} does not exist")
    checked_dir(template_dir)
    if pdf and not pdf_available():
        raise MeterlinkError(PDF_HINT)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise MeterlinkError(f"cannot create report directory {str(out)!r}: {exc.strerror}") from None
    with Store(db_path, readonly=True) as store:      # a draft only reads; issuing adds one row below
        sv = load_survey(store, int(session_id))
        full_meta = report_meta(sv, meta)
        rows = rv.issued(store.db, full_meta["number"])
        gnss = store.events(int(session_id), "gnss_summary")
    if as_issued and conditions:
        raise MeterlinkError("--as-issued writes the revision as it was issued: leave out the site conditions")
    conditions = {**(rv.recorded_conditions(rows) or {}), **(conditions or {})} or None
    digest = rv.content_digest(sv, full_meta, conditions)
    if as_issued and issue:
        raise MeterlinkError("--as-issued writes a revision already issued: leave out --issue")
    kept = rv.as_issued(rows, full_meta) if as_issued else rv.check(rows, int(session_id), full_meta, digest,
                                                                     issue=issue)
    if info is not None:
        info["revision_state"] = "as issued" if kept else "issued" if issue else "draft"
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
    from meterlink.survey import gis, map as smap, predicted

    frame = smap.site_frame(sv)
    png = smap.survey_map_png(sv, frame)
    if png is not None:
        figures["map"] = png
    comparisons = predicted.compare(sv, frame)
    gis_files = [p.name for p in gis.write_gis(sv, frame, out)]
    html_path = out / "report.html"
    if kept:              # the issued revision, unchanged: same content, same page
        html = kept["html"]
    else:
        made = _dt.datetime.now(_dt.timezone.utc).timestamp()
        html = render_html(sv, figures, template_dir, meta, comparisons=comparisons, gis_files=gis_files,
                           positions=_positions(sv, gnss[-1]["detail"] if gnss else None), made_utc=made,
                           revisions=rv.history(rows, full_meta, made, draft=not issue)
                           if full_meta["number"] else [],
                           draft=not issue, conditions=conditions)
        if issue:
            with Store(db_path) as store:
                rv.record(store, int(session_id), full_meta, digest, html, made, conditions)
    write_outputs(html, html_path, pdf)
    write_csv(sv, out)
    return html_path
