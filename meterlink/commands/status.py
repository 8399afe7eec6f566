"""meterlink status: the current state of a monitoring station from its database."""

HELP = "show a monitoring station's current state (links, last values, health, alarms, recent events)"


def add_arguments(parser) -> None:
    parser.add_argument("--db", required=True, metavar="FILE", help="station database written by 'meterlink monitor'")
    parser.add_argument("--json", action="store_true", help="print the state as JSON")


def run(args) -> int:
    import sqlite3
    import time

    from meterlink.cli import SAFETY_LINE
    from meterlink.publish import current_state, to_json

    from meterlink.commands.stats import open_station
    from meterlink.storage import describe_sqlite_error

    conn, _, _ = open_station(args, with_span=False)
    try:
        s = current_state(conn, time.time())
    except sqlite3.DatabaseError as exc:
        raise describe_sqlite_error(args.db, exc) from None
    finally:
        conn.close()
    s["caution"] = SAFETY_LINE
    if args.json:
        print(to_json(s))
        return 0
    from rich.console import Console
    from rich.table import Table
    from rich.markup import escape

    con = Console()
    age = s["heartbeat_age_s"]
    con.print(f"[bold]{escape(s['station'])}[/bold]  state {s['state']}, run {s['runs']}, heartbeat "
              f"{s['heartbeat_utc']} ({'-' if age is None else f'{age:.0f} s ago'}); "
              f"{s['standard']} {s['tier']}, convention {s['convention']}")
    if s["stale"]:
        con.print(f"[bold red]stale[/bold red]: recorded as running but no heartbeat for more than "
                  f"{3 * s['heartbeat_s']:g} s (heartbeat every {s['heartbeat_s']:g} s); is the monitor still alive?")
    t = Table("meter", "link", "last seen", "E V/m", "U dB", s["pct_label"], "cov 24h", "battery", "temp C",
              "drift ppm", "cert due", "alarms")
    f = lambda v, spec: "-" if v is None else format(v, spec)  # noqa: E731
    for m in s["meters"]:
        t.add_row(escape(m["meter"]), m["link"] or "-", m["last_seen_utc"] or "-", f(m["last_e_v_per_m"], ".3g"),
                  f(m["u_expanded_db"], ".2f"), f(m["last_pct"], ".1f"), f(m["coverage_24h"], ".0%"),
                  "mains" if m["battery_pct"] is None else f"{m['battery_pct']:.0f} %", f(m["temperature_degc"], ".1f"),
                  f(m["drift_ppm"], "+.0f"), f"{m['certificate_due']} ({m['certificate_days_left']} d)",
                  ", ".join(a["rule"] for a in m["active_alarms"]) or "none")
    con.print(t)
    for ev in s["recent_events"]:
        con.print(f"  {ev['t_utc']} {ev['severity']:7s} {escape(ev['kind'])}: {escape(ev['message'])}")
    con.print(SAFETY_LINE)
    return 0
