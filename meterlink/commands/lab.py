"""meterlink lab: calibrate a probe (simulated bench over its pty, or hand readings), budgets, as found / as left."""

from __future__ import annotations

HELP = "calibration lab: run procedures, import readings, show the budget, write certificates"


def add_arguments(parser) -> None:
    sub = parser.add_subparsers(dest="action", required=True, metavar="ACTION")
    run = sub.add_parser("run", help="run zero, linearity, frequency, isotropy (and temperature) on the simulated "
                                     "lab bench, or (dipole-af) a dipole's antenna factor over SCPI",
                         description="Calibrate a probe on the simulated lab bench (meter, signal chain and turntable "
                                     "over its pty): zero, linearity per axis, frequency response, isotropy and, with "
                                     "--temperatures, the temperature coefficient. Writes certificate.toml/.html and "
                                     "readings.csv to --out and prints the calibration factors with their expanded "
                                     "uncertainty. The lab session file (docs/lab.md) names the lab, the customer, "
                                     "the reference standards and the method. 'lab run dipole-af' calibrates a "
                                     "dipole's antenna factor by the standard-field method over SCPI instruments "
                                     "(simulated on loopback TCP, or --bench FILE) and writes the dipole certificate "
                                     "the host loads (docs/lab.md).")
    run.add_argument("procedure", nargs="?", choices=("probe", "dipole-af"), default="probe",
                     help="probe (default): the probe procedures; dipole-af: antenna factor of a dipole")
    imp = sub.add_parser("import", help="build a certificate from readings taken by hand (CSV)",
                         description="Build a certificate from readings taken by hand on a bench meterlink does not "
                                     "drive: a CSV of reference field and meter reading per step (columns in "
                                     "docs/lab.md). The analysis, budget and outputs are those of 'lab run'.")
    imp.add_argument("csv", help="readings file (columns in docs/lab.md), or with --af-bench a dipole-af journal")
    imp.add_argument("--af-bench", metavar="FILE",
                     help="the csv is an af-journal.csv of 'lab run dipole-af' (e.g. of a stopped run) measured on "
                          "this standard-field bench: build the dipole certificate from its readings (a "
                          "substitution journal, first column antenna, also takes the bench's [substitution] table)")
    bud = sub.add_parser("budget", help="show the uncertainty budget of the session's method",
                         description="Show the GUM uncertainty budget of the lab session's method: each contribution "
                                     "with its distribution, divisor and sensitivity, the combined standard "
                                     "uncertainty and the expanded uncertainty with its coverage factor.")
    bud.add_argument("--type-a-db", type=float, default=0.02, metavar="DB", help="Type A part to show (default 0.02 dB)")
    for p in (run, imp, bud):
        p.add_argument("--session", metavar="TOML", help="lab session file (default: an invented demo session)")
        p.add_argument("--json", action="store_true", help="print the result as JSON")
    for p in (run, imp):
        p.add_argument("--out", default="lab-out", metavar="DIR",
                       help="new folder for certificate.toml/.html, readings.csv (default lab-out; an issued "
                            "certificate is never overwritten)")
        p.add_argument("--previous", metavar="CERT", help="previous certificate: as-found / as-left comparison "
                                                          "(dipole-af: the antenna's previous certificate, which "
                                                          "also gives the receiver and cable; default demo-dipole)")
        p.add_argument("--register", metavar="FILE", help="the lab's register of issued certificate numbers "
                                                          "(default: lab-register.tsv next to the out folder)")
        p.add_argument("--pdf", action="store_true", help='also write certificate.pdf (needs pip install '
                                                          '"meterlink[pdf]")')
        p.add_argument("--template-dir", metavar="DIR", help="folder of templates or stylesheets replacing the "
                                                             "packaged ones of the same name (e.g. certificate.html)")
    run.add_argument("--speed", type=float, default=100.0, metavar="X", help="simulated device ms per real ms (default 100)")
    run.add_argument("--seed", type=int, default=0, metavar="N", help="seed of the simulated bench's noise (default 0)")
    run.add_argument("--repeats", type=int, default=5, metavar="N", help="readings per step (default 5)")
    run.add_argument("--quick", action="store_true", help="fewer frequencies, levels and angles")
    run.add_argument("--drift-db", type=float, default=0.0, metavar="DB",
                     help="simulate a sensitivity change of axis x (dB)")
    run.add_argument("--bench", metavar="FILE",
                     help="drive a bench of SCPI instruments (generator, power meter, rotator by VISA address) and "
                          "the meter on its serial port, as named in this bench file (docs/instruments.md); "
                          "dipole-af: generator, power meter and analyser, and the standard-field set-up")
    run.add_argument("--method", choices=("standard-field", "substitution"), default="standard-field",
                     help="dipole-af: standard-field (default; a transmitting antenna of known gain) or substitution "
                          "(a reference antenna of known antenna factor, named in the bench file's [substitution] "
                          "table, measures the field; the dipole then replaces it)")
    run.add_argument("--temperatures", metavar="LIST",
                     help="also measure the temperature coefficient in a climatic chamber at these degC, "
                          "e.g. 5,15,23,30,40 (the simulated bench has one)")


def _session(path, example: str = "session.toml"):
    """The session file given, else the packaged example session (invented) dated today."""
    import dataclasses
    import datetime as dt
    import importlib.resources

    from meterlink.lab.session import load_session
    if path:
        return load_session(path)
    with importlib.resources.as_file(importlib.resources.files("meterlink.lab") / "examples" / example) as p:
        s = load_session(p)
    today = dt.date.today()
    year = dt.timedelta(days=365)
    # dated the day it runs, numbered from the register; the invented standards stay in calibration
    return dataclasses.replace(
        s, certificate_number="", cal_date=today, due_date=today + year if s.due_date else None, issue_date=today, received_date=None,
        operator="demo", references=tuple(dataclasses.replace(r, due_date=max(r.due_date, today + year))
                                          for r in s.references))


def _simulated(session, args):
    from rich.progress import Progress

    from meterlink.lab import procedures as pr
    from meterlink.lab.meter import MeterBench
    from meterlink.device.link import MeterLink
    from meterlink.simulators.lab import LabMeter
    if args.quick:
        plan = pr.full_plan(session, freqs=(3e7, 1e8, 3e8, 1e9, 3e9, 6e9), levels=(0.1, 0.3, 1, 3, 10, 20),
                            iso_step_deg=30)
    else:
        plan = pr.full_plan(session, levels=pr.TABLE_LEVELS_V_PER_M[:-2])
    if args.temperatures:
        plan += pr.temperature_plan(session, _temperatures(args.temperatures))
    over = None
    if args.drift_db:
        from meterlink.simulators.scenario import load_scenario
        sens = list(load_scenario("demo").probe.sensitivity_db)
        sens[0] += args.drift_db
        over = {"sensitivity_db": tuple(sens)}
    with LabMeter(seed=args.seed, speed=args.speed, temp_c=session.ambient.temp_c, probe_overrides=over) as lm:
        with MeterLink(lm.port, interval_ms=100) as link:
            bench = MeterBench(lm, link)
            bench.wait_connected()
            with Progress(transient=True, disable=args.json) as prog:
                task = prog.add_task("calibrating", total=len(plan))

                def tick(i, n, st):
                    prog.update(task, completed=i, description=f"{st.procedure} {st.freq_hz / 1e6:g} MHz")
                return pr.run_plan(plan, bench, repeats=args.repeats, progress=tick)


def _scpi_bench(session, args):
    """The same plan on SCPI instruments named in a bench file; the operator places the probe when asked."""
    from meterlink.device.link import MeterLink
    from meterlink.errors import MeterlinkError
    from meterlink.lab import procedures as pr
    from meterlink.lab.scpi_bench import ScpiController, ScpiMeterBench, load_bench

    if args.temperatures:
        raise MeterlinkError("--temperatures: a SCPI bench file names no climatic chamber")
    bench_file = load_bench(args.bench)
    if args.quick:
        plan = pr.full_plan(session, freqs=(3e7, 1e8, 3e8, 1e9, 3e9, 6e9), levels=(0.1, 0.3, 1, 3, 10, 20),
                            iso_step_deg=30)
    else:
        plan = pr.full_plan(session, levels=pr.TABLE_LEVELS_V_PER_M[:-2])

    def place(direction, tilt_deg):
        d = ", ".join(f"{v:+.3f}" for v in direction)
        input(f"place the probe: field along ({d}) in holder axes, tilt {tilt_deg:g} deg; press Enter ")
    done = []     # StepResults as they are taken: saved if an instrument fails part-way
    with ScpiController(bench_file, session.method, place=place) as ctl, \
            MeterLink(bench_file.meter_port, interval_ms=100) as link:
        bench = ScpiMeterBench(ctl, link)
        bench.wait_connected()
        try:
            return pr.run_plan(plan, bench, repeats=args.repeats,
                               progress=lambda i, n, st: done.append(pr.StepResult(st, bench.last_counts)))
        except MeterlinkError as exc:
            raise MeterlinkError(f"{exc}; {_save_partial(args.out, done, len(plan), str(exc))}") from None


def _save_partial(out, done, planned: int, why: str) -> str:
    """Write the steps taken so far (readings CSV, importable with 'lab import') and an event; say where."""
    import datetime as dt
    import json

    from pathlib import Path

    from meterlink.lab import procedures as pr

    d = Path(out)
    try:
        d.mkdir(parents=True, exist_ok=True)
        pr.export_csv(done, d / "partial-readings.csv")
        (d / "partial-event.json").write_text(json.dumps({
            "event": "bench_stopped", "utc": dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds"),
            "reason": why, "steps_measured": len(done), "steps_not_measured": planned - len(done)}) + "\n")
    except OSError as exc:
        return f"{len(done)} of {planned} steps measured, NOT saved ({exc.strerror})"
    return f"{len(done)} of {planned} steps measured, saved in {d / 'partial-readings.csv'}"


def _temperatures(text: str) -> list[float]:
    """'5,15,23' -> [5.0, 15.0, 23.0]; MeterlinkError (one line) on anything else."""
    import math

    from meterlink.errors import MeterlinkError
    try:
        temps = [float(x) for x in text.split(",") if x.strip()]
    except ValueError:
        raise MeterlinkError(f"--temperatures {text!r}: expected degC values separated by commas") from None
    if len(temps) < 2 or not all(math.isfinite(t) and -40.0 <= t <= 85.0 for t in temps):
        raise MeterlinkError(f"--temperatures {text!r}: give two or more values between -40 and 85 degC")
    if max(temps) - min(temps) < 5.0:
        raise MeterlinkError(f"--temperatures {text!r}: span at least 5 degC for a slope")
    return temps


def _fresh_out(out) -> None:
    """An issued certificate is never overwritten: the out folder must not hold one yet."""
    from meterlink.errors import MeterlinkError
    if (out / "certificate.toml").exists():
        raise MeterlinkError(f"{out}: already holds an issued certificate (certificate.toml); certificates are "
                             "never overwritten: choose a new --out folder")


def _budget_table(b):
    from rich.table import Table
    t = Table(title="Uncertainty budget of a calibration factor (JCGM 100:2008)")
    for h in ("component", "value (dB)", "distribution", "divisor", "c", "u (dB)", "note"):
        t.add_column(h)
    for r, n in zip(b.budget.rows, b.notes):
        t.add_row(r.name, f"{r.value:.3f}", r.distribution, f"{r.divisor:.3f}", f"{r.sensitivity:g}",
                  f"{r.u_db:.3f}", n)
    t.add_row("combined u_c", "", "", "", "", f"{b.budget.u_c_db:.3f}", "root sum of squares (5.1.2)")
    t.add_row("expanded U, k = 2", "", "", "", "", f"{b.u_expanded_db:.3f}", "about 95 % (6.2.1)")
    return t


def _factor_table(cal):
    """The calibration factors a technician copies: per frequency, each axis and the total, with U (k = 2)."""
    from rich.table import Table
    fr, u = cal.response, cal.budget.u_expanded_db
    t = Table(title=f"Calibration factors, dB (add to the indicated field level); U = {u:.2f} dB, k = 2, about 95 %",
              title_justify="left")
    t.add_column("frequency", justify="right")
    for a in ("x", "y", "z", "total"):
        t.add_column(f"axis {a}" if a != "total" else "total", justify="right")
    for k, f_hz in enumerate(fr.freq_hz):
        f = f"{f_hz / 1e9:g} GHz" if f_hz >= 1e9 else f"{f_hz / 1e6:g} MHz"
        t.add_row(f, *(f"{v:+.2f}" for v in fr.cf_axes_db[k]), f"{fr.cf_total_db[k]:+.2f}")
    return t


def run(args) -> int:

    from meterlink.reports import digits
    from pathlib import Path

    from rich.console import Console

    from meterlink.physics.certificate import dump_certificate, load_certificate
    from meterlink.cli import SAFETY_LINE
    from meterlink.errors import MeterlinkError
    import dataclasses

    from meterlink.lab import certify, html, procedures as pr, register
    from meterlink.lab.budget import calibration_budget

    console = Console()
    if args.action == "run" and args.procedure == "dipole-af":
        return _dipole_af(args, console)
    if args.action == "run" and args.method != "standard-field":
        from meterlink.errors import MeterlinkError
        raise MeterlinkError(f"--method {args.method} belongs to dipole-af")
    if args.action == "import" and args.af_bench:
        return _dipole_af(args, console, journal_in=args.csv)
    session = _session(args.session)
    if args.action == "budget":
        b = calibration_budget(session, args.type_a_db)
        if args.json:
            print(digits.dumps({"rows": [{"name": r.name, "value_db": r.value, "distribution": r.distribution,
                                        "divisor": r.divisor, "sensitivity": r.sensitivity, "u_db": r.u_db,
                                        "note": n} for r, n in zip(b.budget.rows, b.notes)],
                              "u_c_db": b.budget.u_c_db, "k": b.budget.k, "u_expanded_db": b.u_expanded_db}))
        else:
            console.print(_budget_table(b))
        return 0
    previous = load_certificate(args.previous) if args.previous else None
    out = Path(args.out)
    reg_path = Path(args.register) if args.register else register.default_register(out)
    if args.action == "run":
        if not args.speed > 0 or args.repeats < 2:
            raise MeterlinkError("--speed must be > 0 and --repeats at least 2 (Type A needs repeats)")
        if args.temperatures:
            _temperatures(args.temperatures)   # bad input first, before the folder is looked at
    from meterlink.reports.templating import PDF_HINT, pdf_available, template_dir, write_outputs
    template_dir(args.template_dir)
    if args.pdf and not pdf_available():
        raise MeterlinkError(PDF_HINT)
    _fresh_out(out)
    if args.action == "run":
        results = _scpi_bench(session, args) if args.bench else _simulated(session, args)
    else:
        results = pr.import_csv(args.csv, session)
    # the number is chosen under the register's lock and entered only once the certificate is written
    with register.issue(reg_path, session.probe_serial, out / "certificate.toml", session.certificate_number) as no:
        session = dataclasses.replace(session, certificate_number=no)
        cal = certify.analyse(session, results, previous)
        cmp = certify.compare(cal, previous, results) if previous else None
        _fresh_out(out)
        try:
            out.mkdir(parents=True, exist_ok=True)
            (out / "certificate.toml").write_text(dump_certificate(cal.certificate), encoding="utf-8")
            write_outputs(html.render(cal, cmp, args.template_dir), out / "certificate.html", args.pdf)
            pr.export_csv(results, out / "readings.csv")
        except OSError as exc:
            raise MeterlinkError(f"{out}: cannot write the outputs ({exc.strerror})") from None
    summary = {"certificate": str(out / "certificate.toml"), "report": str(out / "certificate.html"),
               **({"pdf": str(out / "certificate.pdf")} if args.pdf else {}),
               "certificate_number": cal.certificate.certificate_number, "register": str(reg_path),
               "u_expanded_db": cal.budget.u_expanded_db, "isotropy_db": cal.certificate.isotropy_db,
               "isotropy": [{"freq_hz": i.freq_hz, "tilt_deg": i.tilt_deg, "plus_minus_db": i.plus_minus_db,
                             "max_min_db": i.max_min_db} for i in cal.isotropy],
               "linearity_db": cal.certificate.uncertainties[1].value,
               "temperature": None if cal.temperature is None else {
                   "freq_hz": cal.temperature.freq_hz, "temp_c": cal.temperature.temp_c.tolist(),
                   "change_db": cal.temperature.change_db.tolist(),
                   "coeff_db_per_c": cal.temperature.coeff_db_per_c,
                   "u_coeff_db_per_c": cal.temperature.u_coeff_db_per_c},
               "temp_coeff_db_per_c": cal.certificate.temp_coeff_db_per_c,
               "temp_coeff_halfwidth_db_per_c": cal.certificate.temp_coeff_halfwidth_db_per_c,
               "cf_db": {"freq_hz": cal.response.freq_hz.tolist(), "axes": cal.response.cf_axes_db.tolist(),
                         "total": cal.response.cf_total_db.tolist()},
               "as_found": cmp.as_found if cmp else None, "as_left": cmp.as_left if cmp else None,
               "statement": cmp.statement if cmp else None, "notice": cmp.notice if cmp else "",
               "safety": SAFETY_LINE}
    if args.json:
        print(digits.dumps(summary))
    else:
        console.print(_budget_table(cal.budget))
        console.print(_factor_table(cal))
        console.print(f"certificate {cal.certificate.certificate_number}: {summary['certificate']}, report "
                      f"{summary['report']} (entered in the register {reg_path})", markup=False)
        console.print(f"isotropy +/- {cal.certificate.isotropy_db:.2f} dB about the mean; "
                      + "; ".join(f"{i.freq_hz / 1e6:g} MHz: max/min {i.max_min_db:.2f} dB" for i in cal.isotropy),
                      markup=False)
        if cal.temperature is not None:
            console.print(f"temperature coefficient {cal.temperature.coeff_db_per_c:+.4f} dB/degC "
                          f"(u {cal.temperature.u_coeff_db_per_c:.4f}) at {cal.temperature.freq_hz / 1e6:g} MHz, "
                          f"{cal.temperature.temp_c.min():g}..{cal.temperature.temp_c.max():g} degC", markup=False)
        if cmp:
            console.print(cmp.statement, markup=False)
            if cmp.notice:
                console.print(cmp.notice, style="bold red", markup=False)
        console.print(SAFETY_LINE, markup=False)
    return 1 if cmp and cmp.notice else 0


def _dipole_af(args, console, journal_in=None) -> int:
    """lab run dipole-af: the standard-field antenna-factor calibration over SCPI (meterlink.lab.afcal);
    with journal_in (lab import --af-bench), the certificate from a journal's readings instead."""
    import dataclasses
    import datetime as dt
    import json
    from pathlib import Path

    from meterlink.cli import SAFETY_LINE
    from meterlink.errors import MeterlinkError
    from meterlink.lab import afcal, afcal_report, register
    from meterlink.physics.certificate import dump_certificate, load_certificate
    from meterlink.reports.templating import PDF_HINT, pdf_available, template_dir, write_outputs

    if journal_in is None and (args.temperatures or args.drift_db):
        raise MeterlinkError("dipole-af: --temperatures and --drift-db belong to the probe procedures")
    if journal_in is None and args.repeats < 2:
        raise MeterlinkError("--repeats must be at least 2 (Type A needs repeats)")
    substitution = getattr(args, "method", "standard-field") == "substitution" or (
        journal_in is not None and afcal.is_sub_journal(journal_in))     # an imported journal says its method
    session = _session(args.session, "af-sub-session.toml" if substitution else "af-session.toml")
    base = load_certificate(args.previous or "demo-dipole")
    afcal_report.check_base(session, base)
    bench_path = args.af_bench if journal_in is not None else args.bench
    bench = afcal.load_af_bench(bench_path) if bench_path else None
    sub = afcal.load_substitution(bench_path) if substitution and bench_path else None
    if bench is not None:
        afcal.check_plan(bench)
        if sub is not None:
            afcal.check_substitution(bench, sub)
    taken = None
    if journal_in is not None:
        if substitution:
            taken_sub = afcal.read_sub_journal(journal_in)
            taken = afcal.pair_substitution(taken_sub)
        else:
            taken = afcal.read_journal(journal_in)
        freqs = tuple(sorted({r.freq_hz for r in taken}))
        if sum(1 for f in freqs if sum(r.freq_hz == f for r in taken) >= 2) < 2:
            raise MeterlinkError(f"{journal_in}: fewer than two frequencies with two or more repeats; an "
                                 "antenna-factor table needs two or more")
        afcal.check_plan(dataclasses.replace(bench, freq_hz=freqs))   # in the far field and the bench's tables
        if substitution:
            afcal.check_substitution(dataclasses.replace(bench, freq_hz=freqs), sub)
    out = Path(args.out)
    reg_path = Path(args.register) if args.register else register.default_register(out)
    template_dir(args.template_dir)
    if args.pdf and not pdf_available():
        raise MeterlinkError(PDF_HINT)
    _fresh_out(out)
    journal = (afcal.SubJournal if substitution else afcal.Journal)(out / "af-journal.csv")
    rig = None
    try:
        if taken is not None:                  # imported: the readings are copied into the new journal
            if substitution:
                for antenna, r in taken_sub:
                    journal.add(antenna, r)
            else:
                for r in taken:
                    journal.add(r)
            readings = taken
        else:
            if bench is None:                  # the simulated standard-field bench on loopback TCP
                from meterlink.simulators.scpi_afcal import FREQS_HZ, AfRig
                rig = AfRig(seed=args.seed).__enter__()
                try:
                    (out / "simulated-bench.toml").write_text(
                        rig.bench_toml(freqs_hz=(2e8, 1e9, 6e9) if args.quick else FREQS_HZ), encoding="utf-8")
                except OSError as exc:
                    raise MeterlinkError(f"{out}: cannot write simulated-bench.toml ({exc.strerror})") from None
                bench = afcal.load_af_bench(out / "simulated-bench.toml")
                if substitution:
                    sub = afcal.load_substitution(out / "simulated-bench.toml")
            if substitution:
                def swap(phase):
                    if rig is not None:
                        rig.swap(phase)
                    else:
                        what = "the reference antenna" if phase == "reference" else "the antenna under calibration"
                        try:        # the generator's RF is off between the phases
                            input(f"RF is off: mount {what} at the measuring place and press Enter ")
                        except (EOFError, OSError):     # no terminal to answer
                            raise MeterlinkError("--method substitution on a bench asks the operator to swap the "
                                                 "antennas: run it at a terminal") from None
                readings = afcal.run_substitution(bench, sub, journal, swap, repeats=args.repeats)
            else:
                readings = afcal.run(bench, journal, repeats=args.repeats)
    except MeterlinkError as exc:
        planned = len(bench.freq_hz) * getattr(args, "repeats", 0) * (2 if substitution else 1) if bench else 0
        try:
            (out / "partial-event.json").write_text(json.dumps({
                "event": "bench_stopped", "procedure": "dipole-af",
                "utc": dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds"), "reason": str(exc),
                "readings_measured": journal.count, "readings_not_measured": planned - journal.count}) + "\n")
        except OSError:
            pass
        raise MeterlinkError(f"{exc}; {journal.count} of {planned} readings measured, kept in {journal.path}") from None
    finally:
        journal.close()
        if rig is not None:
            rig.__exit__()
    with register.issue(reg_path, session.probe_serial, out / "certificate.toml", session.certificate_number) as no:
        session = dataclasses.replace(session, certificate_number=no)
        cal = (afcal_report.analyse_substitution(session, bench, sub, readings, base) if substitution
               else afcal_report.analyse(session, bench, readings, base))
        _fresh_out(out)
        try:
            (out / "certificate.toml").write_text(dump_certificate(cal.certificate), encoding="utf-8")
            write_outputs(afcal_report.render(cal, args.template_dir), out / "certificate.html", args.pdf)
        except OSError as exc:
            raise MeterlinkError(f"{out}: cannot write the outputs ({exc.strerror})") from None
    summary = {**afcal_report.summary(cal), "certificate": str(out / "certificate.toml"),
               "report": str(out / "certificate.html"), "journal": str(journal.path), "register": str(reg_path),
               "safety": SAFETY_LINE}
    if args.json:
        print(json.dumps(summary))
        return 0
    from rich.table import Table
    t = Table(title=f"Antenna factor, dB(1/m) into 50 ohm; certificate U = {summary['u_antenna_factor_db']:.2f} dB, "
                    "k = 2", title_justify="left")
    for h in ("frequency", "AF", "U (k = 2)", "previous", "change"):
        t.add_column(h, justify="right")
    for p in summary["points"]:
        t.add_row(f"{p['freq_hz'] / 1e6:g} MHz", f"{p['af_db_per_m']:.2f}", f"{p['u_expanded_db']:.2f}",
                  f"{p['previous_af_db_per_m']:.2f}", f"{p['af_db_per_m'] - p['previous_af_db_per_m']:+.2f}")
    console.print(t)
    if cal.left_out_freq_hz:
        console.print("left out (one repeat only): " + ", ".join(f"{f / 1e6:g} MHz" for f in cal.left_out_freq_hz),
                      markup=False)
    console.print(f"certificate {no}: {summary['certificate']}, report {summary['report']} (entered in the register "
                  f"{reg_path}); readings in {journal.path}", markup=False)
    console.print(SAFETY_LINE, markup=False)
    return 0
