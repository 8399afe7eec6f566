"""meterlink monitor: run an unattended monitoring station from its station file."""

HELP = "run a monitoring station (long-running logger, derived series, alarms, health) from a station file"


def add_arguments(parser) -> None:
    parser.add_argument("--config", required=True, metavar="STATION.toml", help="station file (docs/station-file.md)")
    parser.add_argument("--port", action="append", default=[], metavar="METER=PATH",
                        help="override a meter's port, e.g. the path printed by 'meterlink simulate' (repeatable)")
    parser.add_argument("--db", metavar="FILE", help="override the station file's database path")
    parser.add_argument("--time-scale", type=float, default=1.0, metavar="X",
                        help="simulators only: device seconds per host second of an accelerated simulator")
    parser.add_argument("--quiet", action="store_true", help="do not print events as they happen")


def run(args) -> int:
    import dataclasses
    import signal
    import sys
    from pathlib import Path

    from meterlink.cli import SAFETY_LINE
    from meterlink.errors import MeterlinkError
    from meterlink.monitor import Monitor
    from meterlink.station import load_station

    st = load_station(args.config)
    ports = {}
    for spec in args.port:
        name, sep, path = spec.partition("=")
        if not sep or not path:
            raise MeterlinkError(f"--port {spec!r}: expected METER=PATH")
        try:
            st.meter(name)
        except KeyError:
            raise MeterlinkError(f"--port {spec!r}: {args.config} has no meter named {name!r}") from None
        ports[name] = path
    meters = tuple(dataclasses.replace(m, port=ports.get(m.name, m.port)) for m in st.meters)
    st = dataclasses.replace(st, meters=meters, database=Path(args.db) if args.db else st.database)
    if not args.time_scale > 0:
        raise MeterlinkError(f"--time-scale {args.time_scale}: must be positive")

    def log(line: str) -> None:
        if not args.quiet:
            print(line, flush=True)

    mon = Monitor(st, time_scale=args.time_scale, log=log)
    log(f"monitoring {st.name} ({len(st.meters)} meter(s)) into {st.database}. {SAFETY_LINE}")
    old = {s: signal.signal(s, lambda *_: mon.stop()) for s in (signal.SIGINT, signal.SIGTERM)}
    try:
        mon.run()
    finally:
        for s, h in old.items():
            signal.signal(s, h)
    print("monitor stopped", file=sys.stderr if args.quiet else sys.stdout, flush=True)
    return 0
