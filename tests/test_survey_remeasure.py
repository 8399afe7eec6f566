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
