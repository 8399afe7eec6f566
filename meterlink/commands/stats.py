"""meterlink stats: day, week and month statistics of a station's 6-minute series."""

HELP = "statistics of a monitoring station per day, week and month (coverage, max/min, median, p95, profiles)"


def add_arguments(parser) -> None:
    parser.add_argument("--db", required=True, metavar="FILE", help="station database written by 'meterlink monitor'")
    parser.add_argument("--from", dest="t_from", metavar="DATE", help="start, ISO date or time (UTC; default: first block)")
    parser.add_argument("--to", dest="t_to", metavar="DATE", help="end, exclusive (default: the end of the newest block)")
    parser.add_argument("--json", action="store_true", help="print the statistics as JSON")


def parse_when(text, what):
    import datetime as dt

    from meterlink.errors import MeterlinkError
    try:
        d = dt.datetime.fromisoformat(text.replace("Z", "+00:00"))
    except ValueError:
        raise MeterlinkError(f"{what} {text!r}: expected an ISO date like 2025-03-01 or 2025-03-01T12:00") from None
    if d.tzinfo is None:
        d = d.replace(tzinfo=dt.timezone.utc)
    return d.timestamp()


def span(conn, args):
    import time
    # defaults: the first block's start and the newest block's end (an accelerated simulator run lies
    # in the future, so "now" would cut it off)
    first, last = conn.execute("SELECT min(t_start_utc), max(t_start_utc + block_s) FROM mon_block").fetchone()
    t0 = parse_when(args.t_from, "--from") if args.t_from else (first or time.time())
    t1 = parse_when(args.t_to, "--to") if args.t_to else (last or time.time() + 1.0)
    if not t1 > t0:
        from meterlink.errors import MeterlinkError
        from meterlink.station.publish import iso
        if args.t_to and args.t_from:
            raise MeterlinkError(f"--to {args.t_to} must be later than --from {args.t_from}")
        if args.t_to:
            raise MeterlinkError(f"--to {args.t_to} is not later than the first block ({iso(t0)}): nothing to show")
        raise MeterlinkError(f"--from {args.t_from} is not before the end of the newest block ({iso(t1)}): "
                             f"nothing to show")
    return t0, t1


def open_station(args, with_span=True):
    """Read-only connection to a station database (with its --from/--to span); one-line errors.

    A file that cannot be opened or read is reported as such (damaged, not a database, ...), and
    only a readable meterlink file without a station in it gets "no monitoring station record".
    """
    import sqlite3

    from meterlink.errors import MeterlinkError
    from meterlink.station.publish import station_info
    from meterlink.storage.store import describe_sqlite_error, open_readonly

    conn = open_readonly(args.db)
    try:
        try:
            has = conn.execute("select 1 from sqlite_master where type = 'table' and name = 'mon_station'").fetchone()
            if not has:
                raise MeterlinkError(f"{args.db}: database has no monitoring station record (was it written by "
                                     f"'meterlink monitor'?)")
            conn.execute("select * from mon_station").fetchall()    # readable, or say so below
            station_info(conn)
            span_ = span(conn, args) if with_span else (None, None)
        except sqlite3.DatabaseError as exc:
            raise describe_sqlite_error(args.db, exc) from None
    except BaseException:
        conn.close()
        raise
    return (conn, *span_)


def run(args) -> int:
    from meterlink.cli import SAFETY_LINE
    from meterlink.station.publish import statistics, to_json
    from meterlink.station.stats import sparkline

    conn, t0, t1 = open_station(args)
    try:
        doc = statistics(conn, t0, t1)
    finally:
        conn.close()
    doc["caution"] = SAFETY_LINE
    if args.json:
        print(to_json(doc))
        return 0
    from rich.console import Console
    from rich.table import Column, Table

    con = Console()
    con.print(f"[bold]{doc['station']}[/bold] {doc['from_utc']} .. {doc['to_utc']}; percentiles: "
              f"{doc['percentile_method']}")
    f = lambda v, spec=".3g": "-" if v is None else format(v, spec)  # noqa: E731
    for m in doc["meters"]:
        con.print(f"[bold]{m['meter']}[/bold]: {m['label']} (E_ref {m['e_ref_v_per_m']:.4g} V/m, "
                  f"S_ref {m['s_ref_w_per_m2']:.4g} W/m2)")
        for period in ("day", "week", "month"):
            # short headers, nothing cut: fits an 80-column terminal (running maxima as "6min %", "30min %")
            runs_h = [_window_header(int(k.split('_')[1].rstrip('s'))) if k.split("_")[1].rstrip("s").isdigit()
                      else k.replace("_max_e_v_per_m", "").replace("running_", "run ") + " max %"
                      for k in (m[period][0] if m[period] else {}) if k.endswith("_max_e_v_per_m")]
            t = Table(*(Column(h, no_wrap=True, justify="left" if i == 0 else "right") for i, h in enumerate(
                [period, "cover", "max %", "min %", "med %", "p95 %", "max V/m", *runs_h])),
                box=None, pad_edge=False, header_style="bold")
            for r in m[period]:
                runs = [f(r[k.replace("_e_v_per_m", "_pct")]) for k in r if k.endswith("s_max_e_v_per_m")]
                t.add_row(r["period"], f"{r['coverage']:.1%}", f(r.get("max_pct")), f(r.get("min_pct")),
                          f(r.get("median_pct")), f(r.get("p95_pct")), f(r.get("max_e_v_per_m")), *runs)
            con.print(t)
        con.print("[dim]max/min/med/p95 %: of the 6-minute blocks; 6min %, 30min %, 24h %: highest running mean "
                  "over that window[/dim]")
        hours = [h["mean_pct"] for h in m["hour_of_day"]]
        con.print(f"hour-of-day profile (mean % of reference, 00..23): |{sparkline(hours)}|  peak "
                  f"{f(max((h for h in hours if h is not None), default=None))} %")
        ww = m["weekday_weekend"]
        con.print(f"weekday mean {f(ww['weekday']['mean_pct'])} %, weekend mean {f(ww['weekend']['mean_pct'])} %")
    from meterlink.station.publish import COVERAGE_NOTE

    con.print(f"[dim]{COVERAGE_NOTE}[/dim]", overflow="fold")
    con.print(SAFETY_LINE)
    return 0


def _window_header(window_s: int) -> str:
    """Column header of a running-average window: minutes below an hour, else hours when whole
    (86400 s is '24h %', not '1440min %', so that the day table fits 80 columns)."""
    if window_s >= 3600 and window_s % 3600 == 0:
        return f"{window_s // 3600}h %"
    return f"{window_s // 60}min %"
