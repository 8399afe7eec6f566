"""``meterlink render``: one command for every report, as HTML or PDF, from what the database holds.

The kind of record decides the report: a survey session gives the survey report, any other recorded
session the session report, a station database (without --session) the station's publication page,
and a lab folder (certificate.toml + readings.csv from 'meterlink lab') the certificate page, from the
readings analysed again and accepted only if they reproduce the issued certificate exactly. Several
station databases (or station files) with --period give one period report of the set of stations.
"""

from __future__ import annotations

HELP = "render the report of a survey, a recorded session, a monitoring station or a lab certificate as HTML or PDF"


def add_arguments(parser) -> None:
    parser.add_argument("db", metavar="DB", nargs="+", help="database file (recording, survey or monitoring "
                        "station), or a folder written by 'meterlink lab run/import'; with --period, one or more "
                        "station databases or station files (.toml): several give one report of the set")
    parser.add_argument("--session", metavar="ID", help="session id (see 'meterlink sessions'); without it: the "
                        "station page of a station database, or the only session of the file")
    parser.add_argument("--format", choices=("html", "pdf"), default="html",
                        help='html (default) or pdf (also writes the HTML; needs pip install "meterlink[pdf]")')
    parser.add_argument("--out", metavar="DIR", default="rendered", help="output folder (default: ./rendered)")
    parser.add_argument("--template-dir", metavar="DIR",
                        help="folder whose templates or stylesheets (same file names as the packaged ones, e.g. "
                             "report.css, print.css, survey.html) replace the packaged ones")
    parser.add_argument("--standard", metavar="NAME", help="recorded session: standard (default: its last assessment's)")
    parser.add_argument("--tier", choices=("public", "occupational"), help="recorded session: tier")
    parser.add_argument("--rule", metavar="NAME", help="recorded session: decision rule")
    parser.add_argument("--from", dest="t_from", metavar="DATE", help="station page: statistics from (UTC ISO date)")
    parser.add_argument("--to", dest="t_to", metavar="DATE", help="station page: statistics to, exclusive")
    parser.add_argument("--period", metavar="PERIOD", help="station database(s): the period report of a month "
                        "(YYYY-MM) or a quarter (YYYY-Qn) instead of the publication page")
    parser.add_argument("--report-number", metavar="TEXT", help="survey: report number (default: the plan's [report] "
                        "number)")
    parser.add_argument("--revision", metavar="TEXT", help="survey: report revision (default: the plan's, else 0)")
    parser.add_argument("--revision-note", metavar="TEXT", help="survey: what this revision changed (needed to issue "
                        "a revision after the first; default: the plan's [report] revision_note)")
    parser.add_argument("--reviewer", metavar="NAME", help="survey: who checked the report (default: the plan's)")
    parser.add_argument("--reviewer-qualification", metavar="TEXT", help="survey: the reviewer's qualification")
    parser.add_argument("--review-date", metavar="DATE", help="survey: the date the report was checked")
    parser.add_argument("--conditions", metavar="TOML", help="survey: a file with the site conditions to state, in "
                        "the plan's form: [conditions] weather, temperature_degc, humidity_percent and [transmitter] "
                        "confirmed_with, confirmed_at, state (over the plan's; kept with an issued revision)")
    parser.add_argument("--weather", metavar="TEXT", help="survey: the weather during the survey (over the plan's "
                        "and --conditions')")
    parser.add_argument("--temperature-degc", metavar="C", help="survey: air temperature during the survey, °C")
    parser.add_argument("--humidity-percent", metavar="PCT", help="survey: relative humidity during the survey, %%")
    parser.add_argument("--as-issued", action="store_true", help="survey: write the kept copy of an issued "
                        "--revision, even when the survey or the sign-off changed since")
    parser.add_argument("--issue", action="store_true", help="survey: issue this revision: keep it in the database "
                        "so that it renders again unchanged and its number and revision cannot carry other content")
    parser.add_argument("--lab-session", metavar="TOML", help="lab folder: the session file the certificate was made "
                        "with (default: the invented demo session of 'lab run')")
    parser.add_argument("--previous", metavar="CERT", help="lab folder: the previous certificate it was compared with")
    parser.add_argument("--json", action="store_true", help="print the kind of record and the files written as JSON")


def _conditions(args) -> dict | None:
    """The site conditions given to render (--conditions file, then --weather, --temperature-degc,
    --humidity-percent over it), checked as the plan's are; None when none is given; one-line errors."""
    from meterlink.errors import MeterlinkError, read_input_toml
    from meterlink.survey.plan import site_conditions

    out = {}
    if args.conditions:
        doc = read_input_toml(args.conditions, "conditions")
        extra = sorted(set(doc) - {"conditions", "transmitter"})
        if extra:
            raise MeterlinkError(f"conditions file {args.conditions}: unknown table {extra[0]!r} (known: conditions, "
                                 "transmitter)")
        out = site_conditions(doc, args.conditions, kind="conditions file")
    if args.weather is not None:
        if not args.weather.strip():
            raise MeterlinkError("--weather is empty: say what the weather was")
        out["weather"] = args.weather
    for option, key, lo, hi in (("--temperature-degc", "temperature_degc", -60.0, 70.0),
                                ("--humidity-percent", "humidity_percent", 0.0, 100.0)):
        given = getattr(args, key)
        if given is None:
            continue
        try:
            v = float(given)
        except ValueError:
            v = float("nan")
        if not lo <= v <= hi:
            raise MeterlinkError(f"{option} {given!r} is not a number from {lo:g} to {hi:g}")
        out[key] = v
    return out or None


def _station_database(path: str) -> str:
    """A station file (.toml) names its database; anything else is taken as the database itself."""
    from pathlib import Path

    if Path(path).suffix.lower() != ".toml":
        return path
    from meterlink.station.stationfile import load_station

    return str(load_station(path).database)


def _kind(db, session):
    """('station', None) or (session kind, session id) of the record to render; one-line errors."""
    import sqlite3

    from meterlink.errors import MeterlinkError
    from meterlink.storage.store import describe_sqlite_error, open_readonly

    conn = open_readonly(db)
    try:
        tables = {r[0] for r in conn.execute("select name from sqlite_master where type = 'table'")}
        # every file has the monitoring tables (schema 5); a station file is one the monitor wrote a station to
        if session is None and "mon_station" in tables and conn.execute("select 1 from mon_station limit 1").fetchone():
            return "station", None
        if "sessions" not in tables:
            raise MeterlinkError(f"{db}: holds neither recorded sessions nor a monitoring station")
        if session is None:
            ids = [r[0] for r in conn.execute("select id from sessions order by id")]
            if len(ids) != 1:
                listed = ", ".join(map(str, ids[:20])) + (", ..." if len(ids) > 20 else "")
                raise MeterlinkError(f"{db}: holds {len(ids)} sessions ({listed or 'none'}): choose one with --session")
            sid = ids[0]
        else:
            try:
                sid = int(session)
            except ValueError:
                raise MeterlinkError(f"--session {session!r} is not a whole number") from None
        row = conn.execute("select kind from sessions where id = ?", (sid,)).fetchone()
        if row is None:
            raise MeterlinkError(f"{db}: no session {sid}")
        return ("survey" if row[0] == "survey" else "recording"), sid
    except sqlite3.DatabaseError as exc:
        raise describe_sqlite_error(db, exc) from None
    finally:
        conn.close()


def _lab(folder, out, args, pdf):
    """The certificate page of a lab folder, re-analysed from its readings; refused unless the analysis
    reproduces the issued certificate.toml byte for byte (same session, readings, previous certificate)."""
    import dataclasses

    from meterlink.commands.lab import _session
    from meterlink.errors import MeterlinkError
    from meterlink.lab import certify, html, procedures as pr
    from meterlink.physics.certificate import dump_certificate, load_certificate
    from meterlink.reports.templating import write_outputs

    cert_path, readings = folder / "certificate.toml", folder / "readings.csv"
    if not (cert_path.is_file() and readings.is_file()):
        raise MeterlinkError(f"{folder}: not a lab folder (needs certificate.toml and readings.csv from 'meterlink lab')")
    if (out / "certificate.toml").exists():
        raise MeterlinkError(f"{out}: holds an issued certificate; choose another --out folder")
    issued = load_certificate(cert_path)
    session = _session(args.lab_session)
    if not args.lab_session:     # the demo session is dated the day it ran: take the issued dates
        session = dataclasses.replace(session, cal_date=issued.cal_date, due_date=issued.due_date,
                                      issue_date=issued.cal_date)
    session = dataclasses.replace(session, certificate_number=issued.certificate_number)
    previous = load_certificate(args.previous) if args.previous else None
    results = pr.import_csv(readings, session)
    cal = certify.analyse(session, results, previous)
    if dump_certificate(cal.certificate) != cert_path.read_text(encoding="utf-8"):
        raise MeterlinkError(f"{folder}: the readings analysed with this session do not reproduce the issued "
                             f"certificate {issued.certificate_number} (give the --lab-session and --previous it was "
                             f"made with)")
    cmp = certify.compare(cal, previous, results) if previous else None
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise MeterlinkError(f"cannot create report directory {str(out)!r}: {exc.strerror}") from None
    return write_outputs(html.render(cal, cmp, args.template_dir), out / "certificate.html", pdf)


def _database(kind, sid, out, args, pdf):
    """The report of a database record: station page, survey report or session report; the files written."""
    from meterlink.errors import MeterlinkError
    from meterlink.reports.templating import write_outputs

    if kind != "survey" and (args.issue or args.as_issued):
        raise MeterlinkError("--issue and --as-issued apply to a survey report only")
    if kind != "survey" and args.site_conditions:
        raise MeterlinkError("--conditions, --weather, --temperature-degc and --humidity-percent apply to a survey "
                             "report only")
    if kind != "station" and args.period:
        raise MeterlinkError("--period applies to a monitoring station database only")
    if kind == "station" and args.period:
        from meterlink.station.period_report import write_period_report

        return write_period_report(args.db, args.period, out, template_dir=args.template_dir, pdf=pdf)
    if kind == "station":
        import time

        from meterlink.commands.stats import open_station
        from meterlink.station.publish import html_page

        conn, t0, t1 = open_station(args)
        try:
            page = html_page(conn, time.time(), t0, t1, args.template_dir)
        finally:
            conn.close()
        try:
            out.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise MeterlinkError(f"cannot create report directory {str(out)!r}: {exc.strerror}") from None
        files = write_outputs(page, out / "station.html", pdf)
    elif kind == "survey":
        from meterlink.survey.report import write_report

        info = {}
        html = write_report(args.db, sid, out, template_dir=args.template_dir, pdf=pdf, issue=args.issue,
                            as_issued=args.as_issued, info=info, conditions=args.site_conditions,
                            meta={"number": args.report_number, "revision": args.revision,
                                  "revision_note": args.revision_note, "reviewer": args.reviewer,
                                  "reviewer_qualification": args.reviewer_qualification,
                                  "review_date": args.review_date})
        args.revision_state = info["revision_state"]
        files = [html, *([html.with_suffix(".pdf")] if pdf else []), *sorted(html.parent.glob("*.csv"))]
    else:
        from meterlink.reports.session_report import write_session_report

        html = write_session_report(args.db, sid, out, standard=args.standard, tier=args.tier, rule=args.rule,
                                    template_dir=args.template_dir, pdf=pdf)
        files = [html, *([html.with_suffix(".pdf")] if pdf else []), out / "values.csv"]
    return files


def run(args) -> int:
    import json
    from pathlib import Path

    from meterlink.cli import SAFETY_LINE
    from meterlink.errors import MeterlinkError
    from meterlink.reports.templating import PDF_HINT, pdf_available, template_dir

    pdf = args.format == "pdf"
    template_dir(args.template_dir)                       # bad input first, before anything is read
    args.site_conditions = _conditions(args)
    if pdf and not pdf_available():
        raise MeterlinkError(PDF_HINT)
    out = Path(args.out)
    dbs = [_station_database(d) if args.period else d for d in args.db]
    if len(dbs) > 1 and not args.period:
        raise MeterlinkError(f"{len(dbs)} files given: several station databases make one report with --period "
                             "YYYY-MM or YYYY-Qn; every other report takes one file")
    args.db = dbs[0]
    if len(dbs) > 1:
        from meterlink.station.period_report import write_set_report

        for d in dbs:
            if not Path(d).is_file():
                raise MeterlinkError(f"database {d!r} does not exist")
            if _kind(d, None)[0] != "station":
                raise MeterlinkError(f"{d}: not a monitoring station database (--period with several files)")
        kind, sid = "stations", None
        files = write_set_report(dbs, args.period, out, template_dir=args.template_dir, pdf=pdf)
    elif Path(args.db).is_dir():
        kind, sid = "lab", None
        files = _lab(Path(args.db), out, args, pdf)
    elif not Path(args.db).is_file():
        raise MeterlinkError(f"database {args.db!r} does not exist")
    else:
        kind, sid = _kind(args.db, args.session)
        files = _database(kind, sid, out, args, pdf)
    if args.json:
        doc = {"kind": kind, "session": sid, "files": [str(f) for f in files], "safety": SAFETY_LINE}
        if getattr(args, "revision_state", None):
            doc["revision_state"] = args.revision_state
        print(json.dumps(doc, indent=2))
    else:
        what = {"station": f"station period report {args.period}" if args.period else "station page",
                "lab": "lab certificate",
                "stations": f"period report of {len(dbs)} stations"}.get(kind, f"{kind} session {sid}")
        state = {"draft": " (draft: not issued)", "issued": " (issued)",
                 "as issued": " (the issued revision, unchanged)"}.get(getattr(args, "revision_state", None), "")
        print(f"{what}{state}: " + ", ".join(str(f) for f in files if f.suffix in (".html", ".pdf")))
        print(SAFETY_LINE)
    return 0
