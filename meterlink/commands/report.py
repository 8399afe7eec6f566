"""``meterlink report``: the survey report (self-contained HTML and CSV files) of a stored survey."""

from __future__ import annotations

HELP = "write the HTML and CSV report of a survey session"


def add_arguments(parser) -> None:
    parser.add_argument("--db", metavar="FILE", required=True, help="database file holding the survey")
    parser.add_argument("--session", metavar="ID", required=True, help="survey session id")
    parser.add_argument("--out", metavar="DIR", required=True, help="directory for report.html and the CSV files")
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
    html = write_report(args.db, sid, args.out)
    files = sorted(str(p) for p in html.parent.glob("*.csv"))
    if args.json:
        print(json.dumps({"html": str(html), "csv": files}, indent=2))
    else:
        print(f"report written: {html}")
        print(SAFETY_LINE)
    return 0
