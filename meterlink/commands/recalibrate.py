"""``meterlink recalibrate``: re-derive a session's field values from its raw counts with another certificate."""

from __future__ import annotations

HELP = "apply another certificate to a recorded session's raw readings (earlier results are kept)"


def add_arguments(parser) -> None:
    parser.add_argument("--db", metavar="FILE", default="meterlink.db", help="database (default meterlink.db)")
    parser.add_argument("--session", metavar="ID", type=int, help="session id (default: the newest)")
    parser.add_argument("--certificate", metavar="FILE", required=True,
                        help="certificate file, or the name of a packaged one (e.g. demo-probe)")
    group = parser.add_mutually_exclusive_group()
    group.add_argument("--freq", metavar="F", help="declared frequency (default: the session's)")
    group.add_argument("--band", metavar="LO:HI", help="declared band (default: the session's)")
    parser.add_argument("--again", action="store_true",
                        help="apply even when this certificate, with the same declared frequency or band, is already the "
                             "calibration in force (it would add an identical calibration)")
    parser.add_argument("--json", action="store_true", help="print the result as JSON")


def already_in_force(calibrations, cert_sha256: str, freq_hz, band) -> dict | None:
    """The session's calibration in force when it used the same certificate text and the same declared
    frequency or band (re-applying it would only add an identical copy), else None."""
    if not calibrations:
        return None
    last = calibrations[-1]
    same_band = (band is None and last.get("band_lo_hz") is None) or (
        band is not None and (last.get("band_lo_hz"), last.get("band_hi_hz")) == tuple(band))
    same_freq = (freq_hz is None and last.get("freq_hz") is None) or (
        freq_hz is not None and last.get("freq_hz") is not None and float(last["freq_hz"]) == float(freq_hz))
    return last if last.get("certificate_sha256") == cert_sha256 and same_band and same_freq else None


def run(args) -> int:

    from meterlink.reports import digits

    import numpy as np

    from meterlink.physics.certificate import load_certificate
    from meterlink.commands.record import parse_declared
    from meterlink.storage import streamed
    from meterlink.storage.processing import FieldSeries, apply_certificate, latest_session
    from meterlink.storage.recording import load_recording
    from meterlink.storage.store import Store

    cert = load_certificate(args.certificate)
    freq, band = parse_declared(args.freq, args.band)
    with Store(args.db, create=False) as store:
        store.check_sound()      # never write into a damaged file
        sid = args.session if args.session is not None else latest_session(store)
        rec = load_recording(store, sid)
        before = rec.calibrations
        if not args.again:
            import hashlib

            from meterlink.errors import MeterlinkError
            from meterlink.physics.certificate import dump_certificate
            from meterlink.reports.render import utc_text

            sha = hashlib.sha256(dump_certificate(cert).encode()).hexdigest()
            eff_freq, eff_band = (freq, band) if (freq is not None or band is not None) else (rec.freq_hz, rec.band)
            same = already_in_force(before, sha, eff_freq, eff_band)
            if same is not None:
                raise MeterlinkError(f"session {sid}: certificate {same['certificate_name']} is already the calibration "
                                     f"in force (calibration {same['id']}, applied {utc_text(same['applied_utc'])}) with "
                                     "the same declared frequency or band; nothing added (--again adds a copy)")
        try:        # probe sessions stream chunk by chunk; dipole sessions are small and go whole
            done = streamed.recalibrate(store, rec, cert, freq_hz=freq, band=band)
            cal_id, name, warnings = done.calibration_id, done.certificate_name, done.warnings
            n_values, rms = done.n_values, done.e_rms_v_per_m
        except streamed.NotStreamable:
            series = apply_certificate(store, sid, cert, freq_hz=freq, band=band)
            cal_id, name, warnings = series.calibration_id, series.certificate_name, series.warnings
            vals = series.e_v_per_m if isinstance(series, FieldSeries) else series.e_v_per_m.ravel()
            ok = np.isfinite(vals)
            n_values = int(ok.sum())
            rms = float(np.sqrt(np.mean(vals[ok] ** 2))) if ok.any() else None
        store.add_event(sid, "recalibrated", "info", f"certificate {name} applied",
                        calibration_id=cal_id, previous=[c["id"] for c in before])
        cals = store.calibrations(sid)
    out = {"session_id": sid, "calibration_id": cal_id, "certificate": name,
           "values": n_values, "e_rms_v_per_m": rms, "warnings": list(warnings),
           "calibrations": [{"id": c["id"], "certificate": c["certificate_name"], "sha256": c["certificate_sha256"],
                             "applied_utc": c["applied_utc"]} for c in cals]}
    if args.json:
        print(digits.dumps(out, indent=2))
        return 0
    from rich.console import Console
    from rich.markup import escape
    from rich.table import Table

    t = Table(title=f"calibrations of session {sid} (raw readings unchanged; every result kept)")
    for col in ("id", "certificate", "sha256", "applied"):
        t.add_column(col)
    from meterlink.reports.render import utc_text

    for c in cals:
        mark = " (new)" if c["id"] == cal_id else ""
        t.add_row(str(c["id"]) + mark, escape(c["certificate_name"]), c["certificate_sha256"][:12], utc_text(c["applied_utc"]))
    con = Console()
    con.print(t)
    if out["e_rms_v_per_m"] is not None:
        con.print(f"{out['values']} values, rms {out['e_rms_v_per_m']:.4g} V/m under the new calibration")
    for w in warnings:
        con.print(f"[yellow]warning:[/] {escape(w)}")
    return 0
