"""meterlink status: the current state of a monitoring station from its database."""

HELP = "show a monitoring station's current state (links, last values, health, alarms, recent events)"


def add_arguments(parser) -> None:
    parser.add_argument("--db", required=True, metavar="FILE", help="station database written by 'meterlink monitor'")
    parser.add_argument("--json", action="store_true", help="print the state as JSON")


def storage_state(conn, station: str) -> dict | None:
    """Whether the monitor can write its database (mon_storage, kept by meterlink.station.monitor), or None if unknown."""
    import sqlite3

    from meterlink.station.publish import iso

    try:
        row = conn.execute("SELECT g.storing, g.since_utc, g.error, g.pending_readings, g.checked_utc FROM mon_storage g "
                           "JOIN mon_station s ON s.id = g.station_id WHERE s.name = ?", (station,)).fetchone()
    except sqlite3.OperationalError:  # a file written before the monitor kept this table
        return None
    if row is None:
        return None
    return {"storing": bool(row[0]), "since_utc": iso(row[1]), "error": row[2], "pending_readings": row[3] or 0,
            "checked_utc": iso(row[4])}


def run(args) -> int:
    import sqlite3
    import time

    from meterlink.cli import SAFETY_LINE
    from meterlink.station.publish import current_state, to_json

    from meterlink.commands.stats import open_station
    from meterlink.storage.store import describe_sqlite_error

    conn, _, _ = open_station(args, with_span=False)
    try:
        s = current_state(conn, time.time())
        s["storage"] = storage_state(conn, s["station"])
    except sqlite3.DatabaseError as exc:
        raise describe_sqlite_error(args.db, exc) from None
    finally:
        conn.close()
    s["caution"] = SAFETY_LINE
    if args.json:
        print(to_json(s))
        return 0
    from rich.console import Console
    from rich import box
    from rich.table import Table
    from rich.markup import escape

    con = Console()
    age = s["heartbeat_age_s"]
    con.print(f"[bold]{escape(s['station'])}[/bold]  state {s['state']}, run {s['runs']}, heartbeat "
              f"{s['heartbeat_utc']} ({'-' if age is None else f'{age:.0f} s ago'}); "
              f"{s['standard']} {s['tier']}, convention {s['convention']}")
    st = s["storage"]
    if st is not None and not st["storing"]:
        con.print(f"[bold red]NOT STORING[/bold red] since {st['since_utc']}: {escape(st['error'] or '?')}; "
                  f"{st['pending_readings']} reading(s) held in memory (as of {st['checked_utc']}), commits retried")
    if s["stale"]:
        con.print(f"[bold red]stale[/bold red]: recorded as running but no heartbeat for more than "
                  f"{3 * s['heartbeat_s']:g} s (heartbeat every {s['heartbeat_s']:g} s); is the monitor still alive?")
    f = lambda v, spec: "-" if v is None else format(v, spec)  # noqa: E731
    cols = {
        "meter": lambda m: escape(m["meter"]), "link": lambda m: m["link"] or "-",
        "last seen (UTC)": lambda m: m["last_seen_utc"] or "-", "E V/m": lambda m: f(m["last_e_v_per_m"], ".3g"),
        "U dB": lambda m: f(m["u_expanded_db"], ".2f"), s["pct_label"]: lambda m: f(m["last_pct"], ".1f"),
        "cov 24h": lambda m: f(m["coverage_24h"], ".0%"),
        "battery": lambda m: "mains" if m["battery_pct"] is None else f"{m['battery_pct']:.0f} %",
        "temp C": lambda m: f(m["temperature_degc"], ".1f"), "drift ppm": lambda m: f(m["drift_ppm"], "+.0f"),
        "cert due": lambda m: f"{m['certificate_due']} ({m['certificate_days_left']} d)",
        "alarms": lambda m: ", ".join(a["rule"] for a in m["active_alarms"]) or "none"}
    # a narrow terminal (80 columns) gets two tables, values then health, instead of one that cuts names and times
    heads = list(cols)
    groups = [heads] if con.width >= 160 else [[h for h in heads[:7] if h != "link"], ["meter", "link", *heads[7:]]]
    name_w, alarm_w = _text_widths(s["meters"], cols, groups, con.width)
    for group in groups:
        t = Table(*group, box=None if len(groups) > 1 else box.HEAVY_HEAD, pad_edge=len(groups) == 1)
        for column in t.columns:          # every cell fits its column: nothing for rich to fold mid-word
            column.no_wrap, column.overflow = True, "ellipsis"
        for m in s["meters"]:
            t.add_row(*(_wrapped(cols[name](m), name_w if name == "meter" else alarm_w) if name in ("meter", "alarms")
                        else cols[name](m) for name in group))
        con.print(t)
    from meterlink.station.publish import COVERAGE_NOTE

    con.print(f"[dim]cov 24h = {COVERAGE_NOTE}, over the last 24 h[/dim]", overflow="fold")
    for ev in s["recent_events"]:      # wrapped by the console at its width, never cut
        con.print(f"  {ev['t_utc']} {ev['severity']:7s} {escape(ev['kind'])}: {escape(ev['message'])}",
                  overflow="fold")
    con.print(SAFETY_LINE)
    return 0


def _wrapped(markup: str, width: int) -> str:
    """A cell's text (rich markup, escaped) in lines of at most width columns, broken between words and
    after - _ . / : (termtable.wrap_words): a name is never cut silently."""
    from rich.markup import escape, render

    from meterlink.reports.termtable import wrap_words

    return "\n".join(escape(line) for line in wrap_words(render(markup).plain, width))


def _text_widths(meters: list[dict], cols: dict, groups: list[list[str]], width: int) -> tuple[int, int]:
    """Widths for the meter name and alarms columns so that each table fits width: the other columns keep
    their whole width (times, values, dates), the name gets what is left, the alarms the rest of theirs."""
    from rich.markup import render

    def natural(name: str) -> int:
        return max([len(name)] + [len(line) for m in meters for line in render(cols[name](m)).plain.split("\n")])

    def longest_word(name: str) -> int:
        return max([len(name)] + [len(w) for m in meters for w in render(cols[name](m)).plain.split()])

    name_w = natural("meter")
    alarm_w = natural("alarms")
    for group in groups:
        overhead = 2 * (len(group) - 1) if len(groups) > 1 else 3 * len(group) + 1
        fixed = sum(natural(h) for h in group if h not in ("meter", "alarms"))
        room = width - overhead - fixed
        if "alarms" in group:
            keep = min(alarm_w, max(longest_word("alarms"), room // 3))
            name_w = min(name_w, room - keep)
            alarm_w = max(room - min(name_w, natural("meter")), longest_word("alarms") if room > 0 else 6)
        else:
            name_w = min(name_w, room)
    return max(8, name_w), max(6, min(alarm_w, natural("alarms")))
