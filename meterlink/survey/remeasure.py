"""Re-measure a point of a stored survey, later and over a new connection: the survey's fixed choices
and the point's definition come from the database, so the new capture is made on the same basis;
it replaces the old one in the conclusion and both stay in the record with the reason.
"""

from __future__ import annotations

import hashlib
import math
import tomllib
from pathlib import Path
from typing import Callable

from meterlink.errors import MeterlinkError
from meterlink.survey.model import Point, PointResult, SurveyPlan
from meterlink.survey.plan import _Ctx, _point, load_plan


def find_point(sv: dict, key: str) -> dict:
    """The current capture of the point named by label, or by number; one-line error otherwise."""
    pts = sv["points"]
    hit = [p for p in pts if p["label"] == key] or [p for p in pts if key.strip().isdigit()
                                                     and p["point_no"] == int(key)]
    if not hit:
        known = ", ".join(f"{p['point_no']} {p['label']!r}" for p in pts[:20]) or "none"
        raise MeterlinkError(f"survey {sv['session_id']} has no point {key!r} (points: {known})")
    return hit[0]


def _stored_doc(sv: dict) -> dict:
    try:
        return tomllib.loads(sv.get("plan_text") or "")
    except tomllib.TOMLDecodeError:
        return {}


def stored_plan(sv: dict) -> SurveyPlan:
    """The survey's plan as stored (without its points), or rebuilt from the survey's columns for a
    survey stored without its plan text."""
    doc = _stored_doc(sv)
    if doc.get("survey"):
        doc = {k: v for k, v in doc.items() if k != "point"}
        doc["survey"] = {k: v for k, v in doc["survey"].items() if k != "sources_file"}   # read at the survey
    else:
        ses = sv["session"]
        survey = {"standard": sv["standard"], "tier": sv["tier"], "rule": sv["decision_rule"],
                  "certificate": sv["certificate_name"], "interval_ms": ses["interval_ms"] or 1000}
        if sv["freq_hz"] is not None:
            survey["freq_hz"] = sv["freq_hz"]
        elif ses.get("band_lo_hz") is not None:
            survey["band_hz"] = [ses["band_lo_hz"], ses["band_hi_hz"]]
        for k in ("followup_v_per_m", "followup_percent"):
            if sv[k] is not None:
                survey[k] = sv[k]
        doc = {"survey": survey, "site": {"name": sv["site"].get("name") or "survey"},
               "source": [{k: s[k] for k in ("name", "freq_hz", "technology", "power_w", "max_power_w", "notes")
                           if s[k] not in (None, "")} for s in sv["sources"]]}
    return load_plan(doc, check_photos=False)


def stored_point(sv: dict, row: dict) -> Point:
    """The point as it was defined (the stored plan's entry of that label), else rebuilt from its row."""
    for i, d in enumerate(_stored_doc(sv).get("point", []), 1):
        if isinstance(d, dict) and d.get("label") == row["label"]:
            return _point(_Ctx("stored in the survey"), {k: v for k, v in d.items() if k != "photos"}, i)
    heights = [s["height_m"] for s in row["samples"]]
    return Point(label=row["label"], mode=row["mode"], height_m=row["height_m"], x_m=row["x_m"], y_m=row["y_m"],
                 lat_deg=row["lat_deg"], lon_deg=row["lon_deg"], notes=row["notes"] or "",
                 near_field=bool(row["near_field"]),
                 scheme=None if row["mode"] != "spatial" else _custom(heights))


def _custom(heights):
    from meterlink.survey.spatial import scheme_from
    return scheme_from("custom", None, heights)


def check_basis(sv: dict, plan: SurveyPlan) -> None:
    """The certificate and reference level a re-measurement would use are those fixed with the survey."""
    from meterlink.physics.certificate import dump_certificate, load_certificate
    from meterlink.survey.assess import broadband_reference

    cert = load_certificate(plan.certificate)
    if hashlib.sha256(dump_certificate(cert).encode()).hexdigest() != sv["certificate_sha256"]:
        raise MeterlinkError(f"certificate {plan.certificate!r} is not the one survey {sv['session_id']} was measured "
                             f"with (number {sv['certificate_number']}): its re-measurements need that certificate")
    band = plan.freq_hz if plan.freq_hz is not None else (plan.band_hz or cert.freq_range_hz)
    ref = broadband_reference(plan.standard, plan.tier, band)
    if not math.isclose(ref.e_v_per_m, sv["e_ref_v_per_m"], rel_tol=1e-9):
        raise MeterlinkError(f"survey {sv['session_id']}: the reference level would now be {ref.e_v_per_m:g} V/m, "
                             f"not the {sv['e_ref_v_per_m']:g} V/m it was assessed against")


def prepare(db_path, session_id: int, point: str, reason: str, photos=()) -> tuple[SurveyPlan, Point]:
    """Everything a re-measurement needs, checked before the meter is touched: the survey, the point,
    a reason, the photos and the basis; one-line errors otherwise."""
    from meterlink.storage.store import Store
    from meterlink.survey.photos import read_photo
    from meterlink.survey.store import load_survey

    if not Path(db_path).is_file():
        raise MeterlinkError(f"database {str(db_path)!r} does not exist")
    if not (reason or "").strip():
        raise MeterlinkError("a re-measurement needs its reason (--reason TEXT)")
    with Store(db_path, readonly=True) as store:
        sv = load_survey(store, int(session_id))
    row = find_point(sv, point)
    for f in photos:
        read_photo(f, row["label"])
    plan = stored_plan(sv)
    check_basis(sv, plan)
    import dataclasses
    from meterlink.survey.model import Photo
    kept = tuple(dataclasses.replace(f, path=str(Path(f).resolve())) if isinstance(f, Photo) else str(Path(f).resolve())
                 for f in photos)
    return plan, dataclasses.replace(stored_point(sv, row), photos=kept)


def remeasure(port: str, db_path, session_id: int, point: str, reason: str, *, photos=(), console=None,
              mover: Callable | None = None, ready: Callable | None = None, on_view=None,
              **link_options) -> PointResult:
    """Measure a point of a stored survey again (the meter on port must be the survey's); returns the new
    capture's result."""
    from meterlink.storage.store import Store
    from meterlink.survey.readout import LiveReadout
    from meterlink.survey.run import Survey

    plan, p = prepare(db_path, session_id, point, reason, photos)
    with Store(db_path) as store, LiveReadout(console, on_view) as live:
        def ready_seen(pt, height_m):
            with live.paused():
                ready(pt, height_m)

        with Survey(store, port, plan, mover=mover, on_view=live.update, ready=ready_seen if ready else None,
                    resume=int(session_id), **link_options) as sv:
            res = sv.measure(p, reason=reason.strip())
            live.point_done(res)
            return res
