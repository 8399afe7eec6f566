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
    from meterlink.station.monitor import Monitor
    from meterlink.station.stationfile import load_station

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

    pipe_closed = []
    stop_asked = []          # a signal or a closed pipe before the Monitor exists is kept here
    mon = None

    def stop(*_) -> None:
        stop_asked.append(True)
        if mon is not None:
            mon.stop()

    def log(line: str) -> None:
        if args.quiet or pipe_closed:
            return
        try:
            print(line, flush=True)
        except BrokenPipeError:
            # the reader went away (`monitor | tee` ended): as SIGPIPE would, end the run, but
            # cleanly, so that what was acquired is stored and the station is marked stopped
            pipe_closed.append(True)
            _stdout_to_devnull()
            stop()

    # handlers first: a Ctrl-C while the station is being opened must still end in a clean stop
    old = {s: signal.signal(s, stop) for s in (signal.SIGINT, signal.SIGTERM)}
    try:
        mon = Monitor(st, time_scale=args.time_scale, log=log)
        if stop_asked:
            mon.stop()
        log(f"monitoring {st.name} ({len(st.meters)} meter(s)) into {st.database}. {SAFETY_LINE}")
        mon.run()
    finally:
        for s, h in old.items():
            signal.signal(s, h)
    if pipe_closed:
        print("meterlink monitor: standard output closed; monitor stopped", file=sys.stderr, flush=True)
        return 128 + signal.SIGPIPE
    if args.quiet:
        print("monitor stopped", file=sys.stderr, flush=True)
        return 0
    log("monitor stopped")
    return 128 + signal.SIGPIPE if pipe_closed else 0


def _stdout_to_devnull() -> None:
    """Point stdout at /dev/null, so no later write (nor the interpreter's flush at exit) fails again."""
    import os
    import sys

    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        os.close(devnull)
    except (OSError, ValueError):
        pass
