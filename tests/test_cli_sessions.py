"""meterlink sessions: listing what a database holds, and one session's events."""

import json

from meterlink.cli import main
from meterlink.storage.recorder import Recorder
from meterlink.storage.store import Store
from meterlink.simulators.pty_meter import SimulatedMeter


def test_sessions_lists_counts_and_last_verdict_and_events(tmp_path, capsys):
    db = tmp_path / "m.db"
    with SimulatedMeter("demo", sensor="probe", seed=4, speed=100.0, faults={"drop": 0.05}) as sim, Store(db) as store:
        summary = Recorder(store, sim.port, interval_ms=1000, duration_s=60.0, host_timeout_s=30.0,
                           freq_hz=101.8e6).run()
    assert main(["assess", "--db", str(db), "--standard", "icnirp-2020", "--tier", "public", "--json"]) == 0
    outcome = json.loads(capsys.readouterr().out)["outcome"]
    assert main(["sessions", "--db", str(db), "--json"]) == 0
    rows = json.loads(capsys.readouterr().out)
    assert len(rows) == 1
    row = rows[0]
    assert row["readings"] == summary.readings and row["calibrations"] == 1
    assert row["last_outcome"] == outcome and row["probe_serial"] == "EP-4417"
    assert main(["sessions", "--db", str(db), "--events", str(row["id"]), "--kind", "seq_gap", "--json"]) == 0
    gaps = json.loads(capsys.readouterr().out)
    assert gaps and all(e["kind"] == "seq_gap" for e in gaps)       # 5 % of frames dropped on purpose
    assert main(["sessions", "--db", str(db)]) == 0
    text = capsys.readouterr().out
    assert "EP-4417" in text and outcome in text


def test_sessions_bad_input_is_one_line(tmp_path, capsys):
    assert main(["sessions", "--db", str(tmp_path / "none.db")]) == 2
    assert "no database" in capsys.readouterr().err
    db = tmp_path / "e.db"
    Store(db).close()
    assert main(["sessions", "--db", str(db), "--events", "7"]) == 2
    err = capsys.readouterr().err
    assert "no session 7" in err and len(err.strip().splitlines()) == 1


def test_sessions_verify_finds_a_span_index_out_of_step(tmp_path, capsys):
    db = tmp_path / "v.db"
    with Store(db) as s:
        sid = s.begin_session("record")
        s.add_readings(sid, [{"boot": 1, "seq": i, "tick_ms": i * 100, "t_utc": 1.8e9 + i / 10, "raw_x": i,
                              "raw_y": 0, "raw_z": 0, "flags": 0, "range_index": 0} for i in range(50)])
    assert main(["sessions", "--db", str(db), "--verify"]) == 0
    assert "sound" in capsys.readouterr().out
    with Store(db) as s:  # as a program writing readings behind the Store's back would leave it
        s.db.execute("insert into readings (session_id, boot, seq, tick_ms, t_utc, raw_x, raw_y, raw_z) "
                     "values (?, 1, 99, 0, 1.8e9, 0, 0, 0)", [sid])
        s.db.conn.commit()
    assert main(["sessions", "--db", str(db), "--verify", "--json"]) == 1
    out = json.loads(capsys.readouterr().out)
    assert out["sound"] is False and any("51 readings stored, 50 in spans" in p for p in out["problems"])


SURVEY_PLAN = """
[survey]
title = "Listing check survey"
standard = "icnirp-1998"
tier = "public"
rule = "guarded"
certificate = "demo-probe"
settle_s = 1
spot_s = 3

[site]
name = "Test ground"

[[source]]
name = "FM"
freq_hz = 94.3e6
power_w = 5000
max_power_w = 10000

[[point]]
label = "gate"
x_m = 4.0
y_m = -4.0

[[point]]
label = "bench"
x_m = 8.0
y_m = 2.0
"""


def test_sessions_gives_each_survey_the_outcome_its_report_concludes(tmp_path, capsys):
    import shutil
    import sqlite3

    from meterlink.survey.report import conclusion
    from meterlink.survey.run import run_plan
    from meterlink.survey.store import load_survey
    from test_startup import imported

    (tmp_path / "plan.toml").write_text(SURVEY_PLAN, encoding="utf-8")
    db = tmp_path / "s.db"
    with SimulatedMeter("demo", seed=5, speed=100.0) as sim:
        sid = run_plan(sim.port, str(tmp_path / "plan.toml"), db, mover=sim.move_to)

    def listed(path):
        assert main(["sessions", "--db", str(path), "--json"]) == 0
        return next(r for r in json.loads(capsys.readouterr().out) if r["id"] == sid)

    def concluded(path):
        with Store(path, readonly=True) as s:
            return conclusion(load_survey(s, sid))

    # equivalence of two code paths (the listing from stored rows, the report from the loaded survey)
    row, c = listed(db), concluded(db)
    assert row["survey_outcome"] == c["outcome"] and row["survey_outcome"] in ("compliant", "conditional pass")
    assert row["survey_outcome_extrapolated"] == c["outcome_extrapolated"] is not None   # a source with max power
    # one point's stored outcome made the worst: the site takes it, as the report's conclusion does
    worse = tmp_path / "worse.db"
    shutil.copy(db, worse)
    conn = sqlite3.connect(worse)
    conn.execute("UPDATE survey_points SET verdict = 'not compliant' WHERE session_id = ? AND label = 'bench'", (sid,))
    conn.commit()
    conn.close()
    row = listed(worse)
    assert row["survey_outcome"] == "not compliant" == concluded(worse)["outcome"]
    assert main(["sessions", "--db", str(worse)]) == 0
    text = capsys.readouterr().out
    line = next(x for x in text.splitlines() if x.lstrip().startswith(f"{sid}  survey"))
    assert line.rstrip().endswith("not compliant") and "at max power:" in text
    # the listing stays fast on a survey file too: no numpy, no rich
    assert not imported("sessions", "--db", str(worse)) & {"numpy", "scipy", "sqlite_utils", "rich", "matplotlib"}
