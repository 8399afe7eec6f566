"""``meterlink assess``: judge a recorded session against a standard, with its uncertainty."""

from __future__ import annotations

HELP = "assess a recorded session: time-averaged exposure, percent of the reference level, verdict"


def add_arguments(parser) -> None:
    parser.add_argument("--db", metavar="FILE", default="meterlink.db", help="database (default meterlink.db)")
    parser.add_argument("--session", metavar="ID", type=int, help="session id (default: the newest)")
    parser.add_argument("--standard", metavar="NAME", required=True,
                        help="reference-level set, e.g. icnirp-2020, fcc-1310 (see 'meterlink limits')")
    parser.add_argument("--tier", choices=("public", "occupational"), required=True,
                        help="general public or occupational (workers) reference levels")
    parser.add_argument("--rule", metavar="NAME", default="guarded",
                        help="decision rule, recorded before the assessment: simple, guarded (default), conservative")
    parser.add_argument("--certificate", metavar="FILE", help="apply this certificate first (a new calibration)")
    group = parser.add_mutually_exclusive_group()
    group.add_argument("--freq", metavar="F", help="frequency of a broadband measurement, e.g. 936MHz")
    group.add_argument("--band", metavar="LO:HI", help="band of a broadband measurement, e.g. 790MHz:960MHz")
    parser.add_argument("--near-field", action="store_true",
                        help="the probe was in the near field: E alone is insufficient, no S is derived")
    parser.add_argument("--json", action="store_true", help="print the result as JSON")


def run(args) -> int:

    from meterlink.reports import digits

    from meterlink.commands.record import parse_declared
    from meterlink.errors import MeterlinkError
    from meterlink.physics.limits import standards
    from meterlink.storage.processing import latest_session
    from meterlink.storage.store import Store
    from meterlink.physics.verdict import get_rule

    if args.standard not in standards():
        raise MeterlinkError(f"unknown standard {args.standard!r} (known: {', '.join(standards())})")
    rule = get_rule(args.rule)
    freq, band = parse_declared(args.freq, args.band)
    if args.certificate:        # an unusable certificate is refused before anything is written
        from meterlink.physics.certificate import load_certificate
        load_certificate(args.certificate)
    with Store(args.db, create=False) as store:
        store.check_sound()      # never write into a damaged file
        sid = args.session if args.session is not None else latest_session(store)
        session = store.session(sid)
        # the rule is recorded before anything is computed, so it cannot be chosen after the fact
        store.add_event(sid, "assessment_rule", "info", f"decision rule {rule.name} chosen for {args.standard} "
                        f"{args.tier}", rule=rule.name, standard=args.standard, tier=args.tier)
        streamed = _assess_streamed(store, sid, args, rule, freq, band)
        if streamed is not None:
            result, trace = streamed
        else:
            result, trace = _assess_in_memory(store, sid, session, args, rule, freq, band)
        store.add_event(sid, "assessment", "info", result.verdict.statement, outcome=result.verdict.outcome,
                        reason=result.verdict.reason or None, standard=args.standard, tier=args.tier, rule=rule.name,
                        exposure_ratio_power=result.total_exposure_ratio, u_expanded_db=result.u_expanded_db)
    if args.json:
        from meterlink.reports.render import assessment_dict

        print(digits.dumps(assessment_dict(result), indent=2, default=float))
    else:
        from rich.console import Console

        from meterlink.reports.render import assessment_renderable

        con = Console()
        if trace is not None:
            from meterlink.reports.render import field_trace

            con.print(field_trace(*trace, result.limit_v_per_m))
        con.print(assessment_renderable(result))
    return 0


def _assess_in_memory(store, sid, session, args, rule, freq, band):
    """Load the calibrated series whole (dipole sessions, or readings out of time order)."""
    from meterlink.physics.assessment import assess_field, assess_spectrum
    from meterlink.physics.certificate import parse_certificate
    from meterlink.storage.processing import FieldSeries, calibrated_series

    series = calibrated_series(store, sid, args.certificate, freq_hz=freq, band=band, near_field=args.near_field)
    if isinstance(series, FieldSeries):
        cal = store.calibrations(sid)[-1]
        cert = parse_certificate(cal["certificate_text"], "stored calibration")
        result = assess_field(series, args.standard, args.tier, rule.name,
                              freq_hz=freq or cal.get("freq_hz") or session.get("freq_hz"),
                              band=band or _band(cal) or _band(session), fallback_range=cert.freq_range_hz,
                              near_field=args.near_field, has_h=cert.quantity == "H")
        return result, (series.t_utc, series.e_v_per_m)
    from meterlink.physics.calibrate import floor_e_v_per_m

    cert = parse_certificate(store.calibrations(sid)[-1]["certificate_text"], "stored calibration")
    result = assess_spectrum(series, args.standard, args.tier, rule.name, near_field=args.near_field,
                             floor_v_per_m=floor_e_v_per_m(cert, series.freq_hz))
    return result, None


def _assess_streamed(store, sid, args, rule, freq, band):
    """A probe session assessed chunk by chunk (bounded memory); None when it must be loaded whole."""
    from meterlink.errors import MeterlinkError
    from meterlink.physics.assessment import assess_field_stats, averaging_time_s, governing_level
    from meterlink.physics.streaming import ColumnEnvelope
    from meterlink.storage import streamed as S
    from meterlink.storage.processing import certificate_for_session
    from meterlink.storage.recording import load_recording

    rec = load_recording(store, sid)
    if rec.is_dipole or rec.sensor_kind is None or not rec.in_time_order:
        return None
    try:        # first, before anything is written: the times must be in id order to stream
        med = S.interval_median(rec)
    except S.NotStreamable:
        return None
    if args.certificate or not rec.calibrations or freq is not None or band is not None or args.near_field:
        if args.certificate:
            from meterlink.physics.certificate import load_certificate

            cert = load_certificate(args.certificate)
        else:
            cert = certificate_for_session(store, sid)
            if cert is None:
                raise MeterlinkError(f"session {sid} has no calibration and no packaged certificate matches its "
                                     f"probe: give --certificate FILE")
        S.recalibrate(store, rec, cert, freq_hz=freq, band=band, near_field=args.near_field)
        rec = load_recording(store, sid)
    cal, cert, session = rec.calibration, rec.certificate, rec.session
    f = freq or cal.get("freq_hz") or session.get("freq_hz")
    b = band or _band(cal) or _band(session)
    governing_level(args.standard, args.tier, f, b, cert.freq_range_hz)     # no frequency known: a clear error
    window = averaging_time_s(args.standard, args.tier, f, b or cert.freq_range_hz)
    env = ColumnEnvelope(med.first or 0.0, med.last or 0.0, 1000)
    stats = S.feed_values(rec, S.field_accumulator(med, window), sinks=(lambda v: env.feed(v.t_utc, v.e_v_per_m),))
    result = assess_field_stats(stats, S.series_facts(rec), args.standard, args.tier, rule.name, freq_hz=f, band=b,
                                fallback_range=cert.freq_range_hz, near_field=args.near_field,
                                has_h=cert.quantity == "H")
    t_col, _lo, _hi, rms = env.columns()
    return result, (t_col, rms)


def _band(row):
    lo, hi = row.get("band_lo_hz"), row.get("band_hi_hz")
    return (lo, hi) if lo and hi else None
