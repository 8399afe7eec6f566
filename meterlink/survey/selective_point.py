"""A survey's frequency-selective point: measured over the analyser by meterlink.survey.selective, judged by
the standard's summation rule under the plan's decision rule, and stored twice over: as a survey point (so the
conclusion, tables and exports count it like any other) and in full in the sel_* tables (meterlink.survey.selstore).
"""

from __future__ import annotations

import datetime
import time

import numpy as np

from meterlink.errors import MeterlinkError
from meterlink.survey import store as sstore
from meterlink.survey.model import Emitter, Point, PointResult, SurveyPlan


def antenna_certificate(name: str):
    """The antenna certificate (meterlink-cert/1, kind dipole-receiver) or a one-line error."""
    from meterlink.physics.certificate import DipoleCertificate, load_certificate

    cert = load_certificate(name)
    if not isinstance(cert, DipoleCertificate):
        raise MeterlinkError(f"antenna certificate {name!r}: not an antenna (dipole-receiver) certificate")
    return cert


def point_result(plan: SurveyPlan, p: Point, assessed: dict, ref, warnings=(), t_start_utc: float = 0.0,
                 t_end_utc: float = 0.0) -> PointResult:
    """The survey-point view of an assessed selective point: total field, summation-rule total and its verdict
    under the plan's decision rule, measured and at maximum (where factors were declared), each band an emitter."""
    from meterlink.physics.verdict import decide_ratio

    bands = assessed["bands"]
    e = np.array([b["e_v_per_m"] for b in bands])
    e_x = np.array([b.get("e_at_max_v_per_m", b["e_v_per_m"]) for b in bands])
    u = max(b["u_expanded_db"] for b in bands)
    u_x = max(b.get("u_at_max_db", b["u_expanded_db"]) for b in bands)   # a declared pilot carries its own
    ratio = float(assessed["total_exposure_ratio"])
    ratio_x = float(assessed.get("total_exposure_ratio_at_max", ratio))
    ver, ver_x = decide_ratio(ratio, u, plan.rule), decide_ratio(ratio_x, u_x, plan.rule)
    ems = tuple(Emitter(b["name"], float(b["freq_hz"]), float(b["e_v_per_m"]),
                        float(b.get("e_at_max_v_per_m", b["e_v_per_m"])), float(b["exposure_ratio"]), float(b["share"]))
                for b in bands)
    nan = float("nan")
    return PointResult(
        point=p, scheme="selective", e_v_per_m=float(np.sqrt(np.sum(e * e))), e_max_v_per_m=float(np.sqrt(np.sum(e * e))),
        axes_v_per_m=(nan, nan, nan), u_expanded_db=float(u), n_readings=0, coverage=1.0, complete=True, flags=0,
        warnings=tuple(warnings) + tuple(assessed["messages"]), samples=(), e_limit_v_per_m=ref.e_v_per_m,
        percent_field=float(ver.percent_field), percent_power=float(ver.percent_power), verdict=ver.outcome,
        statement=ver.statement, followup=False, e_extrapolated_v_per_m=float(np.sqrt(np.sum(e_x * e_x))),
        percent_power_extrapolated=float(ver_x.percent_power), verdict_extrapolated=ver_x.outcome,
        exposure_ratio=ratio, exposure_ratio_extrapolated=ratio_x, emitters=ems, t_start_utc=t_start_utc,
        t_end_utc=t_end_utc, duration_s=t_end_utc - t_start_utc)


def measure_selective_point(store, session_id: int, point_no: int, plan: SurveyPlan, p: Point, address: str,
                            journal_path, ref, *, orient=None, timeout_s: float = 5.0) -> PointResult:
    """Sweep the point's bands over the analyser at address, then assess and store it; the journal gets every
    band as measured (and an event with exact counts if the analyser is lost, before the error is raised)."""
    from meterlink.instruments.analyzer import SpectrumAnalyzer
    from meterlink.instruments.session import open_session
    from meterlink.physics.certificate import certificate_status
    from meterlink.physics.selective import ChainSpec
    from meterlink.survey.selective import (Journal, assess_point, check_bands_in_range, check_extrapolation, load_bands,
                                           measure_point)
    from meterlink.survey.selstore import store_point

    spec = p.selective
    bands = load_bands(spec.bands_path)
    factors = check_extrapolation({k: dict(v) for k, v in spec.extrapolation}, bands)
    cert = antenna_certificate(spec.antenna_cert)
    check_bands_in_range(bands, cert, spec.antenna_cert)
    if spec.antenna == "three" and orient is None:
        raise MeterlinkError(f"point {p.label!r}: antenna \"three\" needs someone to turn the antenna; "
                             "run the survey at a terminal")
    t0 = time.time()
    journal = Journal(journal_path)
    try:
        with open_session(address, timeout_s=timeout_s) as s:
            idn = s.idn
            journal.write({"event": "analyser", "address": address, "idn": idn, "label": p.label,
                           "survey_session": session_id, "point_no": point_no})
            res = measure_point(SpectrumAnalyzer(s), bands, cert, antenna=spec.antenna, orient=orient,
                                chain=ChainSpec(analyser_level_db=spec.analyser_level_db),
                                sweep_time_s=spec.sweep_time_s, journal=journal)
        assessed = assess_point(res, plan.standard, plan.tier, factors)
        journal.write({"event": "result", **{k: v for k, v in assessed.items() if k != "bands"}})
    finally:
        journal.close()
    warn = list(certificate_status(cert, datetime.date.today()))
    result = point_result(plan, p, assessed, ref, warn, t0, time.time())
    pos = {"x_m": p.x_m, "y_m": p.y_m, "height_m": p.height_m, "lat_deg": p.lat_deg, "lon_deg": p.lon_deg}
    store_point(store, session_id, label=p.label, results=res, assessed=assessed, cert=cert,
                cert_name=spec.antenna_cert, antenna_mode=spec.antenna, address=address, idn=idn, t_start_utc=t0,
                point_no=point_no, position=pos, bands_path=spec.bands_path, analyser_level_db=spec.analyser_level_db,
                journal_path=str(journal_path))
    sstore.add_point(store, session_id, point_no, result, [])
    return result
