"""``meterlink report``: a self-contained HTML report with CSV files, for a survey or any recorded session."""

from __future__ import annotations

HELP = "write the HTML and CSV report of a survey, or of any recorded session that has been assessed"


def add_arguments(parser) -> None:
    parser.add_argument("--db", metavar="FILE", required=True, help="database file holding the survey")
    parser.add_argument("--session", metavar="ID", required=True, help="session id (see 'meterlink sessions')")
    parser.add_argument("--out", metavar="DIR", required=True, help="directory for report.html and the CSV files")
    parser.add_argument("--standard", metavar="NAME", help="for a recorded session: standard (default: its last assessment's)")
    parser.add_argument("--tier", choices=("public", "occupational"), help="for a recorded session: tier")
    parser.add_argument("--rule", metavar="NAME", help="for a recorded session: decision rule")
    parser.add_argument("--pdf", action="store_true", help='also write report.pdf (needs pip install "meterlink[pdf]")')
    parser.add_argument("--template-dir", metavar="DIR", help="folder of templates or stylesheets replacing the "
                        "packaged ones of the same name (see 'meterlink render')")
    parser.add_argument("--json", action="store_true", help="print the files written as JSON")


def run(args) -> int:
    import json

    from meterlink.cli import SAFETY_LINE
    from meterlink.errors import MeterlinkError
    from meterlink.survey.report import write_report

    try:
        sid = int(args.session)
    except ValueError:
        raise MeterlinkError(f"--session {args.session!r} is not a whole number") from None

    from meterlink.storage.store import Store

    with Store(args.db, readonly=True) as store:
        kind = store.session(sid)["kind"]
    if kind == "survey":
        html = write_report(args.db, sid, args.out, template_dir=args.template_dir, pdf=args.pdf)
    else:
        from meterlink.reports.session_report import write_session_report

        html = write_session_report(args.db, sid, args.out, standard=args.standard, tier=args.tier, rule=args.rule,
                                    template_dir=args.template_dir, pdf=args.pdf)
    files = sorted(str(p) for p in html.parent.glob("*.csv"))
    pdf = str(html.with_suffix(".pdf")) if args.pdf else None
    if args.json:
        print(json.dumps({"html": str(html), "csv": files, **({"pdf": pdf} if pdf else {})}, indent=2))
    else:
        print(f"report written: {html}" + (f" and {pdf}" if pdf else ""))
        print(SAFETY_LINE)
    return 0
