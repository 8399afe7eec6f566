"""Report of a recorded (non-survey) session: instrument, calibration, assessment, field plot, events.

The standard, tier and decision rule are those recorded by the session's latest assessment (the
rule is fixed before the assessment, see `meterlink assess`), unless the caller names them.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from meterlink.reports import htmlpage as H
from meterlink.reports import templating as T
from meterlink.reports.digits import DEFAULT_SIG as SIG  # values.csv: times in s to 1 ms, U in dB to 0.001
from meterlink.errors import MeterlinkError

CAUTIONS = (
    "These results describe the field at the probe's position during the recording. They support, and do "
    "not replace, an exposure assessment by a qualified person under the regulations that apply at the "
    "site; local codes and licensed practice come first. Reference levels assume far-field, plane-wave "
    "conditions: close to an antenna, or below 30 MHz, E and H must both be measured. A broadband probe "
    "cannot tell sources apart. Keep clear of energised antennas and observe the site's access rules.")


def _choices(events, sid, standard, tier, rule):
    if standard and tier and rule:
        return standard, tier, rule
    for ev in reversed([e for e in events if e["kind"] == "assessment"]):
        d = ev["detail"]
        return standard or d.get("standard"), tier or d.get("tier"), rule or d.get("rule")
    raise MeterlinkError(f"session {sid} has not been assessed: run 'meterlink assess' first, or give "
                         f"--standard, --tier and --rule")


#: Pixel columns of the field plot: each shows the lowest and highest reading that falls in it.
PLOT_COLUMNS = 800
CSV_HEAD = ("reading_id", "t_utc", "e_v_per_m", "ex_v_per_m", "ey_v_per_m", "ez_v_per_m", "u_expanded_db", "flags")


class _Envelopes:
    """What the field plot shows of a record of any length: per pixel column the lowest and highest
    reading, and the highest complete and partial running average (filled chunk by chunk)."""

    def __init__(self, t0_s: float, t1_s: float):
        from meterlink.physics.streaming import ColumnEnvelope

        self.t0 = t0_s
        self.e = ColumnEnvelope(t0_s, t1_s, PLOT_COLUMNS)
        self.avg = ColumnEnvelope(t0_s, t1_s, PLOT_COLUMNS)
        self.part = ColumnEnvelope(t0_s, t1_s, PLOT_COLUMNS)

    def windows(self, t_end_s, rms, complete, partial) -> None:
        self.avg.feed(t_end_s, np.where(complete, rms, np.nan))
        self.part.feed(t_end_s, np.where(partial, rms, np.nan))


def _envelopes_in_memory(series, a) -> _Envelopes:
    from meterlink.physics.averaging import running_average

    t = np.asarray(series.t_utc)
    e = np.asarray(series.e_v_per_m, dtype=float)
    ok = np.isfinite(e)
    env = _Envelopes(float(t[ok][0]) if ok.any() else 0.0, float(t[ok][-1]) if ok.any() else 0.0)
    env.e.feed(t, e)
    if a.window_s and ok.sum() > 2:
        ra = running_average(t[ok], e[ok], a.window_s)
        env.windows(ra.t_end_s, ra.e_rms_v_per_m, ra.complete, ra.partial & np.isfinite(ra.e_rms_v_per_m))
    return env


def _field_plot(env: _Envelopes, a) -> bytes:
    from matplotlib.figure import Figure

    fig = Figure(figsize=(8, 3.2))
    ax = fig.add_subplot()
    t0 = env.t0
    tc, lo, hi, _ = env.e.columns()
    if tc.size:
        x = (tc - t0) / 60
        ax.fill_between(x, lo, hi, step="post", color="#b9c3c6", lw=0.6,
                        label="E, lowest to highest reading per pixel column")
        ax.step(x, hi, where="post", color="#8f9a9d", lw=0.6)
    tc, _, hi, _ = env.avg.columns()
    if tc.size:
        ax.plot((tc - t0) / 60, hi, color="#2b6f77", lw=1.8, label=f"{a.window_s / 60:g}-min running average")
    tc, _, hi, _ = env.part.columns()
    if tc.size:
        ax.plot((tc - t0) / 60, hi, color="#2b6f77", lw=1.0, ls=":",
                label="partial windows (shorter than the averaging time)")
    if a.limit_v_per_m:
        ax.axhline(a.limit_v_per_m, color="#b3261e", ls="--", lw=1.2, label=f"reference level {a.limit_v_per_m:.4g} V/m")
    ax.set(xlabel="minutes from the first reading (device clock)", ylabel="E (V/m)")
    ax.set_ylim(bottom=0)
    ax.grid(alpha=0.3)
    ax.legend(loc="best", fontsize=8)
    return H.figure_png(fig)


def _csv_rows(ids, t, e, axes, u, flags):
    """values.csv rows of calibrated values, each cell as the report has always written it."""
    return ([int(i), f"{tt:.3f}", f"{v:.{SIG}g}", *(f"{x:.{SIG}g}" for x in ax), f"{uu:.3f}", int(fl)]
            for i, tt, v, ax, uu, fl in zip(ids, t, e, axes, u, flags))


class _CsvSink:
    """values.csv written chunk by chunk, the same bytes as H.write_csv of the whole series."""

    _LINE = "%d,%.3f,%.{0}g,%.{0}g,%.{0}g,%.{0}g,%.3f,%d\r\n".format(SIG)

    def __init__(self, path: Path):
        import csv

        self.f = open(path, "w", newline="", encoding="utf-8")
        self.w = csv.writer(self.f)
        self.w.writerow(CSV_HEAD)

    def __call__(self, v) -> None:
        num = (v.t_utc, v.e_v_per_m, v.axes_v_per_m, v.u_expanded_db)
        if any(np.any(np.asarray(c) < 0) for c in num):     # a cell starting with "-": guarded cell by cell
            for row in _csv_rows(v.reading_ids, *num, v.flags):
                self.w.writerow([H.csv_cell(c) for c in row])
            return
        ax = v.axes_v_per_m
        rows = zip(v.reading_ids.tolist(), v.t_utc.tolist(), v.e_v_per_m.tolist(), ax[:, 0].tolist(),
                   ax[:, 1].tolist(), ax[:, 2].tolist(), v.u_expanded_db.tolist(), v.flags.tolist())
        line = self._LINE
        self.f.write("".join([line % r for r in rows]))

    def close(self) -> None:
        self.f.close()


class _Streamed:
    """A probe session's report data, read chunk by chunk (the shape the page code reads of a series)."""

    def __init__(self, rec, t_first: float | None, t_last: float | None, env: _Envelopes):
        self.session_id = rec.session_id
        self.t_utc = np.array([t_first, t_last], dtype=float) if t_first is not None else np.zeros(0)
        self.envelopes = env


def _stream_field(rec, standard, tier, rule, out: Path):
    """Assess a probe session, write values.csv and gather the plot, in two streamed passes; None
    when the session must be loaded whole (readings out of time order)."""
    from meterlink.physics.assessment import assess_field_stats, averaging_time_s
    from meterlink.storage import streamed as S

    s, cert = rec.session, rec.certificate
    band = (s["band_lo_hz"], s["band_hi_hz"]) if s.get("band_lo_hz") and s.get("band_hi_hz") else None
    from meterlink.physics.assessment import governing_level

    governing_level(standard, tier, s.get("freq_hz"), band, cert.freq_range_hz)   # no frequency: a clear error
    window = averaging_time_s(standard, tier, s.get("freq_hz"), band or cert.freq_range_hz)
    try:
        med = S.interval_median(rec)
    except S.NotStreamable:
        return None
    acc = S.field_accumulator(med, window)
    env = _Envelopes(med.first or 0.0, med.last or 0.0)
    acc.window_sink = env.windows
    csv_out = _CsvSink(out / "values.csv")
    try:
        stats = S.feed_values(rec, acc, sinks=(csv_out, lambda v: env.e.feed(v.t_utc, v.e_v_per_m)))
    finally:
        csv_out.close()
    a = assess_field_stats(stats, S.series_facts(rec), standard, tier, rule, freq_hz=s.get("freq_hz"), band=band,
                           fallback_range=cert.freq_range_hz, has_h=cert.quantity == "H")
    return _Streamed(rec, med.first, med.last, env), a


def _shares_plot(a) -> bytes:
    from matplotlib.figure import Figure

    from meterlink.physics.units import format_frequency

    em = list(a.emitters)[:12]
    fig = Figure(figsize=(8, 0.35 * len(em) + 1.2))
    ax = fig.add_subplot()
    ax.barh([format_frequency(x.freq_hz) for x in em][::-1], [100 * x.share for x in em][::-1], color="#2b6f77")
    ax.set(xlabel="share of the total exposure ratio (%)")
    ax.grid(axis="x", alpha=0.3)
    return H.figure_png(fig)


def write_session_report(db_path, session_id: int, out_dir, *, standard=None, tier=None, rule=None,
                         template_dir=None, pdf: bool = False, streamed: bool = True) -> Path:
    """Write report.html (and report.pdf when asked) and values.csv for a recorded session; returns
    the HTML path. The page is laid out by the session.html template (restyled from template_dir).

    A probe session streams (bounded memory, any length); streamed=False loads it whole (the
    reference path the streamed one is tested against)."""
    from meterlink.physics.assessment import assess_field, assess_spectrum
    from meterlink.physics.certificate import parse_certificate
    from meterlink.reports.templating import PDF_HINT, pdf_available, render, template_dir as checked_dir
    from meterlink.reports.templating import write_outputs
    from meterlink.storage.processing import FieldSeries, calibrated_series
    from meterlink.reports.render import value_label
    from meterlink.storage.recording import load_recording
    from meterlink.storage.store import Store

    if not Path(db_path).is_file():
        raise MeterlinkError(f"database {str(db_path)!r} does not exist")
    checked_dir(template_dir)
    if pdf and not pdf_available():
        raise MeterlinkError(PDF_HINT)
    out = Path(out_dir)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise MeterlinkError(f"cannot create report directory {str(out)!r}: {exc.strerror}") from None
    with Store(db_path) as store:
        rec = load_recording(store, session_id, events=True)
        s = rec.session
        standard, tier, rule = _choices(rec.events, session_id, standard, tier, rule)
        got, field_env = None, None
        if streamed and rec.calibration is not None and not rec.is_dipole and rec.in_time_order:
            got = _stream_field(rec, standard, tier, rule, out)
        if got is not None:
            series, a = got
            cal, cert, field_env = rec.calibration, rec.certificate, series.envelopes
        else:
            series = calibrated_series(store, session_id)
            cal = store.calibrations(session_id)[-1]
            cert = parse_certificate(cal["certificate_text"], "stored calibration")
            if isinstance(series, FieldSeries):
                band = (s["band_lo_hz"], s["band_hi_hz"]) if s.get("band_lo_hz") and s.get("band_hi_hz") else None
                a = assess_field(series, standard, tier, rule, freq_hz=s.get("freq_hz"), band=band,
                                 fallback_range=cert.freq_range_hz, has_h=cert.quantity == "H")
                H.write_csv(out / "values.csv", CSV_HEAD, _csv_rows(series.reading_ids, series.t_utc, series.e_v_per_m,
                                                                   series.axes_v_per_m, series.u_expanded_db,
                                                                   series.flags))
                field_env = _envelopes_in_memory(series, a)
            else:
                from meterlink.physics.calibrate import floor_e_v_per_m

                a = assess_spectrum(series, standard, tier, rule, floor_v_per_m=floor_e_v_per_m(cert, series.freq_hz))
        events = rec.events
    instrument_rows = [
        ("meter", f"{s.get('device_model')} serial {s.get('device_serial')}"),
        ("probe or antenna", s.get("device_probe_serial")),
        ("firmware / protocol", f"{s.get('device_fw_version')} / {s.get('device_protocol_version')}"),
        ("port", s.get("port")), ("session notes", s.get("notes")),
        ("certificate applied", cal["certificate_name"]), ("certificate due", cert.due_date or "not stated on the certificate"),
        ("certificate SHA-256", cal["certificate_sha256"]),
        ("recorded", f"{T.utc(float(np.nanmin(series.t_utc)))} to {T.utc(float(np.nanmax(series.t_utc)))} "
                     f"(device clock)" if len(series.t_utc) else "-")]
    assessment_rows = [
        ("standard", f"{a.standard}, {a.tier_label}: {a.source}"),
        ("reference level check", a.status),
        ("decision rule", a.rule), ("mode", f"{a.mode}: {a.frequency_note}"),
        ("reference level", f"{T.num(a.limit_v_per_m, '{:.4g}')} V/m" + (" (derived)" if a.limit_derived else "")),
        ("averaging time", f"{a.window_s / 60:g} min" if a.window_s else
         "none in the standard: instantaneous values compared" if a.averaging == "instantaneous" else "-"),
        ("peak", f"{a.peak_v_per_m:.4g} V/m"),
        (value_label(a), f"{a.value_v_per_m:.4g} V/m (coverage {100 * a.coverage:.1f} %)"),
        *((("partial windows (start of record)", f"up to {a.partial_v_per_m:.4g} V/m, not the standard's average"),)
          if a.partial_v_per_m is not None else ()),
        ("expanded uncertainty", f"U = {a.u_expanded_db:.2f} dB (k = 2)"),
        ("percent of the field level", f"{a.percent_field:.1f} %"),
        ("percent of the power-density level", f"{a.percent_power:.1f} %")]
    field = field_env is not None       # a probe session: values.csv was written while its data streamed
    if not field:
        H.write_csv(out / "values.csv", ("freq_hz", "e_v_per_m", "term_ratio", "quantity", "share"),
                    ([x.freq_hz, x.e_v_per_m, x.term_ratio, x.quantity, x.share] for x in a.emitters))
    title = f"Exposure record, session {session_id}"
    page = render("session.html", template_dir, title=title,
                  ident=f"{title}: {s.get('device_model')} serial {s.get('device_serial')}",
                  a=a, instrument_rows=instrument_rows, assessment_rows=assessment_rows,
                  field_plot=_field_plot(field_env, a) if field else None,
                  shares_plot=None if field else _shares_plot(a),
                  event_rows=event_summary(events), cautions=CAUTIONS)
    html = out / "report.html"
    write_outputs(page, html, pdf)
    return html


_SEVERITY_RANK = {"error": 0, "warning": 1, "info": 2}


def event_summary(events) -> list[list]:
    """The events table: one row per kind (most severe kinds first), with how many, first and last time
    (UTC) and the latest message, so 51 repeated entries read as one line."""
    groups: dict[str, list] = {}
    for ev in events:
        groups.setdefault(ev["kind"], []).append(ev)
    rows = []
    for kind, evs in groups.items():
        evs = sorted(evs, key=lambda e: e["t_utc"] or 0.0)
        sev = min((e["severity"] for e in evs), key=lambda v: _SEVERITY_RANK.get(v, 3))
        rows.append([kind, sev, len(evs), T.utc(evs[0]["t_utc"]), T.utc(evs[-1]["t_utc"]) if len(evs) > 1 else "",
                     evs[-1]["message"] or ""])
    return sorted(rows, key=lambda r: (_SEVERITY_RANK.get(r[1], 3), -r[2], r[0]))
