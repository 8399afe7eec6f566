"""Survey rows in a meterlink database (tables of schema migration 2, docs/schema.md)."""

from __future__ import annotations

import hashlib
import json
import math
import time
from dataclasses import asdict

from meterlink import __version__
from meterlink.errors import MeterlinkError
from meterlink.storage.store import Store, StorageError
from meterlink.survey.model import PointResult, SurveyPlan
from meterlink.survey.photos import stored_photos


def _num(v):
    return None if v is None or (isinstance(v, float) and not math.isfinite(v)) else v


def create_survey(store: Store, session_id: int, plan: SurveyPlan, cert, ref, sensor: str,
                  gnss_port: str | None = None, declared=None) -> None:
    """Record the plan's fixed choices (standard, tier, rule, certificate) before measuring."""
    from meterlink.physics.certificate import dump_certificate

    sha = hashlib.sha256(dump_certificate(cert).encode()).hexdigest()
    row = {"session_id": session_id, "title": plan.title, "site_json": json.dumps(asdict(plan.site)),
           "standard": plan.standard, "tier": plan.tier, "decision_rule": plan.rule,
           "certificate_name": plan.certificate, "certificate_number": cert.certificate_number,
           "certificate_due": cert.due_date.isoformat() if cert.due_date else None, "certificate_sha256": sha, "sensor": sensor,
           "freq_hz": plan.freq_hz, "band_lo_hz": ref.band_hz[0], "band_hi_hz": ref.band_hz[1],
           "e_ref_v_per_m": ref.e_v_per_m, "e_ref_freq_hz": ref.freq_hz, "averaging_time_s": ref.averaging_time_s,
           "followup_v_per_m": plan.followup.v_per_m, "followup_percent": plan.followup.percent_field,
           "plan_text": plan.source_text, "plan_path": plan.source_path, "created_utc": time.time(),
           "software_version": __version__, "gnss_port": gnss_port,
           "declared_json": None if declared is None else json.dumps(
               {"name": declared.name, "origin": declared.origin, "path": declared.path,
                "ground_factor": declared.ground_factor, "prediction_u_db": plan.prediction_u_db,
                "sources": [asdict(s) for s in declared.sources]})}
    with store.write():
        store.db["survey"].insert(row)
        store.db["survey_sources"].insert_all(
            [{"session_id": session_id, "name": s.name, "freq_hz": s.freq_hz, "technology": s.technology,
              "power_w": s.power_w, "max_power_w": s.max_power_w, "notes": s.notes} for s in plan.sources])


def add_point(store: Store, session_id: int, point_no: int, r: PointResult, trace: list[dict],
              reason: str | None = None) -> int:
    """Store one assessed point with its samples, emitters and reading trace, in one transaction.

    With a reason, the point is a re-measurement: the new capture replaces the current one of that
    point_no (which stays, pointing to it via replaced_by); without one, point_no must be new."""
    p = r.point
    row = {"session_id": session_id, "point_no": point_no, "label": p.label, "mode": p.mode, "scheme": r.scheme,
           "x_m": p.x_m, "y_m": p.y_m, "lat_deg": p.lat_deg, "lon_deg": p.lon_deg, "height_m": p.height_m,
           "notes": p.notes, "near_field": int(p.near_field), "duration_s": r.duration_s,
           "t_start_utc": _num(r.t_start_utc), "t_end_utc": _num(r.t_end_utc), "n_readings": r.n_readings,
           "e_v_per_m": _num(r.e_v_per_m), "e_max_v_per_m": _num(r.e_max_v_per_m),
           "ex_v_per_m": _num(r.axes_v_per_m[0]), "ey_v_per_m": _num(r.axes_v_per_m[1]),
           "ez_v_per_m": _num(r.axes_v_per_m[2]), "u_expanded_db": r.u_expanded_db, "coverage": r.coverage,
           "complete": int(r.complete), "flags": r.flags, "warnings": json.dumps(list(r.warnings)),
           "e_limit_v_per_m": r.e_limit_v_per_m, "percent_field": _num(r.percent_field),
           "percent_power": _num(r.percent_power), "exposure_ratio": _num(r.exposure_ratio),
           "verdict": r.verdict, "statement": r.statement, "followup": int(r.followup),
           "e_extrapolated_v_per_m": _num(r.e_extrapolated_v_per_m),
           "exposure_ratio_extrapolated": _num(r.exposure_ratio_extrapolated),
           "percent_power_extrapolated": _num(r.percent_power_extrapolated),
           "verdict_extrapolated": r.verdict_extrapolated}
    with store.write():
        prev = store.db.execute("SELECT id, capture_no FROM survey_points WHERE session_id = ? AND point_no = ? "
                                "AND replaced_by IS NULL", [session_id, point_no]).fetchone()
        if (prev is None) != (reason is None):
            raise MeterlinkError(f"survey {session_id}: point {point_no} "
                                 + ("has no capture to re-measure" if prev is None else
                                    "is already measured: give the reason to re-measure it"))
        if prev is not None:
            row.update(capture_no=prev[1] + 1, remeasure_reason=reason)
        pid = int(store.db["survey_points"].insert(row).last_pk)
        if prev is not None:
            store.db.execute("UPDATE survey_points SET replaced_by = ? WHERE id = ?", [pid, prev[0]])
        store.db["survey_samples"].insert_all(
            [{"point_id": pid, "sample_no": i, "height_m": s.height_m,
              "x_m": s.position_m[0] if s.position_m else None, "y_m": s.position_m[1] if s.position_m else None,
              "e_v_per_m": _num(s.e_v_per_m), "e_max_v_per_m": _num(s.e_max_v_per_m),
              "u_expanded_db": s.u_expanded_db, "n_readings": s.n_readings, "coverage": s.coverage,
              "t_start_utc": _num(s.t_start_utc), "t_end_utc": _num(s.t_end_utc), **_geo_cols(s.geo)}
             for i, s in enumerate(r.samples)])
        store.db["survey_emitters"].insert_all(
            [{"point_id": pid, "name": m.name, "freq_hz": m.freq_hz, "e_v_per_m": m.e_v_per_m,
              "e_extrapolated_v_per_m": m.e_extrapolated_v_per_m, "ratio": m.ratio, "share": m.share}
             for m in r.emitters])
        store.db["survey_trace"].insert_all([{**_TRACE_GNSS, **t, "session_id": session_id,
                                              "e_v_per_m": _num(t["e_v_per_m"])} for t in trace])
    return pid


#: the GNSS columns of a trace row (schema version 7), NULL for a value without a fix
_TRACE_GNSS = dict.fromkeys(("lat_deg", "lon_deg", "alt_m", "pos_u_m", "fix_utc", "fix_quality", "n_sats", "hdop"))


def _geo_cols(geo) -> dict:
    if geo is None:
        return dict.fromkeys(("lat_deg", "lon_deg", "alt_m", "pos_u_m", "fix_utc", "n_positioned"))
    return {"lat_deg": geo.lat_deg, "lon_deg": geo.lon_deg, "alt_m": geo.alt_m, "pos_u_m": geo.u_m,
            "fix_utc": geo.fix_utc, "n_positioned": geo.n_positioned}


def set_plan_text(store: Store, session_id: int, text: str) -> None:
    """The plan text of an interactive survey, grown by one [[point]] per point measured."""
    with store.write():
        store.db["survey"].update(session_id, {"plan_text": text})


def end_survey(store: Store, session_id: int) -> None:
    with store.write():
        store.db["survey"].update(session_id, {"ended_utc": time.time()})


def load_survey(store: Store, session_id: int) -> dict:
    """The survey row, its sources, points (each with samples and emitters), the captures replaced by
    a re-measurement, the photos kept in the file (point_no -> [(name, data URI)]) and the trace."""
    db = store.db
    with store._lock:
        if "survey" not in db.table_names():
            raise StorageError(f"{str(store.path)!r} holds no surveys")
        rows = list(db["survey"].rows_where("session_id = ?", [session_id]))
        if not rows:
            raise StorageError(f"session {session_id} in {str(store.path)!r} is not a survey")
        sv = rows[0]
        sv["site"] = json.loads(sv["site_json"] or "{}")
        sv["sources"] = list(db["survey_sources"].rows_where("session_id = ?", [session_id], order_by="id"))
        every = list(db["survey_points"].rows_where("session_id = ?", [session_id], order_by="point_no, capture_no"))
        for p in every:
            p["warnings"] = json.loads(p["warnings"] or "[]")
            p["samples"] = list(db["survey_samples"].rows_where("point_id = ?", [p["id"]], order_by="sample_no"))
            p["emitters"] = list(db["survey_emitters"].rows_where("point_id = ?", [p["id"]], order_by="freq_hz"))
        # the current capture of each point; earlier ones stay in the record, with the reason they were replaced
        sv["points"] = [p for p in every if p["replaced_by"] is None]
        by_id = {p["id"]: p for p in every}
        sv["replaced"] = [dict(p, reason=by_id[p["replaced_by"]]["remeasure_reason"],
                               replaced_by_capture=by_id[p["replaced_by"]]["capture_no"])
                          for p in every if p["replaced_by"] is not None]
        sv["photos"] = stored_photos(db, session_id)
        sv["trace"] = list(db["survey_trace"].rows_where("session_id = ?", [session_id], order_by="t_utc, id"))
    from meterlink.survey.selstore import load_points
    sv["selective"] = load_points(store, session_id)
    sv["session"] = store.session(session_id)
    return sv
