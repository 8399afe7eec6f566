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
    parser.add_argument("--seed", type=int, default=0, metavar="N", help="seed of the analyser's sweep scatter (default 0)")
    for fault in ("timeout", "garbage", "scpi-error", "disconnect"):
        parser.add_argument(f"--{fault}", action="store_true", help=f"analyser fault switch: {fault}")
    parser.add_argument("--lab-bench", metavar="FILE",
                        help="serve instead a calibration bench (generator, power meter, positioner driving a "
                             "simulated probe on a pty) and write its bench file here, for 'lab run --bench'")
    parser.add_argument("--af-bench", metavar="FILE",
                        help="serve instead a standard-field bench (generator, power meter, analyser seeing a "
                             "simulated dipole) and write its bench file here, for 'lab run dipole-af --bench'")


def run(args) -> int:

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
    if args.lab_bench:
        return _lab_bench(args)
    if args.af_bench:
        return _af_bench(args)
    sc = load_scenario(args.scenario)
    analyser = Analyzer(SiteAntenna(sc, at, antenna=args.antenna), seed=args.seed)
    for fault in ("timeout", "garbage", "scpi_error", "disconnect"):
        setattr(analyser.faults, fault, getattr(args, fault))
    gen = Generator()
    insts = [("analyser", analyser), ("generator", gen), ("power_meter", PowerMeterSim(gen)), ("rotator", RotatorSim())]
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
    try:
        _wait_for_signal()
    finally:
        for s in servers:
            s.close()
    return 0


def _wait_for_signal() -> None:
    """Block until SIGINT or SIGTERM, then put the previous handlers back."""
    import signal
    import threading

    done = threading.Event()
    old = {s: signal.signal(s, lambda *_: done.set()) for s in (signal.SIGINT, signal.SIGTERM)}
    try:
        while not done.wait(0.2):
            pass
    finally:
        for s, h in old.items():
            signal.signal(s, h)


def _lab_bench(args) -> int:
    """Serve the simulated SCPI calibration bench until interrupted; its bench file names the addresses."""
    from pathlib import Path

    from meterlink.errors import MeterlinkError
    from meterlink.lab.fieldgen import FieldMethod
    from meterlink.simulators.scpi_lab import COUPLING_DB, ScpiLabRig

    out = Path(args.lab_bench)
    with ScpiLabRig(FieldMethod(), seed=args.seed) as rig:
        a = rig.addresses()
        text = (f'# simulated SCPI calibration bench (meterlink scpi-sim --lab-bench), valid while it runs\n'
                f'[instruments]\ngenerator = "{a["generator"]}"\npower_meter = "{a["power_meter"]}"\n'
                f'rotator = "{a["rotator"]}"\nmeter_port = "{rig.port}"\npositioner = true\n\n'
                f'[chain]\ncoupling_db = {COUPLING_DB}\npath_gain_db = 25.0\nmax_level_dbm = 10.0\n')
        try:
            out.write_text(text, encoding="utf-8")
        except OSError as exc:
            raise MeterlinkError(f"--lab-bench {out}: cannot write: {exc.strerror}") from None
        for name, addr in a.items():
            print(f"{name} {addr}", flush=True)
        print(f"meter {rig.port}", flush=True)
        _wait_for_signal()
    return 0


def _af_bench(args) -> int:
    """Serve the simulated standard-field bench until interrupted; its bench file names the addresses."""
    from pathlib import Path

    from meterlink.errors import MeterlinkError
    from meterlink.simulators.scpi_afcal import AfRig

    out = Path(args.af_bench)
    with AfRig(seed=args.seed) as rig:
        try:
            out.write_text(rig.bench_toml(), encoding="utf-8")
        except OSError as exc:
            raise MeterlinkError(f"--af-bench {out}: cannot write: {exc.strerror}") from None
        for name, addr in rig.addresses().items():
            print(f"{name} {addr}", flush=True)
        _wait_for_signal()
    return 0
