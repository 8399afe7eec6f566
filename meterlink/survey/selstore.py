"""Frequency-selective points in a meterlink database (tables of schema migration 10, docs/schema.md):
store a measured point with its bands and packed sweeps, load them for the report, and re-evaluate a
stored point with another antenna-factor file (as certificates are re-applied to raw readings)."""

from __future__ import annotations

import hashlib
import json
import math
import time

import numpy as np

from meterlink import __version__
from meterlink.errors import MeterlinkError
from meterlink.storage.store import Store, StorageError


def _num(v):
    return None if v is None or (isinstance(v, float) and not math.isfinite(v)) else v


def cert_identity(cert) -> tuple[str, str]:
    """(certificate text, its SHA-256): the text is stored so that the point can be re-derived."""
    from meterlink.physics.certificate import dump_certificate

    text = dump_certificate(cert)
    return text, hashlib.sha256(text.encode()).hexdigest()


def store_point(store: Store, session_id: int, *, label: str, results, assessed: dict, cert, cert_name: str,
                antenna_mode: str, address: str, idn: str, t_start_utc: float, point_no: int | None = None,
                position: dict | None = None, bands_path: str = "", analyser_level_db: float | None = None,
                journal_path: str = "", complete: bool = True) -> int:
    """One selective point, its bands (assess_point's rows) and every sweep, in one transaction."""
    from meterlink.physics.limits import reference_level

    text, sha = cert_identity(cert)
    bands = assessed["bands"]
    e = np.array([b["e_v_per_m"] for b in bands])
    e_max = np.array([b.get("e_at_max_v_per_m", b["e_v_per_m"]) for b in bands])
    pos = position or {}
    row = {"session_id": session_id, "point_no": point_no, "label": label, "x_m": pos.get("x_m"),
           "y_m": pos.get("y_m"), "height_m": pos.get("height_m"), "lat_deg": pos.get("lat_deg"),
           "lon_deg": pos.get("lon_deg"), "antenna_name": cert_name, "antenna_sha256": sha, "antenna_text": text,
           "antenna_mode": antenna_mode, "cable": f"{cert.model} {cert.serial}: cable loss from certificate "
           f"{cert.certificate_number}", "analyser_address": address, "analyser_idn": idn, "bands_path": bands_path,
           "standard": assessed["standard"], "tier": assessed["tier"], "summation_rule": assessed["summation_rule"],
           "check_status": assessed["check_status"], "total_exposure_ratio": _num(assessed["total_exposure_ratio"]),
           "total_exposure_ratio_at_max": _num(assessed.get("total_exposure_ratio_at_max")),
           "e_total_v_per_m": float(np.sqrt(np.sum(e * e))), "e_total_at_max_v_per_m": float(np.sqrt(np.sum(e_max ** 2))),
           "u_expanded_db": max(b["u_expanded_db"] for b in bands), "analyser_level_db": analyser_level_db,
           "journal_path": journal_path, "t_start_utc": t_start_utc, "t_end_utc": time.time(),
           "complete": int(complete), "software_version": __version__}
    with store.write():
        pid = int(store.db["sel_points"].insert(row).last_pk)
        for i, (r, b) in enumerate(zip(results, bands), 1):
            lim = reference_level(assessed["standard"], assessed["tier"], r.freq_hz).e_v_per_m
            ex = b.get("extrapolation")
            bid = int(store.db["sel_bands"].insert({
                "point_id": pid, "band_no": i, "name": r.name, "technology": r.technology, "freq_hz": r.freq_hz,
                "bandwidth_hz": r.bandwidth_hz, "rbw_hz": r.rbw_hz, "window_lo_hz": r.window_hz[0],
                "window_hi_hz": r.window_hz[1], "p_dbm_json": json.dumps({k: _num(v) for k, v in r.p_dbm.items()}),
                "af_db_per_m": r.af_db_per_m, "cable_loss_db": r.cable_loss_db, "e_v_per_m": _num(r.e_v_per_m),
                "u_expanded_db": r.u_expanded_db, "e_limit_v_per_m": float(lim),
                "percent_field": _num(100.0 * r.e_v_per_m / float(lim)), "exposure_ratio": _num(b["exposure_ratio"]),
                "share": _num(b["share"]), "extrapolation_json": json.dumps(ex) if ex else None,
                "power_factor": ex["power_factor"] if ex else None,
                "e_at_max_v_per_m": _num(b.get("e_at_max_v_per_m")),
                "exposure_ratio_at_max": _num(b.get("exposure_ratio_at_max"))}).last_pk)
            store.db["sel_traces"].insert_all(
                [{"band_id": bid, "orientation": axis, "start_hz": t.start_hz, "stop_hz": t.stop_hz,
                  "n": int(t.level_dbm.size), "rbw_hz": t.rbw_hz, "detector": t.detector,
                  "sweep_time_s": t.sweep_time_s, "level_dbm": np.asarray(t.level_dbm, "<f4").tobytes(),
                  "t_utc": t.t_utc} for axis, t in r.traces.items()])
    return pid


def load_points(store: Store, session_id: int) -> list[dict]:
    """The selective points of a session, each with its bands (extrapolation decoded), in point order."""
    db = store.db
    with store._lock:
        if "sel_points" not in db.table_names():
            return []
        pts = list(db["sel_points"].rows_where("session_id = ?", [session_id], order_by="point_no, id"))
        for p in pts:
            p["bands"] = list(db["sel_bands"].rows_where("point_id = ?", [p["id"]], order_by="band_no"))
            for b in p["bands"]:
                b["extrapolation"] = json.loads(b["extrapolation_json"]) if b["extrapolation_json"] else None
    return pts


def reevaluate(store: Store, point_id: int, cert, cert_name: str | None = None) -> list[dict]:
    """Each band of a stored point computed again from its stored sweeps with another antenna certificate
    (its antenna factor and cable loss at the band centre): channel power per orientation, field, orientations
    combined. Per band: name, e_stored_v_per_m, e_v_per_m (new), af and cable of both certificates."""
    from meterlink.physics.calibrate import af_db_per_m, cable_loss_db
    from meterlink.physics.selective import channel_power_w, combine_orientations, e_from_input_power_v_per_m

    db = store.db
    with store._lock:
        if "sel_points" not in db.table_names() or not db["sel_points"].count_where("id = ?", [point_id]):
            raise StorageError(f"{str(store.path)!r} holds no selective point {point_id}")
        bands = list(db["sel_bands"].rows_where("point_id = ?", [point_id], order_by="band_no"))
        traces = {b["id"]: list(db["sel_traces"].rows_where("band_id = ?", [b["id"]], order_by="id")) for b in bands}
    from meterlink.survey.selective import check_bands_in_range

    check_bands_in_range(bands, cert, cert_name or cert.certificate_number)
    out = []
    for b in bands:
        if not traces[b["id"]]:
            raise MeterlinkError(f"selective point {point_id}, band {b['name']!r}: no stored sweep to re-evaluate")
        af, cl = float(af_db_per_m(cert, b["freq_hz"])), float(cable_loss_db(cert, b["freq_hz"]))
        e_axes = []
        for t in traces[b["id"]]:
            lv = np.frombuffer(t["level_dbm"], dtype="<f4").astype(float)
            if lv.size != t["n"]:
                raise MeterlinkError(f"selective point {point_id}, band {b['name']!r}: stored sweep has {lv.size} "
                                     f"levels, not {t['n']}")
            f = np.linspace(t["start_hz"], t["stop_hz"], t["n"])
            p_w = channel_power_w(f, lv, t["rbw_hz"], b["window_lo_hz"], b["window_hi_hz"])
            e_axes.append(float(e_from_input_power_v_per_m(p_w, af, cl)))
        out.append({"name": b["name"], "freq_hz": b["freq_hz"], "e_stored_v_per_m": b["e_v_per_m"],
                    "e_v_per_m": float(combine_orientations(e_axes)), "af_stored_db_per_m": b["af_db_per_m"],
                    "cable_stored_db": b["cable_loss_db"], "af_db_per_m": af, "cable_loss_db": cl})
    return out
