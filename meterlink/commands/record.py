"""``meterlink record``: store a meter's raw readings, status and link events in SQLite."""

from __future__ import annotations

import math

HELP = "record a meter's raw readings, status and link events into a database"

DEFAULT_DB = "meterlink.db"


def add_arguments(parser) -> None:
    parser.add_argument("--port", metavar="PORT",
                        help="serial device or pyserial URL (socket://, rfc2217://, loop://, spy://)")
    parser.add_argument("--db", metavar="FILE", default=DEFAULT_DB,
                        help=f"database file, created if missing (default: {DEFAULT_DB} in the current directory)")
    parser.add_argument("--duration", metavar="S", help="stop after S seconds of DEVICE time, i.e. when the "
                        "readings span S s by the meter's own clock (default: until Ctrl-C); a host-time "
                        "safety timeout of 2*S+30 s also applies")
    parser.add_argument("--interval-ms", metavar="N", default="1000", help="reading interval to ask for (default 1000)")
    group = parser.add_mutually_exclusive_group()
    group.add_argument("--freq", metavar="F", help="frequency the operator declares for a broadband probe, e.g. 900MHz")
    group.add_argument("--band", metavar="LO:HI", help="band the operator declares, e.g. 800MHz:1GHz")
    parser.add_argument("--notes", metavar="TEXT", default="", help="free text stored with the session")
    parser.add_argument("--certificate", metavar="FILE",
                        help="certificate to calibrate the readings with afterwards (default: the packaged "
                             "certificate matching the probe serial, if any); raw counts are stored either way")
    parser.add_argument("--standard", metavar="NAME", default="icnirp-2020",
                        help="reference levels for the live percent shown while recording (default icnirp-2020); "
                             "only the display, nothing stored depends on it")
    parser.add_argument("--tier", choices=("public", "occupational"), default="public",
                        help="tier of the live percent (default public)")
    parser.add_argument("--json", action="store_true", help="print the summary as JSON")


def _positive(text: str, what: str, integer: bool = False) -> float:
    from meterlink.errors import MeterlinkError

    try:
        value = int(text) if integer else float(text)
    except (TypeError, ValueError):
        raise MeterlinkError(f"{what} {text!r} is not a {'whole ' if integer else ''}number") from None
    if not math.isfinite(value) or value <= 0:
        raise MeterlinkError(f"{what} {text!r} must be positive")
    return value


def parse_band(text: str) -> tuple[float, float]:
    """'800MHz:1GHz' -> (8e8, 1e9); MeterlinkError if malformed or empty."""
    from meterlink.errors import MeterlinkError
    from meterlink.physics.units import parse_band_hz

    try:
        return parse_band_hz(text)      # range-checked at the edge: nothing absurd is stored
    except ValueError as exc:
        raise MeterlinkError(f"--band {text!r}: {exc}") from None


def parse_declared(freq_text: str | None, band_text: str | None) -> tuple[float | None, tuple[float, float] | None]:
    """The --freq / --band pair of a command as (freq_hz, band); MeterlinkError naming the option."""
    from meterlink.errors import MeterlinkError
    from meterlink.physics.units import parse_frequency_hz

    freq = None
    if freq_text is not None:
        try:
            freq = parse_frequency_hz(freq_text)
        except ValueError as exc:
            raise MeterlinkError(f"--freq: {exc}") from None
    return freq, parse_band(band_text) if band_text is not None else None


def run(args) -> int:

    from meterlink.reports import digits

    from meterlink.errors import MeterlinkError
    from meterlink.storage.recorder import Recorder
    from meterlink.storage.store import Store

    if not args.port:
        raise MeterlinkError("no --port given (see 'meterlink ports')")
    duration = _positive(args.duration, "--duration") if args.duration is not None else None
    interval = int(_positive(args.interval_ms, "--interval-ms", integer=True))
    freq, band = parse_declared(args.freq, args.band)
    import signal
    import sys
    from pathlib import Path

    from meterlink.storage.recorder import NoMeterError

    show = not args.json and sys.stderr.isatty()
    db_path = Path(args.db)
    new_file = not db_path.exists()
    empty = False
    try:
        live = _Live(args.certificate, freq, band, args.standard, args.tier)
        with Store(args.db) as store, _progress(show, duration, live) as on_item:
            rec = Recorder(store, args.port, interval_ms=interval, duration_s=duration, freq_hz=freq, band_hz=band,
                           notes=args.notes, on_item=on_item)
            # SIGTERM (a service manager, kill) ends the recording as Ctrl-C does: the last batch is
            # stored and the session closed, never left open
            old = {sig: signal.signal(sig, lambda *_: rec.stop()) for sig in (signal.SIGTERM, signal.SIGHUP)}
            try:
                summary = rec.run()
            except NoMeterError:
                empty = not store.sessions()
                raise
            finally:
                for sig, handler in old.items():
                    signal.signal(sig, handler)
            field, field_error = None, None
            if summary.readings or summary.spectra:
                from meterlink.storage.processing import calibrated_series

                try:
                    field = calibrated_series(store, summary.session_id, args.certificate, freq_hz=freq, band=band)
                except MeterlinkError as exc:     # the raw record is safe; say why no field values
                    field_error = str(exc)
    except NoMeterError:
        if new_file and empty:  # a failed command leaves no empty database behind
            for suffix in ("", "-wal", "-shm", "-journal"):
                Path(str(db_path) + suffix).unlink(missing_ok=True)
        raise
    if args.json:
        out = summary.as_dict()
        out["calibrated"] = _field_dict(field) if field is not None else {"error": field_error}
        print(digits.dumps(out, indent=2, sort_keys=True))
    else:
        print_summary(summary)
        from rich.console import Console

        from meterlink.storage.processing import FieldSeries
        from meterlink.reports.render import field_summary_renderable

        if isinstance(field, FieldSeries):
            Console().print(field_summary_renderable(field))
        elif field is not None:
            Console().print(f"{field.t_utc.size} sweeps calibrated with {field.certificate_name}; "
                            f"see 'meterlink assess' for the emitters")
        elif field_error:
            Console(stderr=True).print(f"[yellow]no calibrated values:[/] {field_error}")
    return 0


def _field_dict(series) -> dict:
    """JSON summary of a calibrated series (probe: E/H/S statistics; dipole: sweeps and frequencies)."""
    import numpy as np

    from meterlink.storage.processing import FieldSeries

    d = {"certificate": series.certificate_name, "calibration_id": series.calibration_id,
         "warnings": list(series.warnings)}
    e = np.asarray(series.e_v_per_m, dtype=float)
    ok = np.isfinite(e)
    if isinstance(series, FieldSeries):
        d.update(values=int(ok.sum()), e_min_v_per_m=float(e[ok].min()) if ok.any() else None,
                 e_max_v_per_m=float(e[ok].max()) if ok.any() else None,
                 e_rms_v_per_m=float(np.sqrt(np.mean(e[ok] ** 2))) if ok.any() else None,
                 h_max_a_per_m=float(np.nanmax(series.h_a_per_m)) if np.isfinite(series.h_a_per_m).any() else None,
                 s_max_w_per_m2=float(np.nanmax(series.s_w_per_m2)) if np.isfinite(series.s_w_per_m2).any() else None,
                 u_expanded_db=float(np.nanmax(series.u_expanded_db)) if ok.any() else None, k=2)
    else:
        d.update(sweeps=int(series.t_utc.size), freq_hz=[float(f) for f in series.freq_hz])
    return d


class _Live:
    """The live field of a probe reading and its percent of the reference level (display only): the
    certificate given, else the packaged one of the probe the meter announces; none: counts only."""

    def __init__(self, certificate, freq_hz, band, standard: str, tier: str):
        self.certificate, self.freq, self.band = certificate, freq_hz, band
        self.standard, self.tier = standard, tier
        self.cert = self.e_ref = self.temp_c = None     # temp_c: the meter's last reported temperature
        self.why = ""

    def connected(self, ident) -> None:
        """Choose the certificate and the broadband reference level once the meter has said who it is."""
        from meterlink.errors import MeterlinkError
        from meterlink.physics.certificate import ProbeCertificate, load_certificate, packaged_certificates
        from meterlink.survey.assess import broadband_reference

        try:
            if self.certificate:
                cert = load_certificate(self.certificate)
            else:
                cert = next((c for c in map(load_certificate, packaged_certificates())
                             if c.serial == (ident.probe_serial or "").strip()), None)
            if not isinstance(cert, ProbeCertificate):
                self.why = "no probe certificate for a live field value"
                return
            rng = self.freq if self.freq is not None else (self.band or cert.freq_range_hz)
            self.e_ref = broadband_reference(self.standard, self.tier, rng).e_v_per_m
            self.cert = cert
        except MeterlinkError as exc:     # the recording goes on; only the live value is missing
            self.why = f"no live field value: {exc}"

    def value(self, axes) -> tuple[float, float] | None:
        """(E in V/m, percent of the power-density reference level) of one reading, or None."""
        if self.cert is None:
            return None
        from meterlink.physics.calibrate import calibrate_axes

        rng = self.freq if self.freq is not None else (self.band or self.cert.freq_range_hz)
        e = float(calibrate_axes(self.cert, [[axes.x, axes.y, axes.z]], rng, self.temp_c).e_v_per_m[0])
        return e, 100.0 * (e / self.e_ref) ** 2

    def text(self, axes) -> str:
        """Rich markup of the live value, coloured by the shared percent scale."""
        v = self.value(axes)
        if v is None:
            return self.why
        from meterlink.reports.percent_scale import style_power

        e, pct = v
        if not math.isfinite(e):
            return "[bold red]E out of the probe's range[/]"
        return (f"[{style_power(pct / 100)}]E {e:.3g} V/m  {pct:.1f} % of the power-density level "
                f"({self.standard} {self.tier})[/]")


class _progress:
    """Context giving an on_item callback that shows device time recorded and the live field with its
    percent of the reference level (rich, on stderr)."""

    def __init__(self, show: bool, duration_s: float | None, live: _Live | None = None, console=None):
        self.show, self.duration_s, self.live, self.console = show, duration_s, live, console
        self.first = None

    def __enter__(self):
        if not self.show:
            return None
        from rich.console import Console
        from rich.progress import BarColumn, Progress, TextColumn, TimeElapsedColumn
        from rich.text import Text

        class TwoLines(Progress):
            """The bar and device time on one line, the live field on the next: on one line of an
            80-column terminal both were cut short (the field lost its standard and tier)."""

            def get_renderables(self):
                yield self.make_tasks_table(self.tasks)
                for task in self.tasks:
                    if task.fields.get("field"):
                        yield Text.from_markup(task.fields["field"], overflow="fold")

        self.bar = TwoLines(TextColumn("recording"), BarColumn(bar_width=20), TextColumn("{task.fields[what]}"),
                            TimeElapsedColumn(), console=self.console or Console(stderr=True), transient=True)
        self.bar.start()
        self.task = self.bar.add_task("rec", total=self.duration_s, what="", field="")
        self.n = 0
        return self.on_item

    def on_item(self, item) -> None:
        from meterlink.device.link import Connected, Reading, SpectrumReading, StatusReport

        if isinstance(item, Connected) and self.live is not None:
            self.live.connected(item.ident)
            return
        if isinstance(item, StatusReport) and self.live is not None and item.status.temp_centi_c is not None:
            self.live.temp_c = item.status.temp_centi_c / 100.0     # as the stored series is corrected
            return
        if not isinstance(item, (Reading, SpectrumReading)):
            return
        t = item.t_utc
        self.n += 1
        if self.first is None:
            self.first = t
        done = t - self.first
        field = self.live.text(item.axes) if self.live is not None and isinstance(item, Reading) else ""
        self.bar.update(self.task, completed=done, what=f"{done:.0f} s device time, {self.n} readings", field=field)

    def __exit__(self, *exc) -> None:
        if self.show:
            self.bar.stop()


def summary_table(s):
    """A rich Table of a RecordSummary (pure: no terminal needed)."""
    from rich.markup import escape
    from rich.table import Table

    from meterlink.device.link import safe_text

    t = Table(title=f"recording, session {s.session_id}", show_header=False)
    t.add_column("what", style="bold")
    t.add_column("value")
    inst = " ".join(x for x in (safe_text(s.model), f"serial {safe_text(s.serial)}" if s.serial else "",
                                f"probe {safe_text(s.probe_serial)}" if s.probe_serial else "",
                                f"firmware {s.firmware}" if s.firmware else "") if x)
    rows = [("instrument", inst or "(no handshake)"), ("port", safe_text(s.port)), ("database", s.db_path),
            ("readings", str(s.readings)), ("spectra", str(s.spectra)), ("status reports", str(s.statuses)),
            ("frames lost (seq gaps)", str(s.lost_frames)),
            ("device time span", f"{s.device_span_s:.3f} s"), ("host time", f"{s.host_elapsed_s:.3f} s"),
            ("device clock / host clock", "n/a" if s.clock_rate_ratio is None else f"{s.clock_rate_ratio:.6g}"),
            ("events", ", ".join(f"{k} {n}" for k, n in s.events_by_kind.items()) or "none"),
            ("stopped", s.stop_reason)]
    for k, v in rows:
        t.add_row(k, escape(v))
    return t


def print_summary(s) -> None:
    from rich.console import Console

    Console().print(summary_table(s))
