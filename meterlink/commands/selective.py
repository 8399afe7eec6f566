"""meterlink selective: a frequency-selective point with a spectrum analyser over SCPI."""

from __future__ import annotations

HELP = "measure one point band by band with a spectrum analyser (VISA address) and a calibrated antenna"


def add_arguments(parser) -> None:
    parser.add_argument("address", help="VISA address of the analyser, e.g. TCPIP::192.0.2.7::5025::SOCKET")
    parser.add_argument("--bands", required=True, metavar="FILE", help="band file ([[band]] tables, docs/selective.md)")
    parser.add_argument("--antenna-cert", default="demo-dipole", metavar="CERT",
                        help="antenna certificate (meterlink-cert/1, kind dipole-receiver) with AF and cable loss")
    parser.add_argument("--antenna", choices=("isotropic", "three"), default="isotropic",
                        help="isotropic antenna, or a single-axis antenna turned to three orthogonal orientations")
    parser.add_argument("--standard", metavar="NAME", default="icnirp-2020", help="standard of the summation rule (default icnirp-2020)")
    parser.add_argument("--tier", default="public", choices=("public", "occupational"), help="tier (default public)")
    parser.add_argument("--journal", required=True, metavar="FILE", help="JSON-lines file each band is written to as measured")
    parser.add_argument("--analyser-level-db", type=float, default=0.5, metavar="DB",
                        help="analyser absolute level accuracy, half-width in dB (datasheet; default 0.5)")
    parser.add_argument("--sweep-time", type=float, default=0.1, metavar="S", help="sweep time per band (default 0.1 s)")
    parser.add_argument("--timeout", type=float, default=5.0, metavar="S", help="instrument answer timeout (default 5 s)")
    parser.add_argument("--db", metavar="FILE", help="also store the point in this database (sel_* tables; created if "
                        "missing); the journal stays the crash-safe log")
    parser.add_argument("--label", default="selective point", help="label of the point in the database")
    parser.add_argument("--survey", type=int, metavar="SESSION", help="with --db: add the point to this survey "
                        "session (its standard and tier apply) instead of a new session of kind 'selective'")
    parser.add_argument("--extrapolation", metavar="FILE", help="extrapolation to maximum traffic per band: a TOML "
                        "file of [\"BAND NAME\"] tables (method and inputs, docs/selective.md); a pilot-based method "
                        "takes the pilot as a decoder-capable instrument measured it")
    parser.add_argument("--json", action="store_true", help="print the result as JSON")


def run(args) -> int:

    from meterlink.reports import digits

    from meterlink.cautions import SAFETY_LINE
    from meterlink.errors import MeterlinkError
    from meterlink.instruments.analyzer import SpectrumAnalyzer
    from meterlink.instruments.session import open_session
    from meterlink.physics.certificate import load_certificate
    from meterlink.physics.selective import ChainSpec
    from meterlink.survey.capture import is_dipole
    from meterlink.survey.selective import (Journal, assess_point, check_bands_in_range, load_bands, load_extrapolation,
                                           measure_point)

    for name in ("sweep_time", "timeout"):
        if not 0 < getattr(args, name) <= 3600:
            raise MeterlinkError(f"--{name.replace('_', '-')} {getattr(args, name)}: between 0 and 3600 s")
    if not 0 <= args.analyser_level_db <= 10:
        raise MeterlinkError(f"--analyser-level-db {args.analyser_level_db}: between 0 and 10 dB")
    bands = load_bands(args.bands)
    factors = load_extrapolation(args.extrapolation, bands) if args.extrapolation else None
    cert = load_certificate(args.antenna_cert)
    if not is_dipole(cert):
        raise MeterlinkError(f"--antenna-cert {args.antenna_cert}: not an antenna (dipole-receiver) certificate")
    check_bands_in_range(bands, cert, args.antenna_cert)

    def orient(axis):
        if args.antenna == "three":
            input(f"turn the antenna to orientation {axis} and press Enter ")

    store = sid = None
    if args.db:
        from meterlink.storage.store import Store
        store = Store(args.db)          # opened first: a database that cannot be used stops before any sweep
        try:
            sid = _session(store, args)
        except BaseException:
            store.close()
            raise
    import time
    t0 = time.time()
    journal = Journal(args.journal)
    try:
        with open_session(args.address, timeout_s=args.timeout) as s:
            idn = s.idn
            journal.write({"event": "analyser", "address": args.address, "idn": s.idn})
            res = measure_point(SpectrumAnalyzer(s), bands, cert, antenna=args.antenna, orient=orient,
                                chain=ChainSpec(analyser_level_db=args.analyser_level_db),
                                sweep_time_s=args.sweep_time, journal=journal)
        out = assess_point(res, args.standard, args.tier, factors)
        journal.write({"event": "result", **out})
        if store is not None:
            from meterlink.survey.selstore import store_point
            out["point_id"] = store_point(store, sid, label=args.label, results=res, assessed=out, cert=cert,
                                          cert_name=args.antenna_cert, antenna_mode=args.antenna, address=args.address,
                                          idn=idn, t_start_utc=t0, bands_path=str(args.bands),
                                          analyser_level_db=args.analyser_level_db, journal_path=str(args.journal))
            out["session_id"] = sid
            if args.survey is None:
                store.end_session(sid)
    finally:
        journal.close()
        if store is not None:
            store.close()
    if args.json:
        print(digits.dumps(out, default=float))
        return 0
    print(f"{'band':18s} {'f/MHz':>9s} {'E/(V/m)':>9s} {'U/dB':>6s} {'ratio':>8s} {'share':>6s}")
    for b in out["bands"]:
        print(f"{b['name'][:18]:18s} {b['freq_hz'] / 1e6:9.3f} {b['e_v_per_m']:9.3f} {b['u_expanded_db']:6.2f} "
              f"{b['exposure_ratio']:8.4f} {100 * b['share']:5.1f}%")
    print(f"total exposure ratio ({args.standard} {args.tier}, summation rule): {out['total_exposure_ratio']:.4f}")
    for b in out["bands"]:
        if "extrapolation" in b:
            x = b["extrapolation"]
            print(f"at maximum: {b['name'][:18]:18s} {b['e_at_max_v_per_m']:9.3f} V/m  U {b['u_at_max_db']:.2f} dB  "
                  f"({x['method']}, F = {x['power_factor']:.4g})")
    if "total_exposure_ratio_at_max" in out:
        print(f"total exposure ratio at maximum: {out['total_exposure_ratio_at_max']:.4f}")
    print(f"check status: {out['check_status']}")
    for m in out["messages"]:
        print(f"note: {m}")
    if store is not None:
        print(f"stored in {args.db}: session {out['session_id']}, selective point {out['point_id']}")
    print(SAFETY_LINE)
    return 0


def _session(store, args) -> int:
    """The survey session named by --survey (its standard and tier must be the ones given), or a new one."""
    from meterlink.errors import MeterlinkError

    if args.survey is None:
        return store.begin_session("selective", args.address, notes=args.label)
    rows = list(store.db["survey"].rows_where("session_id = ?", [args.survey]))
    if not rows:
        raise MeterlinkError(f"--survey {args.survey}: no such survey session in {args.db}")
    if (rows[0]["standard"], rows[0]["tier"]) != (args.standard, args.tier):
        raise MeterlinkError(f"--survey {args.survey}: that survey uses {rows[0]['standard']} {rows[0]['tier']}; "
                             f"give --standard {rows[0]['standard']} --tier {rows[0]['tier']}")
    return args.survey
