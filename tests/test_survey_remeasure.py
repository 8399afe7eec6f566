"""Re-measuring a survey point: the new capture replaces the old one in the conclusion, both stay in
the record with the reason (schema migration 9); a file of schema 4 is migrated with nothing lost."""

from __future__ import annotations

import dataclasses
import sqlite3

import pytest

from meterlink.errors import MeterlinkError
from meterlink.storage.store import MIGRATIONS, SCHEMA_VERSION, Store
from meterlink.survey.plan import load_plan
from meterlink.survey.report import render_html
from meterlink.survey.run import Survey
from meterlink.survey.store import load_survey
from meterlink.simulators.pty_meter import SimulatedMeter

PLAN = {
    "survey": {"title": "Re-measure check", "standard": "icnirp-1998", "tier": "public", "rule": "guarded",
               "certificate": "demo-probe", "settle_s": 2, "spot_s": 4},
    "site": {"name": "Test ground"},
    "point": [{"label": "gate", "x_m": -60.0, "y_m": 40.0}, {"label": "far", "x_m": -90.0, "y_m": 60.0}],
}


@pytest.fixture(scope="module")
def remeasured(tmp_path_factory):
    db = tmp_path_factory.mktemp("remeasure") / "s.db"
    plan = load_plan(PLAN)
    gate, far = plan.points
    with SimulatedMeter("demo", seed=31, speed=100.0) as sim, Store(db) as store:
        with Survey(store, sim.port, plan, mover=sim.move_to) as sv:
            first = sv.measure(gate)
            sv.measure(far)
            with pytest.raises(MeterlinkError, match="needs its reason"):
                sv.measure(gate, reason=" ")
            # the probe stood at the wrong place: measured again where the plan meant, near the mast
            second = sv.measure(dataclasses.replace(gate, x_m=4.0, y_m=-4.0), reason="probe <b>misplaced</b>")
            sid = sv.session_id
    return db, sid, first, second


def test_both_captures_stay_and_the_new_one_is_current(remeasured):
    db, sid, first, second = remeasured
    assert second.percent_power > first.percent_power        # nearer the mast: a stronger field
    with Store(db, readonly=True) as store:
        sv = load_survey(store, sid)
    gate = [p for p in sv["points"] if p["label"] == "gate"]
    assert len(gate) == 1 and gate[0]["capture_no"] == 2 and gate[0]["percent_power"] == second.percent_power
    assert [p["label"] for p in sv["points"]] == ["gate", "far"]          # point numbers kept
    (old,) = sv["replaced"]
    assert old["capture_no"] == 1 and old["percent_power"] == first.percent_power
    assert old["reason"] == "probe <b>misplaced</b>" and old["replaced_by"] == gate[0]["id"]
    con = sqlite3.connect(db)
    assert con.execute("select count(*) from survey_points where session_id = ?", [sid]).fetchone()[0] == 3
    con.close()


def test_the_report_concludes_on_the_new_capture_and_lists_the_old_with_its_reason(remeasured):
    db, sid, first, second = remeasured
    with Store(db, readonly=True) as store:
        sv = load_survey(store, sid)
    html = render_html(sv, {})
    concl = html[html.index('id="conclusion"'):html.index("</section>")]
    assert f"{second.percent_power:.1f} % of the power-density reference level" in concl
    assert f"{first.percent_power:.1f} %" not in concl
    old = html[html.index("id='remeasured'"):html.index("id='statements'")]
    assert f"<td class=\"n\">{first.percent_power:.1f}</td>" in old
    assert "probe &lt;b&gt;misplaced&lt;/b&gt;" in old and "<b>misplaced</b>" not in html


def test_a_point_not_measured_cannot_be_remeasured(tmp_path):
    plan = load_plan(PLAN)
    with SimulatedMeter("demo", seed=32, speed=100.0) as sim, Store(tmp_path / "s.db") as store:
        with Survey(store, sim.port, plan, mover=sim.move_to) as sv:
            with pytest.raises(MeterlinkError, match="'gate' has not been measured in this survey"):
                sv.measure(plan.points[0], reason="again")


def test_a_schema_4_file_gets_migration_9_with_its_points_as_first_captures(tmp_path):
    import sqlite_utils

    path = tmp_path / "v4.db"
    db = sqlite_utils.Database(sqlite3.connect(path))
    for v in (1, 2, 3, 4):
        MIGRATIONS[v](db)
    db["meta"].upsert({"key": "schema_version", "value": "4"}, pk="key")
    db["sessions"].insert({"id": 1, "kind": "survey", "started_utc": 1.8e9})
    db["survey_points"].insert({"session_id": 1, "point_no": 1, "label": "a", "mode": "spot", "e_v_per_m": 1.5})
    db.conn.commit()
    db.conn.close()
    with Store(path) as store:
        assert store.schema_version == SCHEMA_VERSION  # 9 and every migration before it
        row = store.db["survey_points"].get(1)
        assert (row["capture_no"], row["replaced_by"], row["remeasure_reason"], row["e_v_per_m"]) == (1, None, None, 1.5)
        with pytest.raises(sqlite3.IntegrityError):       # one row per (session, point, capture)
            store.db["survey_points"].insert({"session_id": 1, "point_no": 1, "label": "a", "mode": "spot"})


@pytest.fixture(scope="module")
def stored(tmp_path_factory):
    """A survey stored by run_plan and closed: the one a technician comes back to."""
    tmp = tmp_path_factory.mktemp("cli-remeasure")
    sim = SimulatedMeter("demo", seed=33, speed=100.0)
    with sim:
        from meterlink.survey.run import run_plan
        sid = run_plan(sim.port, PLAN, tmp / "s.db", mover=sim.move_to)
        yield tmp, sid, sim


def test_cli_measures_a_point_of_a_stored_survey_again_with_its_reason_and_photo(stored, capsys):
    import json

    from meterlink.cli import main
    from test_survey_parity import _png

    tmp, sid, sim = stored
    (tmp / "gate.png").write_bytes(_png())
    with Store(tmp / "s.db", readonly=True) as store:
        before = load_survey(store, sid)
    sim.move_to((4.0, -4.0, 1.5))          # the technician stands where the plan meant: near the mast
    assert main(["survey", "--port", sim.port, "--db", str(tmp / "s.db"), "--session", str(sid),
                 "--remeasure", "1", "--reason", "gate <i>misread</i>", "--photo", str(tmp / "gate.png"),
                 "--photo-caption", "gate from the <lane>", "--photo-direction", "180", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["point"]["label"] == "gate" and out["reason"] == "gate <i>misread</i>"
    with Store(tmp / "s.db", readonly=True) as store:
        sv = load_survey(store, sid)
        epochs = store.db.execute("select reason from epochs where session_id = ?", [sid]).fetchall()
        n_epoch = store.db.execute("select count(*) from readings where session_id = ? and epoch != 0",
                                   [sid]).fetchone()[0]
    gate = next(p for p in sv["points"] if p["label"] == "gate")
    (old,) = sv["replaced"]
    assert gate["capture_no"] == 2 and gate["point_no"] == 1 and old["id"] == before["points"][0]["id"]
    assert old["reason"] == "gate <i>misread</i>" and gate["percent_power"] == out["point"]["percent_power"]
    assert gate["percent_power"] > 2 * old["percent_power"]
    assert [p["label"] for p in sv["points"]] == ["gate", "far"] and sv["standard"] == before["standard"]
    # the new capture's readings are in a new epoch of the same session, the earlier ones untouched
    assert ("re-measurement",) in epochs and n_epoch >= gate["n_readings"]
    (photo,) = sv["photos"][1]
    assert photo["name"] == "gate.png" and photo["caption"] == "gate from the <lane>" and photo["direction_deg"] == 180
    html = render_html(sv, {})
    assert "gate.png: gate from the &lt;lane&gt;.\nLooking 180° from north (S)." in html
    assert "gate &lt;i&gt;misread&lt;/i&gt;" in html and "<i>misread</i>" not in html


@pytest.mark.parametrize("args, message", [
    (["--session", "99", "--remeasure", "gate", "--reason", "r"], "session 99"),
    (["--session", "SID", "--remeasure", "gatepost", "--reason", "r"], "has no point 'gatepost' (points: 1 'gate', 2 'far')"),
    (["--session", "SID", "--remeasure", "gate", "--reason", "  "], "needs its reason"),
    (["--session", "SID", "--remeasure", "gate"], "needs its reason"),
    (["--session", "SID", "--reason", "r"], "go with --remeasure POINT"),
    (["--session", "SID", "--remeasure", "gate", "--reason", "r", "--photo", "nowhere.jpg"], "nowhere.jpg"),
    (["--session", "SID", "--remeasure", "gate", "--reason", "r", "--photo", "a.jpg", "--photo-direction", "north"],
     "--photo-direction 'north' is not 0 to 360 degrees from north"),
    (["--session", "SID", "--remeasure", "gate", "--reason", "r", "--photo-caption", "c"], "more --photo-caption"),
])
def test_cli_remeasure_bad_input_is_one_line_before_the_meter(stored, capsys, args, message):
    from meterlink.cli import main

    tmp, sid, _ = stored
    args = [str(sid) if a == "SID" else a for a in args]
    assert main(["survey", "--port", str(tmp / "no-meter"), "--db", str(tmp / "s.db"), *args]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and message in err[0], err


def test_cli_remeasure_with_another_instrument_is_refused_and_changes_nothing(stored, capsys):
    from meterlink.cli import main

    tmp, sid, _ = stored
    with Store(tmp / "s.db", readonly=True) as store:
        before = load_survey(store, sid)
        n_first = store.db.execute("select count(*) from readings where session_id = ? and epoch = 0",
                                   [sid]).fetchone()[0]
    with SimulatedMeter("demo", sensor="dipole", seed=34, speed=100.0) as other:
        assert main(["survey", "--port", other.port, "--db", str(tmp / "s.db"), "--session", str(sid),
                     "--remeasure", "far", "--reason", "r"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and f"is not the one of survey {sid}" in err[0] and "same instrument" in err[0], err
    with Store(tmp / "s.db", readonly=True) as store:
        after = load_survey(store, sid)
    assert [p["id"] for p in after["points"]] == [p["id"] for p in before["points"]]
    assert after["session"]["ended_utc"] == before["session"]["ended_utc"]
    with Store(tmp / "s.db", readonly=True) as store:      # what the other meter sent is kept apart, and said
        (msg,) = store.db.execute("select message from events where session_id = ? and kind = 'remeasure_refused'",
                                  [sid]).fetchone()
        epoch = int(msg.rsplit("epoch ", 1)[1])
        assert store.db.execute("select reason from epochs where id = ? and session_id = ?",
                                [epoch, sid]).fetchone() == ("re-measurement",)
        assert store.db.execute("select count(*) from readings where session_id = ? and epoch = 0",
                                [sid]).fetchone()[0] == n_first
