"""Surveys with a GNSS receiver: the simulated meter and the simulated receiver each on a real pty
(pyserial), accelerated clock. Every sample is positioned where the probe was; a receiver that
sends garbage, loses its fix or vanishes leaves the survey going, without positions, and says so."""

import json
import sqlite3

import pytest

from meterlink.device.gnss import to_local_m
from meterlink.simulators.gnss import DEMO_ORIGIN, SimulatedGnss
from meterlink.simulators.pty_meter import SimulatedMeter
from meterlink.survey.run import run_plan

SPEED = 100.0
LAT0, LON0, ALT0 = DEMO_ORIGIN

PLAN = {
    "survey": {"standard": "icnirp-1998", "tier": "public", "rule": "guarded", "certificate": "demo-probe",
               "settle_s": 2, "spot_s": 5},
    "site": {"name": "Brannock Tor transmitting site", "latitude_deg": LAT0, "longitude_deg": LON0},
    "point": [
        {"label": "gate", "x_m": -60, "y_m": 40, "mode": "spot"},
        {"label": "mast foot", "x_m": 4, "y_m": -4, "mode": "spatial", "scheme": "three-heights"},
        {"label": "bench", "x_m": 26, "y_m": -14, "mode": "spot"},
        {"label": "fence", "x_m": -8, "y_m": 6, "mode": "sweep", "duration_s": 20,
         "walk_m": [[-8, 6], [4, -4], [26, -14]]},
    ],
}


def rows(db, sql, *args):
    con = sqlite3.connect(db)
    con.row_factory = sqlite3.Row
    try:
        return [dict(r) for r in con.execute(sql, args)]
    finally:
        con.close()


def _truth_error_m(sim, row):
    """Horizontal distance (m) between a trace row's position and where the simulated probe was at
    that reading's device time, and the truth's height."""
    t_s = sim.sim_time_of_tick(round(row["t_device_s"] * 1000))
    tx, ty, tz = sim.probe_position_at(t_s)
    x, y = to_local_m(row["lat_deg"], row["lon_deg"], LAT0, LON0)
    return float(((float(x) - tx) ** 2 + (float(y) - ty) ** 2) ** 0.5), tz


def test_every_reading_positioned_where_the_probe_was_at_its_time(tmp_path):
    # Positions are matched to readings by time: the receiver's fixes carry their UTC, the readings
    # theirs (the meter's clock), and each reading gets the position interpolated at its own time.
    # The truth is where the simulator's probe was at each reading's device time. A slower clock
    # (25x) than the other tests keeps the host's scheduling delays small in device seconds, and
    # readings every 0.2 s make the walked track a fine staircase.
    db = tmp_path / "s.db"
    plan = {**PLAN, "survey": {**PLAN["survey"], "settle_s": 3, "interval_ms": 200}}
    with SimulatedMeter("demo", seed=1, speed=25.0) as sim, SimulatedGnss.following(sim) as gnss:
        sid = run_plan(sim.port, plan, db, mover=sim.move_to, gnss_port=gnss.port)
    samples = rows(db, "select s.*, p.label, p.mode from survey_samples s join survey_points p on p.id = s.point_id")
    assert len(samples) == 6                      # 1 + 3 heights + 1 + 1
    trace = rows(db, "select * from survey_trace where session_id = ? and used = 1", sid)
    assert trace and all(t["lat_deg"] is not None for t in trace)
    sweep_err = []
    for t in trace:
        # the stated accuracy: HDOP 0.9 x 5 m for the simulator's fixes, grown by the time to the
        # nearer fix (2 m/s) and the timing spread; never below the fixes' own 4.5 m
        assert t["pos_u_m"] >= 0.9 * 5.0 - 1e-9
        err, tz = _truth_error_m(sim, t)
        assert err <= 2 * t["pos_u_m"], t          # within twice the stated 1-sigma accuracy
        if t["point_no"] == 4:
            sweep_err.append(err)
        else:                                       # standing still: the fixes all say the same place
            assert err <= 0.05, t                   # minutes to 5 decimals: under 2 cm
            assert t["alt_m"] == pytest.approx(ALT0 + tz, abs=0.06)   # altitude printed to 0.1 m
    # walking 2 m/s with readings every 0.2 s: the probe moves in 0.4 m steps, and the fixes (1 Hz)
    # interpolated at each reading's time follow that staircase to within a step or so; a position
    # taken from the latest fix when the host handles the reading lags by up to a fix interval (2 m)
    assert len(sweep_err) >= 95 and sorted(sweep_err)[len(sweep_err) // 2] <= 0.6
    for s in samples:
        assert s["n_positioned"] == s["n_readings"] > 0, s
        if s["mode"] != "sweep":
            x, y = to_local_m(s["lat_deg"], s["lon_deg"], LAT0, LON0)
            assert float(x) == pytest.approx(s["x_m"], abs=0.05) and float(y) == pytest.approx(s["y_m"], abs=0.05)
            assert 4.5 - 1e-9 <= s["pos_u_m"] <= (4.5 ** 2 + (2.0 * 0.5) ** 2 + 0.5 ** 2) ** 0.5
    fix_t = [s["fix_utc"] for s in samples]
    assert fix_t == sorted(fix_t) and len(set(fix_t)) == len(fix_t)   # each sample its own, later time
    assert rows(db, "select gnss_port from survey")[0]["gnss_port"] == gnss.port
    ev = rows(db, "select * from events where session_id = ? and kind = 'gnss_summary'", sid)
    assert len(ev) == 1
    summ = json.loads(ev[0]["detail"])
    assert summ["unpositioned"] == 0 and summ["offset_n"] >= 10 and summ["offset_spread_s"] is not None


@pytest.mark.parametrize("fault, expect", [
    ("garbage", "gnss_bad_sentences"), ("no_fix", "gnss_no_fix"), ("vanish", "gnss_lost")])
def test_receiver_failing_mid_survey_loses_no_measurement(tmp_path, fault, expect):
    db = tmp_path / "f.db"
    # a reading farther than 1 s (GNSS time) from any fix gets no position: the settle of 6 s puts
    # every used reading of the second point past the last good fix
    plan = {**PLAN, "survey": {**PLAN["survey"], "settle_s": 6},
            "point": PLAN["point"][:1] + PLAN["point"][2:3]}
    with SimulatedMeter("demo", seed=3, speed=SPEED) as sim, SimulatedGnss.following(sim) as gnss:
        def on_view(v):     # the fault starts as the probe is placed at the second point
            if v.label == "bench" and not gnss.sent["vanished"] and not (gnss.garbage or gnss.no_fix):
                gnss.vanish() if fault == "vanish" else setattr(gnss, fault, True)
        sid = run_plan(sim.port, plan, db, mover=sim.move_to, gnss_port=gnss.port, on_view=on_view)
    pts = rows(db, "select * from survey_points where session_id = ? order by point_no", sid)
    assert [p["label"] for p in pts] == ["gate", "bench"] and all(p["complete"] for p in pts)
    samples = rows(db, "select * from survey_samples order by id")
    assert samples[0]["n_positioned"] == samples[0]["n_readings"]          # before the fault
    assert samples[1]["lat_deg"] is None and samples[1]["n_positioned"] is None   # after it: no position
    assert any("without a position" in w for w in json.loads(pts[1]["warnings"]))
    # nothing measured is lost: every trace value is a stored reading, the second point has its readings
    n_read = rows(db, "select count(*) n from readings where session_id = ?", sid)[0]["n"]
    n_trace = rows(db, "select count(*) n from survey_trace where session_id = ?", sid)[0]["n"]
    assert n_read >= n_trace and pts[1]["n_readings"] >= 5
    kinds = [e["kind"] for e in rows(db, "select kind from events where session_id = ?", sid)]
    assert expect in kinds
    summ = json.loads(rows(db, "select detail from events where kind = 'gnss_summary'")[0]["detail"])
    unpos = rows(db, "select count(*) n from survey_trace where session_id = ? and lat_deg is null", sid)[0]["n"]
    assert summ["unpositioned"] == unpos > 0 and summ["positioned"] == n_trace - unpos
    if expect == "gnss_bad_sentences":
        assert summ["bad_checksum"] > 0


def test_cli_survey_with_simulated_gps_and_bad_gps_port(tmp_path):
    import subprocess
    import sys

    sim = subprocess.Popen([sys.executable, "-m", "meterlink", "simulate", "--speed", "100", "--gps"],
                           stdout=subprocess.PIPE, text=True)
    try:
        meter_port, gnss_port = sim.stdout.readline().strip(), sim.stdout.readline().strip()
        plan = tmp_path / "plan.toml"
        plan.write_text('[survey]\nstandard = "icnirp-1998"\nrule = "guarded"\ncertificate = "demo-probe"\n'
                        'spot_s = 3\nsettle_s = 1\n[site]\nname = "Brannock Tor (invented)"\n'
                        '[[point]]\nlabel = "walk-in"\n', encoding="utf-8")
        db = tmp_path / "c.db"
        bad = subprocess.run([sys.executable, "-m", "meterlink", "survey", "--port", meter_port, "--plan", str(plan),
                              "--db", str(db), "--gps", str(tmp_path / "no-receiver"), "--json"],
                             capture_output=True, text=True, timeout=60)
        assert bad.returncode == 2 and "Traceback" not in bad.stderr
        assert len(bad.stderr.strip().splitlines()) == 1 and "GNSS receiver" in bad.stderr
        ok = subprocess.run([sys.executable, "-m", "meterlink", "survey", "--port", meter_port, "--plan", str(plan),
                             "--db", str(db), "--gps", gnss_port, "--json"], capture_output=True, text=True, timeout=120)
        assert ok.returncode == 0, ok.stderr
    finally:
        sim.terminate()
        sim.wait(10)
        sim.stdout.close()
    s = rows(db, "select * from survey_samples")
    assert len(s) == 1 and s[0]["n_positioned"] == s[0]["n_readings"] >= 3 and s[0]["lat_deg"] is not None


def test_missing_sources_file_is_refused_before_the_meter_is_touched(tmp_path):
    import subprocess
    import sys

    plan = tmp_path / "plan.toml"
    plan.write_text('[survey]\nstandard = "icnirp-1998"\nrule = "guarded"\ncertificate = "demo-probe"\n'
                    'sources_file = "absent-sources.toml"\n[site]\nname = "Brannock Tor (invented)"\n'
                    '[[point]]\nlabel = "walk-in"\n', encoding="utf-8")
    r = subprocess.run([sys.executable, "-m", "meterlink", "survey", "--port", str(tmp_path / "no-meter"),
                        "--plan", str(plan), "--db", str(tmp_path / "x.db"), "--json"],
                       capture_output=True, text=True, timeout=60)
    assert r.returncode == 2 and "Traceback" not in r.stderr and len(r.stderr.strip().splitlines()) == 1
    assert "absent-sources.toml" in r.stderr and not (tmp_path / "x.db").exists()


def _sweep_survey(tmp_path, name, delay_s, declared_s):
    """A sweep walked at about 2 m/s with a receiver that sends each fix delay_s (device s) after its
    epoch; declared_s is the plan's gnss_output_delay_s (None: not declared). The sweep's trace rows'
    horizontal errors against the truth, the rows, and the gnss_summary event's detail."""
    db = tmp_path / f"{name}.db"
    survey = {**PLAN["survey"], "settle_s": 3, "interval_ms": 200}
    if declared_s is not None:
        survey["gnss_output_delay_s"] = declared_s
    plan = {**PLAN, "survey": survey, "point": [PLAN["point"][3]]}
    with SimulatedMeter("demo", seed=1, speed=25.0) as sim, \
            SimulatedGnss.following(sim, output_delay_s=delay_s) as gnss:
        sid = run_plan(sim.port, plan, db, mover=sim.move_to, gnss_port=gnss.port)
        trace = rows(db, "select * from survey_trace where session_id = ? and used = 1", sid)
        errs = [_truth_error_m(sim, t)[0] for t in trace]
    ev = rows(db, "select detail from events where session_id = ? and kind = 'gnss_summary'", sid)
    return db, sid, errs, trace, json.loads(ev[0]["detail"])


def test_a_declared_receiver_output_delay_is_taken_out_and_an_undeclared_one_biases_positions(tmp_path):
    # The simulated receiver sends every fix 1 s (device time) after its epoch, as a real one does some
    # 50-500 ms after (receiver-dependent; 1 s here so that the lag, 2 m, stands well clear of the
    # scatter of the accelerated timing). The truth is where the probe was at each reading's device
    # time; the carrier walks the fence at about 2 m/s (39.8 m in 20 s).
    delay = 1.0
    db, sid, errs, trace, summ = _sweep_survey(tmp_path, "declared", delay, delay)
    assert len(errs) >= 95 and sorted(errs)[len(errs) // 2] <= 0.6         # as with a receiver without delay
    assert all(e <= 2 * t["pos_u_m"] for e, t in zip(errs, trace))        # within the stated accuracy
    assert summ["output_delay_s"] == delay and summ["output_delay_from"] == "plan"
    _, _, errs_u, _, summ_u = _sweep_survey(tmp_path, "undeclared", delay, None)
    # undeclared, the delay is taken for clock offset: each position is the one 1 s before, some 2 m back
    assert summ_u["output_delay_s"] is None
    median_u = sorted(errs_u)[len(errs_u) // 2]
    assert median_u >= 1.2 and median_u == pytest.approx(2.0 * delay, abs=0.5)
    # the report's positions note says how readings were matched in time, with the declared delay
    from meterlink.survey.report import write_report

    html = write_report(db, sid, tmp_path / "rep").read_text(encoding="utf-8")
    assert "output delay (from a fix&#39;s epoch to its sentences) was declared as 1.000 s" in html


def test_a_bad_output_delay_is_one_line(tmp_path, capsys):
    from meterlink.cli import main
    from meterlink.survey.plan import PlanError, load_plan

    with pytest.raises(PlanError, match=r"gnss_output_delay_s = 3 must be at least 0 and at most 2") as exc:
        load_plan({**PLAN, "survey": {**PLAN["survey"], "gnss_output_delay_s": 3}})
    assert "\n" not in str(exc.value)
    for value, says in (("-0.1", "is not a number of seconds from 0 to 2"), ("soon", "is not a number of seconds")):
        rc = main(["survey", "--port", "/dev/null", "--gps", "/dev/null", "--gps-output-delay", value,
                   "--db", str(tmp_path / "x.db"), "--plan", "none.toml"])
        err = capsys.readouterr().err
        assert rc == 2 and says in err and len(err.strip().splitlines()) == 1
    rc = main(["survey", "--port", "/dev/null", "--gps-output-delay", "0.2", "--db", str(tmp_path / "x.db")])
    assert rc == 2 and "goes with --gps" in capsys.readouterr().err
    assert not (tmp_path / "x.db").exists()
