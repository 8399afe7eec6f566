"""meterlink central: the central store of a network of stations (PostgreSQL) and its ingest service."""

HELP = "run and administer the central store of a station network: migrate, serve, stations, tokens"


def add_arguments(parser) -> None:
    sub = parser.add_subparsers(dest="action", metavar="ACTION", required=True)
    for name, text in (("migrate", "create or upgrade the central schema in the configured database"),
                       ("serve", "run the ingest service (HTTP, behind uvicorn) until SIGTERM"),
                       ("station-add", "register a station by name and print its UUID"),
                       ("token-create", "create a bearer token for a station (shown once, stored hashed)"),
                       ("token-revoke", "revoke a token by its id"),
                       ("tokens", "list tokens (never their value)"),
                       ("file-reset", "accept a station file's batch numbers from 1 again (a file restored "
                                      "from a backup)"),
                       ("stations", "list stations with their newest 6-minute block")):
        p = sub.add_parser(name, help=text, description=text)
        p.add_argument("--config", required=True, metavar="CENTRAL.toml", help="central configuration file "
                       "(deploy/central.toml is an example)")
        if name == "station-add":
            p.add_argument("name", help="the station's name (as in its station file)")
        if name == "token-create":
            p.add_argument("station", help="station name or UUID")
            p.add_argument("--label", default="", help="a note kept with the token (where it is used)")
            p.add_argument("--out", metavar="FILE", help="write the token to FILE (mode 0600) instead of printing it")
        if name == "token-revoke":
            p.add_argument("token_id", type=int, help="the token's id (see 'tokens')")
        if name == "file-reset":
            p.add_argument("file_uuid", help="the file's UUID (meta.file_uuid in the station database)")
        if name in ("tokens", "stations"):
            p.add_argument("--json", action="store_true", help="print JSON")


def run(args) -> int:
    import json
    import os

    from meterlink.network import central

    cfg = central.load_config(args.config)
    if args.action == "serve":
        from meterlink.network.app import serve
        from meterlink.network.central_schema import migrate

        conn = central.connect(cfg.dsn)
        try:
            migrate(conn)
        finally:
            conn.close()
        serve(cfg)
        return 0
    conn = central.connect(cfg.dsn)
    try:
        if args.action == "migrate":
            from meterlink.network.central_schema import migrate

            print(f"central schema at version {migrate(conn)}")
        elif args.action == "station-add":
            print(central.add_station(conn, args.name))
        elif args.action == "token-create":
            tid, su, token = central.create_token(conn, args.station, args.label)
            if args.out:
                fd = os.open(args.out, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
                with os.fdopen(fd, "w") as fh:
                    fh.write(token + "\n")
                print(f"token {tid} for station {su} written to {args.out}")
            else:
                print(f"token {tid} for station {su}:\n{token}")
        elif args.action == "token-revoke":
            central.revoke_token(conn, args.token_id)
            print(f"token {args.token_id} revoked")
        elif args.action == "file-reset":
            last = central.reset_file(conn, args.file_uuid)
            print(f"file {args.file_uuid}: batch numbers accepted from 1 again (it had reached {last})")
        elif args.action == "tokens":
            rows = central.list_tokens(conn)
            if args.json:
                print(json.dumps(rows, indent=2))
            for r in [] if args.json else rows:
                print(f"{r['token_id']:>5}  {r['name']:<24} {r['station_uuid']}  "
                      f"{'revoked' if r['revoked_utc'] else 'active':<8} {r['label'] or ''}")
        elif args.action == "stations":
            rows = central.stations_overview(conn)
            if args.json:
                print(json.dumps(rows, indent=2, default=str))
            for r in [] if args.json else rows:
                e, t = r["e_rms_v_per_m"], r["t_start_utc"]
                # the store keeps epoch seconds; a person reads ISO 8601 UTC (docs/formats.md)
                when = "-" if t is None else _iso_utc(t)
                print(f"{r['name']:<24} {r['station_uuid']}  newest block {when:>20}  "
                      f"{'-' if e is None else f'{e:.4g} V/m'}")
    finally:
        conn.close()
    return 0


def _iso_utc(t: float) -> str:
    """Epoch seconds as ISO 8601 UTC to the second (a block start), e.g. 2026-12-04T16:48:00Z."""
    import datetime as dt

    return dt.datetime.fromtimestamp(t, dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")
