"""meterlink simulate: serve a simulated meter on a pseudo-terminal until interrupted."""

from __future__ import annotations

HELP = "run a simulated meter on a pseudo-terminal and print its port path"


def add_arguments(parser) -> None:
    parser.add_argument("--scenario", default="demo", help="packaged scenario name or a TOML file (default demo)")
    parser.add_argument("--sensor", choices=("probe", "dipole"), default="probe", help="sensor the meter carries")
    parser.add_argument("--meter", type=int, default=0, metavar="N", help="which meter of the scenario (default 0)")
    parser.add_argument("--speed", type=float, default=1.0, metavar="X", help="device milliseconds per real millisecond (default 1)")
    parser.add_argument("--seed", type=int, default=0, metavar="N", help="seed of the noise and fault generator (default 0)")
    parser.add_argument("--truth", metavar="FILE", help="write the ground-truth JSON-lines log here")
    parser.add_argument("--drop", type=float, default=0.0, metavar="P", help="probability a reading is lost")
    parser.add_argument("--corrupt", type=float, default=0.0, metavar="P", help="probability a reading is damaged")
    parser.add_argument("--garbage", type=float, default=0.0, metavar="P", help="probability of junk bytes before a frame")
    parser.add_argument("--start-tick", type=int, default=0, metavar="MS", help="device tick at power-up")
    parser.add_argument("--gps", action="store_true", help="also serve a simulated GNSS receiver (NMEA GGA/RMC, "
                        "1 Hz of device time) that follows the probe; its port is printed on the second line")
    parser.add_argument("--gps-output-delay", type=float, default=0.0, metavar="SECONDS",
                        help="with --gps: the receiver sends each fix this many device seconds after its epoch, "
                             "as a real receiver does (default 0)")
    parser.add_argument("--json", action="store_true", help="print the final stats as JSON")


def run(args) -> int:
    import json
    import signal
    import threading

    from meterlink.errors import MeterlinkError
    from meterlink.simulators.pty_meter import SimulatedMeter

    for name in ("drop", "corrupt", "garbage"):
        p = getattr(args, name)
        if not 0.0 <= p <= 1.0:
            raise MeterlinkError(f"--{name} {p}: a probability must be between 0 and 1")
    if not args.speed > 0:
        raise MeterlinkError(f"--speed {args.speed}: must be positive")
    if not 0.0 <= args.gps_output_delay <= 2.0:
        raise MeterlinkError(f"--gps-output-delay {args.gps_output_delay}: must be 0 to 2 s")
    faults = {"drop": args.drop, "corrupt": args.corrupt, "garbage": args.garbage}
    try:
        meter = SimulatedMeter(args.scenario, sensor=args.sensor, meter=args.meter, seed=args.seed, speed=args.speed,
                               faults=faults, truth_path=args.truth, start_tick_ms=args.start_tick)
    except OSError as exc:
        raise MeterlinkError(f"--truth {args.truth}: {exc.strerror}") from None
    except ValueError as exc:
        raise MeterlinkError(f"simulated meter: {exc}") from None
    done = threading.Event()
    old = {s: signal.signal(s, lambda *_: done.set()) for s in (signal.SIGINT, signal.SIGTERM)}
    try:
        with meter:
            print(meter.port, flush=True)
            gnss = None
            if args.gps:
                from meterlink.simulators.gnss import SimulatedGnss
                gnss = SimulatedGnss.following(meter, output_delay_s=args.gps_output_delay).start()
                print(gnss.port, flush=True)
            try:
                while not done.wait(0.2):
                    pass
            finally:
                if gnss is not None:
                    gnss.stop()
            stats = meter.stats
            if gnss is not None:
                stats = {**stats, **{f"gnss_{k}": v for k, v in gnss.sent.items()}}
    finally:
        for s, h in old.items():
            signal.signal(s, h)
    if args.json:
        print(json.dumps(stats))
    else:
        print(" ".join(f"{k}={v}" for k, v in stats.items()), flush=True)
    return 0
