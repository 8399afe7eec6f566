"""``meterlink demo``: the whole job on the simulated meter, no hardware needed."""

from __future__ import annotations

HELP = "run the whole job on the simulated meter: record, calibrate, assess, survey and report"

DEFAULT_DIR = "meterlink-demo"


def add_arguments(parser) -> None:
    parser.add_argument("--out", metavar="DIR", default=DEFAULT_DIR,
                        help=f"folder for the database and the report (default ./{DEFAULT_DIR})")
    parser.add_argument("--standard", metavar="NAME", default="icnirp-2020", help="reference levels (default icnirp-2020)")
    parser.add_argument("--tier", choices=("public", "occupational"), default="public", help="tier (default public)")
    parser.add_argument("--rule", metavar="NAME", default="guarded", help="decision rule (default guarded)")
    parser.add_argument("--seed", metavar="N", type=int, default=7, help="simulator seed (default 7)")
    parser.add_argument("--minutes", metavar="M", type=float, default=35.0,
                        help="device minutes to record with each instrument (default 35, longer than the 30-minute "
                             "averaging time of the whole-body levels, so that a full window exists; the simulator runs 200x)")
    parser.add_argument("--json", action="store_true", help="print the results as JSON")


def run(args) -> int:

    from meterlink.reports import digits
    import time
    from pathlib import Path

    from rich.console import Console

    from meterlink.errors import MeterlinkError
    from meterlink.physics.verdict import get_rule

    rule = get_rule(args.rule)
    if not 0.5 <= args.minutes <= 60:
        raise MeterlinkError("--minutes must be between 0.5 and 60")
    out = Path(args.out)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise MeterlinkError(f"cannot create {str(out)!r}: {exc.strerror}") from None
    db = out / "demo.db"
    con = Console(stderr=True) if args.json else Console()
    t_start = time.monotonic()
    results = _run_steps(con, db, out, args, rule.name)
    results["elapsed_s"] = time.monotonic() - t_start
    if args.json:
        print(digits.dumps(results, indent=2, default=float))
    else:
        _print_end(con, results)
    return 0


def _record(sim_kwargs, db, seconds, band, progress, label, position_m=None):
    """Record from a fresh simulated meter into db; returns the RecordSummary."""
    from meterlink.storage.recorder import Recorder
    from meterlink.storage.store import Store
    from meterlink.simulators.pty_meter import SimulatedMeter

    task = progress.add_task(label, total=seconds)

    def on_item(item):
        t = getattr(item, "tick_ms", None)
        if t is not None:
            progress.update(task, completed=min(seconds, (t - first[0]) / 1000.0) if first else 0)
            if not first:
                first.append(t)

    first: list[int] = []
    with SimulatedMeter("demo", speed=200.0, **sim_kwargs) as sim, Store(db) as store:
        if position_m is not None:
            sim.move_to(position_m)
        rec = Recorder(store, sim.port, interval_ms=1000, duration_s=seconds, band_hz=band,
                       notes="meterlink demo at the invented Brannock Tor site", on_item=on_item)
        summary = rec.run()
    progress.update(task, completed=seconds)
    return summary


def _run_steps(con, db, out, args, rule):
    from rich.progress import BarColumn, Progress, TextColumn, TimeElapsedColumn

    from meterlink.physics.assessment import assess_field, assess_spectrum
    from meterlink.storage.processing import calibrated_series
    from meterlink.reports.render import assessment_dict, assessment_renderable, field_summary_renderable
    from meterlink.storage.store import Store

    band = (87.5e6, 3.8e9)   # the operator declares the site's band for the broadband probe
    res = {"database": str(db), "standard": args.standard, "tier": args.tier, "rule": rule}
    con.rule("meterlink demo: Brannock Tor transmitting site (invented), simulated meter")
    # fits 80 columns: a wider line lost its bar and was cut in the elapsed time
    with Progress(TextColumn("{task.description}"), BarColumn(bar_width=10),
                  TextColumn("{task.completed:.0f}/{task.total:.0f} s device"), TimeElapsedColumn(),
                  console=con) as progress:
        probe = _record({"sensor": "probe", "seed": args.seed}, db, args.minutes * 60.0, band, progress,
                        "probe: walking the site")
        # far enough from the mast that the FM carriers stay inside the receiver's calibrated range
        dipole = _record({"sensor": "dipole", "seed": args.seed + 1}, db, args.minutes * 60.0, None, progress,
                         "dipole at the lay-by, 360 m from the mast", position_m=(-300.0, 200.0, 1.5))
    with Store(db) as store:
        fs = calibrated_series(store, probe.session_id, band=band)
        a_probe = assess_field(fs, args.standard, args.tier, rule, band=band)
        ss = calibrated_series(store, dipole.session_id)
        from meterlink.physics.calibrate import floor_e_v_per_m
        from meterlink.physics.certificate import parse_certificate
        dcert = parse_certificate(store.calibrations(dipole.session_id)[-1]["certificate_text"], "stored calibration")
        a_dip = assess_spectrum(ss, args.standard, args.tier, rule, floor_v_per_m=floor_e_v_per_m(dcert, ss.freq_hz))
        for sid, a in ((probe.session_id, a_probe), (dipole.session_id, a_dip)):
            store.add_event(sid, "assessment", "info", a.verdict.statement, outcome=a.verdict.outcome,
                            standard=args.standard, tier=args.tier, rule=rule)
        n_events = {sid: len(store.events(sid)) for sid in (probe.session_id, dipole.session_id)}
    res["sessions"] = []
    for s, a in ((probe, a_probe), (dipole, a_dip)):
        res["sessions"].append({"session_id": s.session_id, "instrument": f"{s.model} {s.serial}",
                                "probe_serial": s.probe_serial, "readings": s.readings, "spectra": s.spectra,
                                "events": n_events[s.session_id], "lost_frames": s.lost_frames,
                                "assessment": assessment_dict(a)})
    if not args.json:
        from rich.markup import escape

        con.print(f"probe session {probe.session_id}: {escape(probe.model)} serial {escape(probe.serial)}, "
                  f"probe {escape(probe.probe_serial)}: {probe.readings} readings, {n_events[probe.session_id]} events")
        con.print(field_summary_renderable(fs, "calibrated field along the walk"))
        from meterlink.reports.render import field_trace

        con.print(field_trace(fs.t_utc, fs.e_v_per_m, a_probe.limit_v_per_m))
        con.print(assessment_renderable(a_probe))
        con.print(f"dipole session {dipole.session_id}: {escape(dipole.model)}, antenna {escape(dipole.probe_serial)}: "
                  f"{dipole.spectra} spectra, {n_events[dipole.session_id]} events")
        con.print(assessment_renderable(a_dip))
    res["survey"] = _survey(con, db, out, args.seed + 2, args.json)
    res["report"] = res["survey"]["report"]
    return res


def _print_end(con, res) -> None:
    from meterlink.cli import SAFETY_LINE

    con.rule("done")
    con.print(f"database: {res['database']}  (try: meterlink assess --db {res['database']} "
              f"--standard fcc-1310 --tier public)")
    if res.get("report"):
        con.print(f"survey report: {res['report']}")
    con.print(f"finished in {res['elapsed_s']:.1f} s.  {SAFETY_LINE}")


#: An emitter the demo's survey scene has and its sources file does not declare (invented: another
#: operator's link mast at the edge of the field by the picnic site of demo-survey-gps.toml).
UNDECLARED = dict(name="Undeclared link mast (invented)", freq_hz=450.0e6, erp_w=300.0,
                  position_m=(-140.0, -120.0, 3.0), polarisation="vertical", technology="link")


def _survey_scenario():
    """The demo scene with one undeclared emitter added, and the pole's carriers at their declared
    busy-hour power (constant), so that measured against predicted shows the undeclared one."""
    import dataclasses

    from meterlink.simulators.scenario import load_scenario
    from meterlink.simulators.scene import Transmitter

    sc = load_scenario("demo")
    extra = Transmitter(**UNDECLARED)

    def scene(sc_):
        txs = tuple(dataclasses.replace(t, profile="constant") for t in sc_.transmitters) + (extra,)
        return dataclasses.replace(sc_, transmitters=txs)

    return dataclasses.replace(sc, meters=tuple(dataclasses.replace(m, scene=scene(m.scene)) for m in sc.meters))


def _survey(con, db, out, seed, quiet):
    """A short scripted survey of the demo site with the simulated GNSS receiver following the probe
    and the declared sources (plan and sources file packaged with the scenarios), and its report."""
    from importlib.resources import files

    from meterlink.planning.sourcefile import load_site
    from meterlink.simulators.gnss import SimulatedGnss
    from meterlink.simulators.pty_meter import SimulatedMeter
    from meterlink.storage.store import Store
    from meterlink.survey import map as smap
    from meterlink.survey import predicted
    from meterlink.survey.plan import load_plan
    from meterlink.survey.report import write_report
    from meterlink.survey.run import run_plan
    from meterlink.survey.store import load_survey

    plan = files("meterlink.simulators.scenarios").joinpath("demo-survey-gps.toml")
    declared = load_site(load_plan(str(plan)).sources_file)
    con.rule("scripted walk-around survey with a GNSS receiver")
    with SimulatedMeter(_survey_scenario(), sensor="probe", seed=seed, speed=100.0) as sim, \
            SimulatedGnss.following(sim) as gnss:
        sid = run_plan(sim.port, str(plan), db, console=None if quiet else con, mover=sim.move_to,
                       gnss_port=gnss.port, declared=declared)
    html = write_report(db, sid, out / "survey-report")
    with Store(db, readonly=True) as st:
        sv = load_survey(st, sid)
    samples = [s for p in sv["points"] for s in p["samples"]]
    checks = predicted.compare(sv, smap.site_frame(sv))
    res = {"session_id": sid, "plan": str(plan), "report": str(html),
           "samples": len(samples), "samples_positioned": sum(s.get("lat_deg") is not None for s in samples),
           "measured_vs_predicted": [{"label": c.label, "e_measured_v_per_m": c.e_measured_v_per_m,
                                      "e_predicted_v_per_m": c.e_predicted_v_per_m, "diff_db": c.diff_db,
                                      "u_combined_db": c.u_combined_db, "flagged": c.flagged,
                                      "reasons": list(c.reasons)} for c in checks]}
    if not quiet:
        from rich.markup import escape

        con.print(f"{res['samples_positioned']} of {res['samples']} samples positioned by the GNSS receiver")
        for c in checks:
            word = "DISAGREE" if c.flagged else "agrees"
            con.print(f"  {escape(c.label)}: measured {c.e_measured_v_per_m:.3g} V/m, predicted "
                      f"{c.e_predicted_v_per_m:.3g} V/m from the declared sources, {c.diff_db:+.1f} dB "
                      f"(combined U {c.u_combined_db:.1f} dB): {word}"
                      + (f"; likely {escape(c.reasons[0])}" if c.flagged and c.reasons else ""))
    return res
