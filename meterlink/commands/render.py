"""``meterlink render``: one command for every report, as HTML or PDF, from what the database holds.

The kind of record decides the report: a survey session gives the survey report, any other recorded
session the session report, a station database (without --session) the station's publication page.
"""

from __future__ import annotations

HELP = "render the report of a survey, a recorded session or a monitoring station as HTML or PDF"


def add_arguments(parser) -> None:
    parser.add_argument("db", metavar="DB", help="database file (recording, survey or monitoring station)")
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
    parser.add_argument("--json", action="store_true", help="print the kind of record and the files written as JSON")


def _kind(db, session):
    """('station', None) or (session kind, session id) of the record to render; one-line errors."""
    import sqlite3

    from meterlink.errors import MeterlinkError
    from meterlink.storage.store import describe_sqlite_error, open_readonly

    conn = open_readonly(db)
    try:
        tables = {r[0] for r in conn.execute("select name from sqlite_master where type = 'table'")}
        if session is None and "mon_station" in tables:
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


def run(args) -> int:
    import json
    from pathlib import Path

    from meterlink.cli import SAFETY_LINE
    from meterlink.errors import MeterlinkError
    from meterlink.reports.templating import PDF_HINT, pdf_available, template_dir, write_outputs

    pdf = args.format == "pdf"
    template_dir(args.template_dir)                       # bad input first, before anything is read
    if pdf and not pdf_available():
        raise MeterlinkError(PDF_HINT)
    if not Path(args.db).is_file():
        raise MeterlinkError(f"database {args.db!r} does not exist")
    kind, sid = _kind(args.db, args.session)
    out = Path(args.out)
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

        html = write_report(args.db, sid, out, template_dir=args.template_dir, pdf=pdf)
        files = [html, *([html.with_suffix(".pdf")] if pdf else []), *sorted(html.parent.glob("*.csv"))]
    else:
        from meterlink.reports.session_report import write_session_report

        html = write_session_report(args.db, sid, out, standard=args.standard, tier=args.tier, rule=args.rule,
                                    template_dir=args.template_dir, pdf=pdf)
        files = [html, *([html.with_suffix(".pdf")] if pdf else []), out / "values.csv"]
    if args.json:
        print(json.dumps({"kind": kind, "session": sid, "files": [str(f) for f in files], "safety": SAFETY_LINE},
                         indent=2))
    else:
        what = "station page" if kind == "station" else f"{kind} session {sid}"
        print(f"{what}: " + ", ".join(str(f) for f in files if f.suffix in (".html", ".pdf")))
        print(SAFETY_LINE)
    return 0
