"""``meterlink survey``: a walk-around survey from a plan file, or interactively at the terminal."""

from __future__ import annotations

HELP = "walk-around survey: guided point measurements with a live readout, from a plan or interactively"

DEFAULT_DB = "meterlink.db"


def add_arguments(parser) -> None:
    parser.add_argument("--port", metavar="PORT", help="serial device or pyserial URL of the meter")
    parser.add_argument("--plan", metavar="FILE", help="survey plan (TOML, see docs/survey.md); without it "
                        "the survey is entered point by point at the terminal")
    parser.add_argument("--db", metavar="FILE", default=DEFAULT_DB,
                        help=f"database file, created if missing (default: {DEFAULT_DB})")
    parser.add_argument("--gps", metavar="PORT", help="serial device or pyserial URL of a GNSS receiver (NMEA 0183 "
                        "GGA/RMC): every sample is stored with its position (docs/gps.md)")
    parser.add_argument("--gps-output-delay", metavar="SECONDS", help="the GNSS receiver's output delay: time from "
                        "a fix's epoch to its NMEA sentences (receiver-dependent, often 0.05 to 0.5 s; see its manual), "
                        "taken out when matching positions to readings (overrides the plan's gnss_output_delay_s)")
    parser.add_argument("--analyser", metavar="ADDRESS", help="VISA address of the spectrum analyser for the plan's "
                        "selective points (overrides their analyser = ...), e.g. TCPIP::192.0.2.7::5025::SOCKET")
    parser.add_argument("--json", action="store_true", help="no live readout; print the point results as JSON")
    again = parser.add_argument_group("measure a point of a stored survey again")
    again.add_argument("--session", metavar="ID", help="the stored survey (see 'meterlink sessions')")
    again.add_argument("--remeasure", metavar="POINT", help="label or number of the point to measure again: the new "
                       "capture replaces the old one in the conclusion, both stay in the record")
    again.add_argument("--reason", metavar="TEXT", help="why the point is measured again (shown in the report)")
    again.add_argument("--photo", metavar="FILE", action="append", default=[],
                       help="a PNG or JPEG photo of the point, copied into the database (repeatable)")
    again.add_argument("--photo-caption", metavar="TEXT", action="append", default=[],
                       help="what the photo shows: the first --photo-caption goes with the first --photo, ...")
    again.add_argument("--photo-direction", metavar="DEG", action="append", default=[],
                       help="direction of view of the photo in degrees from north (0 to 360), in --photo order")


def _photos(args) -> list:
    """--photo files with their --photo-caption and --photo-direction, matched in order."""
    from meterlink.errors import MeterlinkError
    from meterlink.survey.model import Photo

    if len(args.photo_caption) > len(args.photo) or len(args.photo_direction) > len(args.photo):
        raise MeterlinkError(f"{len(args.photo)} --photo given: more --photo-caption or --photo-direction than photos")
    out = []
    for i, f in enumerate(args.photo):
        direction = None
        if i < len(args.photo_direction):
            try:
                direction = float(args.photo_direction[i])
            except ValueError:
                direction = -1.0
            if not 0 <= direction <= 360:
                raise MeterlinkError(f"--photo-direction {args.photo_direction[i]!r} is not 0 to 360 degrees from north")
        out.append(Photo(f, args.photo_caption[i] if i < len(args.photo_caption) else "", direction))
    return out


def _output_delay(args) -> float | None:
    """--gps-output-delay in seconds (None when not given); one line for a value that is not 0 to 2 s or
    given without --gps."""
    from meterlink.errors import MeterlinkError
    from meterlink.survey.plan import MAX_GNSS_OUTPUT_DELAY_S

    if args.gps_output_delay is None:
        return None
    if not args.gps:
        raise MeterlinkError("--gps-output-delay goes with --gps PORT (the receiver it describes)")
    try:
        v = float(args.gps_output_delay)
    except ValueError:
        v = float("nan")
    if not 0 <= v <= MAX_GNSS_OUTPUT_DELAY_S:
        raise MeterlinkError(f"--gps-output-delay {args.gps_output_delay!r} is not a number of seconds from 0 to "
                             f"{MAX_GNSS_OUTPUT_DELAY_S:g}")
    return v


def result_dict(r) -> dict:
    """A PointResult as plain JSON-able data."""
    return {"label": r.point.label, "mode": r.point.mode, "scheme": r.scheme, "e_v_per_m": r.e_v_per_m,
            "e_max_v_per_m": r.e_max_v_per_m, "u_expanded_db": r.u_expanded_db, "n_readings": r.n_readings,
            "complete": r.complete, "percent_field": r.percent_field, "percent_power": r.percent_power,
            "verdict": r.verdict, "followup": r.followup, "e_extrapolated_v_per_m": r.e_extrapolated_v_per_m,
            "verdict_extrapolated": r.verdict_extrapolated, "exposure_ratio": r.exposure_ratio,
            "heights_m": [s.height_m for s in r.samples], "warnings": list(r.warnings)}


def run(args) -> int:

    from meterlink.reports import digits
    import math

    from rich.console import Console

    from meterlink.cli import SAFETY_LINE
    from meterlink.errors import MeterlinkError
    from meterlink.storage.store import Store
    from meterlink.survey.store import load_survey

    if not args.port:
        raise MeterlinkError("no --port given (see 'meterlink ports')")
    args.gnss_output_delay_s = _output_delay(args)
    if args.remeasure is not None or args.session is not None or args.reason is not None or args.photo \
            or args.photo_caption or args.photo_direction:
        return _remeasure(args)
    console = None if args.json else Console()
    if args.plan:
        import sys

        from meterlink.survey.run import run_plan
        ready = None
        if console is not None and sys.stdin.isatty():   # a technician at the terminal moves the probe
            from meterlink.survey.interactive import rich_ask
            ask = rich_ask(console)

            def ready(point, height_m):
                where = f" at x {point.x_m:g} m, y {point.y_m:g} m" if point.x_m is not None else ""
                what = "the antenna" if point.mode == "selective" else "the probe"
                ask(f"Hold {what} at {point.label!r}{where}, {height_m:.2f} m, then press Enter", default="")
        from meterlink.planning.sourcefile import load_site
        from meterlink.survey.plan import load_plan
        plan = load_plan(args.plan)      # checked before the meter is touched; its sources file too
        declared = load_site(plan.sources_file) if plan.sources_file else None
        orient = None
        if sys.stdin.isatty():      # a single-axis antenna of a selective point is turned by hand
            def orient(axis):
                input(f"turn the antenna to orientation {axis} and press Enter ")
        sid = run_plan(args.port, args.plan, args.db, console=console, ready=ready, gnss_port=args.gps,
                       declared=declared, analyser=args.analyser, orient=orient,
                       gnss_output_delay_s=args.gnss_output_delay_s)
    else:
        if args.json:
            raise MeterlinkError("--json needs --plan (the interactive survey asks at the terminal)")
        from meterlink.planning.sourcefile import load_site
        from meterlink.survey.interactive import run_interactive
        sid = run_interactive(args.port, args.db, console=console, gnss_port=args.gps, load_declared=load_site,
                              gnss_output_delay_s=args.gnss_output_delay_s)
    with Store(args.db) as store:
        sv = load_survey(store, sid)
    if args.json:
        clean = lambda v: None if isinstance(v, float) and not math.isfinite(v) else v  # noqa: E731
        pts = [{k: clean(v) for k, v in p.items() if k not in ("samples", "emitters")} | {
            "heights_m": [s["height_m"] for s in p["samples"]],
            "emitters": [{k: clean(v) for k, v in m.items()} for m in p["emitters"]]} for p in sv["points"]]
        print(digits.dumps({"session_id": sid, "db": str(args.db), "standard": sv["standard"], "tier": sv["tier"],
                          "decision_rule": sv["decision_rule"], "points": pts, "safety": SAFETY_LINE},
                         indent=2, default=str))
    else:
        console.print(f"survey session {sid} stored in {args.db}: {len(sv['points'])} point(s); "
                      f"'meterlink report --db {args.db} --session {sid} --out DIR' writes the report")
        console.print(SAFETY_LINE, style="bold")
    return 0


def _remeasure(args) -> int:
    """``--session ID --remeasure POINT --reason TEXT``: one point of a stored survey measured again."""
    import json
    import sys

    from rich.console import Console

    from meterlink.cli import SAFETY_LINE
    from meterlink.errors import MeterlinkError
    from meterlink.survey.remeasure import remeasure

    if args.remeasure is None or args.session is None:
        raise MeterlinkError("--session, --reason and --photo (with its caption and direction) go with --remeasure POINT: give the survey "
                             "(--session ID) and the point to measure again")
    if args.plan:
        raise MeterlinkError("--remeasure measures a point of a stored survey: it takes no --plan")
    try:
        sid = int(args.session)
    except ValueError:
        raise MeterlinkError(f"--session {args.session!r} is not a whole number") from None
    console = None if args.json else Console()
    ready = None
    if console is not None and sys.stdin.isatty():
        from meterlink.survey.interactive import rich_ask
        ask = rich_ask(console)

        def ready(point, height_m):
            ask(f"Hold the probe at {point.label!r}, {height_m:.2f} m, then press Enter", default="")
    try:
        res = remeasure(args.port, args.db, sid, args.remeasure, args.reason or "", photos=_photos(args),
                        console=console, ready=ready, gnss_port=args.gps,
                        gnss_output_delay_s=args.gnss_output_delay_s)
    except EOFError:
        raise MeterlinkError("input ended before the point was measured again: the survey is unchanged") from None
    if args.json:
        print(json.dumps({"session_id": sid, "db": str(args.db), "reason": args.reason.strip(),
                          "point": result_dict(res), "safety": SAFETY_LINE}, indent=2, default=str))
    else:
        console.print(f"point {res.point.label!r} of survey {sid} measured again; the earlier capture stays in "
                      "the record with the reason")
        console.print(SAFETY_LINE, style="bold")
    return 0
