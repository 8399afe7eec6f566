"""``meterlink sessions``: what a database holds: sessions, their instruments, counts and events."""

from __future__ import annotations

import json

HELP = "list the sessions in a database, or one session's events (find the id for assess, report, recalibrate)"


def add_arguments(parser) -> None:
    parser.add_argument("--db", metavar="FILE", default="meterlink.db", help="database (default meterlink.db)")
    parser.add_argument("--events", metavar="ID", type=int, help="list the events of session ID instead")
    parser.add_argument("--kind", metavar="KIND", help="with --events: only events of this kind (e.g. seq_gap)")
    parser.add_argument("--verify", action="store_true",
                        help="check the file instead: SQLite's integrity check and the readings' span index "
                             "(reads every row; exit status 1 on a problem)")
    parser.add_argument("--salvage", metavar="OUT", help="copy every session that still reads whole (and every other "
                        "table that does) from a damaged file into the new file OUT")
    parser.add_argument("--json", action="store_true", help="print JSON")


def run(args) -> int:
    if args.salvage:
        return _salvage(args)
    if args.verify:
        return _verify(args)
    rows = _listing(args)
    if args.events is None:
        _survey_outcomes(rows)
    if args.json:
        print(json.dumps(rows, indent=2, default=str))
        return 0
    # a plain table (meterlink.reports.termtable), not rich: listing what a file holds starts fast
    import sys

    from meterlink.reports.termtable import colour_wanted, terminal_width

    table = _events_table(rows, args.events) if args.events is not None else _sessions_table(rows, args.db)
    print("\n".join(table.lines(terminal_width(80), colour_wanted(sys.stdout))))
    return 0


def _listing(args) -> list[dict]:
    """The sessions, or one session's events, read on a bare read-only sqlite3 connection (no numpy, no
    sqlite-utils: this command starts fast); a file of an older schema goes through the Store once, which
    upgrades it."""
    import sqlite3

    from meterlink.storage import listing
    from meterlink.storage.files import StorageError, describe_sqlite_error

    try:
        conn = listing.open_current(args.db)
        if conn is None:
            from meterlink.storage.store import Store

            Store(args.db, readonly=True).close()      # upgrades the file (or says why it cannot)
            conn = listing.open_current(args.db)
            if conn is None:
                raise StorageError(f"{args.db!r}: cannot bring the file to the current schema")
        try:
            if args.events is None:
                return listing.session_overview(conn)
            listing.require_session(conn, args.events, args.db)   # one-line error if there is no such session
            return listing.events(conn, args.events, args.kind)
        finally:
            conn.close()
    except sqlite3.DatabaseError as exc:    # a damaged page met while reading
        raise describe_sqlite_error(args.db, exc) from None


def _survey_outcomes(rows: list[dict]) -> None:
    """Each survey's site outcome as measured (survey_outcome) and at the maximum declared power
    (survey_outcome_extrapolated), by the rule of the survey report's conclusion (meterlink.survey.outcome)
    from the outcomes its points' current captures stored; None for other sessions. They replace the raw
    lists the listing read."""
    from meterlink.survey.outcome import extrapolated_outcome, site_outcome

    for r in rows:
        verdicts = r.pop("survey_point_verdicts", None)
        extrap = r.pop("survey_point_verdicts_extrapolated", None)
        has_max = r.pop("survey_max_power", None)
        r["survey_outcome"] = None if verdicts is None else site_outcome(json.loads(verdicts))
        r["survey_outcome_extrapolated"] = (None if verdicts is None else
                                            extrapolated_outcome(json.loads(extrap), bool(has_max)))


def _verify(args) -> int:
    """The answer to "is my file sound?": damage is the answer (exit 1), never a crash."""
    from meterlink.storage.salvage import examine

    import sys

    if args.json or not sys.stdout.isatty():
        ex = examine(args.db)
    else:  # both checks read the whole file: on a station's year that takes a while
        from rich.progress import Progress

        with Progress(transient=True) as prog:
            task = prog.add_task("checking", total=1)

            def step(stage, done, total):
                prog.update(task, description=stage, completed=done, total=max(total, 1))
            ex = examine(args.db, step)
    if args.json:
        print(json.dumps(ex.as_dict(), indent=2))
        return 1 if ex.problems else 0
    from rich.console import Console
    from rich.markup import escape

    con = Console()
    path = escape(str(args.db))
    if not ex.problems:
        con.print(f"[green]sound[/]: {path} passes SQLite's integrity check and "
                  f"its readings' span index agrees with the rows")
        return 0
    con.print(f"[bold red]{len(ex.problems)} problem(s)[/] in {path}:")
    for p in ex.problems[:20]:
        con.print(f"  - {escape(p)}")
    if len(ex.problems) > 20:
        con.print(f"  ... and {len(ex.problems) - 20} more (--json lists all)")
    if not ex.schema_readable:
        con.print("The list of sessions cannot be read: meterlink can salvage nothing from this file.")
        return 1
    whole = [s for s in ex.sessions if s.intact]
    for s in ex.sessions:
        if s.intact:
            n = s.rows.get("readings", 0)
            con.print(f"  session {s.session_id}: reads whole ({n} readings, {s.rows.get('events', 0)} events)")
        else:
            part = (f"; {s.readings_readable} of its {s.readings_indexed} readings still read"
                    if s.readings_indexed else "")
            con.print(f"  session {s.session_id}: [red]damaged[/] ({escape(s.error or '')}){part}")
    if whole:
        con.print(f"{len(whole)} of {len(ex.sessions)} session(s) read whole: 'meterlink sessions --db {path} "
                  f"--salvage NEW.db' copies them into a new file.")
    else:
        con.print("No session reads whole.")
    return 1


def _salvage(args) -> int:
    from meterlink.storage.salvage import salvage

    ex, copied = salvage(args.db, args.salvage)
    lost = [s.session_id for s in ex.sessions if not s.intact]
    if args.json:
        print(json.dumps({"database": str(args.db), "out": str(args.salvage), "sessions_copied": copied,
                          "sessions_left": lost, "problems": ex.problems}, indent=2))
    else:
        print(f"{len(copied)} session(s) copied into {args.salvage}: {', '.join(map(str, copied)) or 'none'}; "
              f"left behind (damaged): {', '.join(map(str, lost)) or 'none'}")
    return 0


_SENSOR = {1: "E probe", 2: "H probe", 3: "dipole + receiver"}
_OUTCOME_STYLE = {"compliant": "green", "not compliant": "red", "undecided": "yellow",
                  "conditional pass": "yellow", "conditional fail": "orange", "not assessable": "grey"}


def _short_time(t):
    import datetime as dt

    if t is None:
        return "-"
    return dt.datetime.fromtimestamp(t, dt.timezone.utc).strftime("%Y-%m-%d %H:%M")


def _sessions_table(rows, db):
    from meterlink.physics.units import format_frequency
    from meterlink.reports.termtable import Column, Styled, Table
    from meterlink.safetext import clean_text

    t = Table([Column("id", "right"), Column("kind"), Column("instrument", wrap=True, min_width=11),
               Column("start UTC"), Column("span", "right"), Column("data", "right"), Column("events", "right"),
               Column("verdict", min_width=16)], title=f"sessions in {clean_text(str(db))}")
    for r in rows:
        inst = clean_text(r["model"] or "(no handshake)")     # device strings: no control codes
        if r["sensor_kind"]:
            inst += f"\n{_SENSOR.get(r['sensor_kind'], '?')} {clean_text(r['probe_serial'] or '')}"
        if r["freq_hz"]:
            inst += f"\nat {format_frequency(r['freq_hz'])}"
        elif r["band_lo_hz"] and r["band_hi_hz"]:
            inst += f"\n{format_frequency(r['band_lo_hz'])}-{format_frequency(r['band_hi_hz'])}"
        span = (r["last_utc"] - r["first_utc"]) if r["first_utc"] is not None else None
        data = f"{r['readings']} rd" if r["readings"] else (f"{r['spectra']} sp" if r["spectra"] else "-")
        data += f"\n{r['calibrations']} cal" if r["calibrations"] else ""
        events = [str(r["events"])] + ([Styled(f"{r['warnings']} warn", "yellow")] if r["warnings"] else []) + \
            ([Styled(f"{r['errors']} err", "red")] if r["errors"] else [])
        outcome = r["survey_outcome"] or r["last_outcome"] or "-"     # a survey: its site's, as its report states
        verdict = [Styled(clean_text(outcome), _OUTCOME_STYLE.get(outcome, ""))]
        at_max = r["survey_outcome_extrapolated"]
        if at_max:
            verdict += ["at max power:", Styled(at_max, _OUTCOME_STYLE.get(at_max, ""))]
        t.add_row(str(r["id"]), clean_text(r["kind"]), inst,
                  _short_time(r["first_utc"] or r["started_utc"]).replace(" ", "\n"),
                  "-" if span is None else f"{span / 60:.1f} min", data, events,
                  verdict)
    t.caption = ("rd readings, sp spectra, cal calibrations applied; times by each device's clock; a survey's "
                 "verdict is its site's outcome, as its report concludes.\n"
                 "A session's events: meterlink sessions --events ID")
    return t


def _events_table(rows, sid):
    from meterlink.reports.termtable import Column, Styled, Table
    from meterlink.safetext import clean_text

    t = Table([Column("time"), Column("severity"), Column("kind", wrap=True), Column("message", wrap=True)],
              title=f"events of session {sid}")
    style = {"warning": "yellow", "error": "red"}
    for e in rows:
        sev = e["severity"]
        t.add_row(_short_time(e["t_utc"]), Styled(clean_text(sev), style.get(sev, "")), clean_text(e["kind"]),
                  clean_text(e["message"] or ""))
    return t
