"""meterlink scpi-sim: serve simulated SCPI instruments (analyser, generator, power meter, rotator) on loopback TCP."""

from __future__ import annotations

HELP = "serve simulated SCPI instruments on 127.0.0.1 and print their VISA addresses"


def add_arguments(parser) -> None:
    parser.add_argument("--scenario", default="demo", help="packaged scenario name or a TOML file (default demo)")
    parser.add_argument("--at", default="4,-4,1.5", metavar="X,Y,Z",
                        help="where the analyser's antenna stands, site metres (default 4,-4,1.5)")
    parser.add_argument("--antenna", choices=("isotropic", "x", "y", "z"), default="isotropic",
                        help="the simulated antenna: isotropic, or a dipole along a site axis")
    parser.add_argument("--port", type=int, default=0, help="first TCP port (default: free ports)")
    parser.add_argument("--seed", type=int, default=0, help="seed of the analyser's sweep scatter")
    for fault in ("timeout", "garbage", "scpi-error", "disconnect"):
        parser.add_argument(f"--{fault}", action="store_true", help=f"analyser fault switch: {fault}")


def run(args) -> int:
    import signal
    import threading

    from meterlink.errors import MeterlinkError
    from meterlink.simulators.scenario import load_scenario
    from meterlink.simulators.scpi_instruments import Analyzer, Generator, PowerMeterSim, RotatorSim, SiteAntenna
    from meterlink.simulators.scpi_server import ScpiServer

    try:
        at = tuple(float(v) for v in args.at.split(","))
    except ValueError:
        at = ()
    if len(at) != 3 or not all(abs(v) < 1e6 for v in at):
        raise MeterlinkError(f"--at {args.at!r}: three numbers x,y,z in metres")
    if not 0 <= args.port <= 65532:
        raise MeterlinkError(f"--port {args.port}: 0 (free ports) or 1..65532")
    sc = load_scenario(args.scenario)
    analyser = Analyzer(SiteAntenna(sc, at, antenna=args.antenna), seed=args.seed)
    for fault in ("timeout", "garbage", "scpi_error", "disconnect"):
        setattr(analyser.faults, fault, getattr(args, fault))
    gen = Generator()
    insts = [("analyser", analyser), ("generator", gen), ("power-meter", PowerMeterSim(gen)), ("rotator", RotatorSim())]
    servers = []
    try:
        for i, (_, inst) in enumerate(insts):
            servers.append(ScpiServer(inst, port=args.port + i if args.port else 0).start())
    except OSError as exc:
        for s in servers:
            s.close()
        raise MeterlinkError(f"--port {args.port}: cannot listen: {exc.strerror}") from None
    for (name, _), s in zip(insts, servers):
        print(f"{name} {s.address}", flush=True)
    done = threading.Event()
    old = {s: signal.signal(s, lambda *_: done.set()) for s in (signal.SIGINT, signal.SIGTERM)}
    try:
        while not done.wait(0.2):
            pass
    finally:
        for s, h in old.items():
            signal.signal(s, h)
        for s in servers:
            s.close()
    return 0
