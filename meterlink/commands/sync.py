"""meterlink sync: send a station database's outbox to the central service once, by hand."""

HELP = "send a station's new rows to the central service now (the monitor does it in the background)"


def add_arguments(parser) -> None:
    parser.add_argument("--config", required=True, metavar="STATION.toml",
                        help="station file with a [central] table (docs/station-file.md)")
    parser.add_argument("--db", metavar="FILE", help="override the station file's database path")
    parser.add_argument("--max-batches", type=int, metavar="N", help="stop after N batches")
    parser.add_argument("--json", action="store_true", help="print the outcome as JSON")


def run(args) -> int:
    import dataclasses
    import json
    from pathlib import Path

    from meterlink.errors import MeterlinkError
    from meterlink.network.syncd import FileLock, RefusedByCentral, Unavailable, settings_from_table, sync_once
    from meterlink.station.stationfile import load_station
    from meterlink.storage.store import Store

    st = load_station(args.config)
    if not st.central:
        raise MeterlinkError(f"{args.config}: no [central] table: nowhere to send to (docs/station-file.md)")
    if args.max_batches is not None and args.max_batches < 0:
        raise MeterlinkError(f"--max-batches {args.max_batches}: must be 0 or more")
    settings = settings_from_table(st.central, str(st.path), Path(st.path).parent)
    db = Path(args.db) if args.db else st.database
    if not db.exists():
        raise MeterlinkError(f"{db}: no station database")
    code = 0
    with FileLock(db), Store(db, create=False) as store:
        try:
            summary = sync_once(store, settings, max_batches=args.max_batches)
        except Unavailable as exc:
            summary, code = exc.summary, 1
        except RefusedByCentral as exc:
            summary, code = exc.summary, 3
    if args.json:
        print(json.dumps(dataclasses.asdict(summary)))
    else:
        print(f"{'sync' if code == 0 else 'sync stopped'}: {summary.line()}")
    return code
