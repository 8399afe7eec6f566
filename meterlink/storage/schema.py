"""The database schema as migrations: version -> the function that brings a file up to it (docs/schema.md).

Each migration runs in one transaction when a file is opened (meterlink.storage.store.Store); a file
records its version in ``meta``. A migration is never edited once released: a change is a new one.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Callable

if TYPE_CHECKING:      # annotations only: the version constants below are read by lean listing commands
    import sqlite_utils

APP_ID = "meterlink"
SCHEMA_VERSION = 13


def _schema_v1(db: sqlite_utils.Database) -> None:
    db["meta"].create({"key": str, "value": str}, pk="key")
    db["meta"].insert({"key": "app", "value": APP_ID})
    db["devices"].create({"id": int, "model": str, "serial": str, "probe_serial": str, "cert_ref": str,
                          "sensor_kind": int, "fw_version": str, "protocol_version": str,
                          "first_seen_utc": float}, pk="id")
    db["devices"].create_index(["model", "serial", "probe_serial", "cert_ref", "sensor_kind", "fw_version",
                                "protocol_version"], unique=True)
    db["sessions"].create({"id": int, "kind": str, "device_id": int, "port": str, "started_utc": float,
                           "ended_utc": float, "interval_ms": int, "freq_hz": float, "band_lo_hz": float,
                           "band_hi_hz": float, "clock_boot": int, "clock_tick0_ms": int,
                           "clock_utc0_s": float, "clock_rate_ratio": float, "software_version": str,
                           "notes": str}, pk="id", foreign_keys=[("device_id", "devices", "id")],
                          not_null=["kind", "started_utc"])
    db["readings"].create({"id": int, "session_id": int, "boot": int, "seq": int, "tick_ms": int,
                           "t_utc": float, "raw_x": int, "raw_y": int, "raw_z": int, "flags": int,
                           "range_index": int}, pk="id", foreign_keys=[("session_id", "sessions", "id")],
                          not_null=["session_id", "boot", "seq", "tick_ms", "t_utc", "raw_x", "raw_y", "raw_z"])
    db["readings"].create_index(["session_id", "boot", "seq"], unique=True)
    db["readings"].create_index(["session_id", "t_utc"])
    db["spectra"].create({"id": int, "session_id": int, "boot": int, "seq": int, "tick_ms": int,
                          "t_utc": float, "orientation": int, "sweep": int}, pk="id",
                         foreign_keys=[("session_id", "sessions", "id")], not_null=["session_id", "boot", "seq"])
    db["spectra"].create_index(["session_id", "boot", "seq"], unique=True)
    db["spectra"].create_index(["session_id", "t_utc"])
    db["spectrum_lines"].create({"id": int, "spectrum_id": int, "freq_hz": float, "level_dbuv": float},
                                pk="id", foreign_keys=[("spectrum_id", "spectra", "id")])
    db["spectrum_lines"].create_index(["spectrum_id"])
    db["status"].create({"id": int, "session_id": int, "boot": int, "seq": int, "tick_ms": int,
                         "t_utc": float, "battery_mv": int, "battery_pct": int, "temperature_degc": float,
                         "flags": int, "interval_ms": int}, pk="id",
                        foreign_keys=[("session_id", "sessions", "id")])
    db["status"].create_index(["session_id", "t_utc"])
    db["events"].create({"id": int, "session_id": int, "t_utc": float, "kind": str, "severity": str,
                         "message": str, "detail": str}, pk="id",
                        foreign_keys=[("session_id", "sessions", "id")], not_null=["kind", "severity", "t_utc"])
    db["events"].create_index(["session_id", "t_utc"])
    db["events"].create_index(["session_id", "kind"])
    db["calibrations"].create({"id": int, "session_id": int, "certificate_name": str,
                               "certificate_sha256": str, "certificate_text": str, "applied_utc": float,
                               "freq_hz": float, "band_lo_hz": float, "band_hi_hz": float,
                               "software_version": str}, pk="id",
                              foreign_keys=[("session_id", "sessions", "id")])
    db["field_values"].create({"reading_id": int, "calibration_id": int, "e_v_per_m": float,
                               "ex_v_per_m": float, "ey_v_per_m": float, "ez_v_per_m": float,
                               "h_a_per_m": float, "s_w_per_m2": float, "u_expanded_db": float, "flags": int},
                              pk=("reading_id", "calibration_id"),
                              foreign_keys=[("reading_id", "readings", "id"),
                                            ("calibration_id", "calibrations", "id")])
    db["spectrum_values"].create({"spectrum_line_id": int, "calibration_id": int, "e_v_per_m": float,
                                  "u_expanded_db": float, "flags": int},
                                 pk=("spectrum_line_id", "calibration_id"),
                                 foreign_keys=[("spectrum_line_id", "spectrum_lines", "id"),
                                               ("calibration_id", "calibrations", "id")])

def _schema_v2_survey(db: sqlite_utils.Database) -> None:
    """Walk-around survey tables (docs/schema.md, "Survey tables"; written by meterlink.survey.store)."""
    db["survey"].create({"session_id": int, "title": str, "site_json": str, "standard": str, "tier": str,
                         "decision_rule": str, "certificate_name": str, "certificate_number": str,
                         "certificate_due": str, "certificate_sha256": str, "sensor": str,
                         "freq_hz": float, "band_lo_hz": float, "band_hi_hz": float,
                         "e_ref_v_per_m": float, "e_ref_freq_hz": float, "averaging_time_s": float,
                         "followup_v_per_m": float, "followup_percent": float, "plan_text": str,
                         "plan_path": str, "created_utc": float, "ended_utc": float, "software_version": str},
                        pk="session_id", foreign_keys=[("session_id", "sessions", "id")],
                        not_null=["standard", "tier", "decision_rule", "created_utc"])
    db.execute("CREATE TRIGGER survey_choices_fixed BEFORE UPDATE OF standard, tier, decision_rule, "
               "certificate_sha256 ON survey BEGIN SELECT RAISE(ABORT, 'survey standard, tier, decision "
               "rule and certificate are fixed once measuring starts'); END")
    db["survey_sources"].create({"id": int, "session_id": int, "name": str, "freq_hz": float, "technology": str,
                                 "power_w": float, "max_power_w": float, "notes": str}, pk="id",
                                foreign_keys=[("session_id", "survey", "session_id")])
    db["survey_points"].create({
        "id": int, "session_id": int, "point_no": int, "label": str, "mode": str, "scheme": str,
        "x_m": float, "y_m": float, "lat_deg": float, "lon_deg": float, "height_m": float, "notes": str,
        "near_field": int, "duration_s": float, "t_start_utc": float, "t_end_utc": float, "n_readings": int,
        "e_v_per_m": float, "e_max_v_per_m": float, "ex_v_per_m": float, "ey_v_per_m": float,
        "ez_v_per_m": float, "u_expanded_db": float, "coverage": float, "complete": int, "flags": int,
        "warnings": str, "e_limit_v_per_m": float, "percent_field": float, "percent_power": float,
        "exposure_ratio": float, "verdict": str, "statement": str, "followup": int,
        "e_extrapolated_v_per_m": float, "exposure_ratio_extrapolated": float,
        "percent_power_extrapolated": float, "verdict_extrapolated": str}, pk="id",
        foreign_keys=[("session_id", "survey", "session_id")], not_null=["session_id", "label", "mode"])
    db["survey_points"].create_index(["session_id", "point_no"], unique=True)
    db["survey_samples"].create({"id": int, "point_id": int, "sample_no": int, "height_m": float, "x_m": float,
                                 "y_m": float, "e_v_per_m": float, "e_max_v_per_m": float,
                                 "u_expanded_db": float, "n_readings": int, "coverage": float,
                                 "t_start_utc": float, "t_end_utc": float}, pk="id",
                                foreign_keys=[("point_id", "survey_points", "id")])
    db["survey_emitters"].create({"id": int, "point_id": int, "name": str, "freq_hz": float, "e_v_per_m": float,
                                  "e_extrapolated_v_per_m": float, "ratio": float, "share": float}, pk="id",
                                 foreign_keys=[("point_id", "survey_points", "id")])
    db["survey_trace"].create({"id": int, "session_id": int, "point_no": int, "sample_no": int, "boot": int,
                               "seq": int, "t_utc": float, "t_device_s": float, "e_v_per_m": float,
                               "x_m": float, "y_m": float, "z_m": float, "used": int}, pk="id",
                              foreign_keys=[("session_id", "survey", "session_id")])
    db["survey_trace"].create_index(["session_id", "t_utc"])

# version -> function bringing the schema from version-1 up to it; applied in order, in one transaction each
def _schema_v3_spans(db: sqlite_utils.Database) -> None:
    """Readings lose their per-row indexes to the span index (meterlink/storage/spans.py)."""
    from meterlink.storage import spans

    spans.create(db.conn)

def _schema_v4_epochs(db: sqlite_utils.Database) -> None:
    """Epochs: one per connection to a device, so that a meter reusing a boot count (a reflash, a
    replacement unit, a wrapped count, a restarted simulator) is never taken for readings already stored.

    Readings, spans and spectra gain ``epoch`` (0 for rows stored before); repeats are looked for within
    (session, boot, epoch, seq). No existing row is rewritten: ADD COLUMN with a default is O(1).
    """
    db.execute("CREATE TABLE epochs (id INTEGER PRIMARY KEY, session_id INTEGER NOT NULL REFERENCES sessions(id), "
               "boot INTEGER, started_utc REAL NOT NULL, reason TEXT NOT NULL, device_id INTEGER "
               "REFERENCES devices(id))")
    db.execute("CREATE INDEX epochs_session ON epochs (session_id)")
    from meterlink.storage import spans

    spans.add_epochs(db.conn)
    db.execute("ALTER TABLE spectra ADD COLUMN epoch INTEGER NOT NULL DEFAULT 0")
    db.execute("DROP INDEX IF EXISTS idx_spectra_session_id_boot_seq")
    db.execute("CREATE UNIQUE INDEX spectra_key ON spectra (session_id, boot, epoch, seq)")

# The monitoring tables (docs/schema.md, "Monitoring tables"; written by the station monitor). Before
# version 5 the monitor created them itself with these same statements, so a version-4 file may hold
# them already: IF NOT EXISTS keeps those, and _schema_v5_monitoring adds any column they lack.
MONITORING_SQL = """
CREATE TABLE IF NOT EXISTS mon_station (
    id INTEGER PRIMARY KEY, name TEXT NOT NULL UNIQUE, config_path TEXT, config_text TEXT,
    standard TEXT, tier TEXT, convention TEXT, block_s REAL, windows_s TEXT,
    latitude_deg REAL, longitude_deg REAL, elevation_m REAL, timezone TEXT,
    created_utc REAL, started_utc REAL, heartbeat_utc REAL, pid INTEGER, state TEXT, runs INTEGER DEFAULT 0);
CREATE TABLE IF NOT EXISTS mon_meter (
    station_id INTEGER NOT NULL, meter TEXT NOT NULL, session_id INTEGER, port TEXT, certificate TEXT,
    freq_hz REAL, band_lo_hz REAL, band_hi_hz REAL, e_ref_v_per_m REAL, s_ref_w_per_m2 REAL,
    cert_due TEXT, last_seen_utc REAL, link_state TEXT, battery_pct REAL, temperature_degc REAL,
    drift_ppm REAL, last_e_v_per_m REAL, u_expanded_db REAL,
    PRIMARY KEY (station_id, meter));
CREATE TABLE IF NOT EXISTS mon_block (
    station_id INTEGER NOT NULL, meter TEXT NOT NULL, band TEXT NOT NULL, t_start_utc REAL NOT NULL,
    block_s REAL NOT NULL, energy REAL NOT NULL, covered_s REAL NOT NULL, n INTEGER NOT NULL,
    e_rms_v_per_m REAL, e_max_v_per_m REAL, complete INTEGER NOT NULL, n_overrange INTEGER NOT NULL,
    PRIMARY KEY (station_id, meter, band, t_start_utc));
CREATE TABLE IF NOT EXISTS mon_running (
    station_id INTEGER NOT NULL, meter TEXT NOT NULL, band TEXT NOT NULL, window_s REAL NOT NULL,
    t_start_utc REAL NOT NULL, e_end_v_per_m REAL, coverage_end REAL, e_max_v_per_m REAL, t_max_utc REAL,
    PRIMARY KEY (station_id, meter, band, window_s, t_start_utc));
CREATE TABLE IF NOT EXISTS mon_alarm (
    station_id INTEGER NOT NULL, rule TEXT NOT NULL, meter TEXT NOT NULL, band TEXT NOT NULL,
    state TEXT NOT NULL, t_on_utc REAL, peak_t_utc REAL, peak_value REAL, last_t_utc REAL,
    PRIMARY KEY (station_id, rule, meter, band));
CREATE TABLE IF NOT EXISTS mon_storage (
    station_id INTEGER PRIMARY KEY, storing INTEGER, since_utc REAL, error TEXT, pending_readings INTEGER,
    checked_utc REAL)
"""


def monitoring_statements() -> list[str]:
    """The CREATE TABLE statements of MONITORING_SQL, one per table."""
    return [s.strip() for s in MONITORING_SQL.split(";") if s.strip()]


def _columns_of(stmt: str) -> tuple[str, list[tuple[str, str]]]:
    """(table, [(column, declaration)]) of one CREATE TABLE statement of MONITORING_SQL."""
    head, body = stmt.split("(", 1)
    table = head.split()[-1]
    body = body.rsplit(")", 1)[0]
    cols, depth, part = [], 0, ""
    for ch in body + ",":
        if ch == "," and depth == 0:
            words = part.split()
            if words and words[0].upper() not in ("PRIMARY", "UNIQUE", "FOREIGN", "CHECK"):
                cols.append((words[0], " ".join(words[1:])))
            part = ""
            continue
        depth += (ch == "(") - (ch == ")")
        part += ch
    return table, cols


def _schema_v5_monitoring(db: sqlite_utils.Database) -> None:
    """The monitoring tables become part of the numbered schema (until version 4 the monitor made them).

    Tables a version-4 file already holds are kept with their rows; a column such a table lacks is
    added (nullable: ADD COLUMN cannot add NOT NULL without a default, and no stored row is rewritten).
    """
    for stmt in monitoring_statements():
        db.execute(stmt)
        table, cols = _columns_of(stmt)
        have = {r[1] for r in db.execute(f"PRAGMA table_info('{table}')")}
        for name, decl in cols:
            if name not in have:
                kind = decl.split()[0] if decl else ""
                default = " DEFAULT 0" if "DEFAULT 0" in decl.upper() else ""
                db.execute(f"ALTER TABLE {table} ADD COLUMN {name} {kind}{default}")


def _schema_v6_sync(db: sqlite_utils.Database) -> None:
    """Store-and-forward to a central store (docs/network.md): the file's own UUID, the outbox log and
    one cursor per table. The log is filled by triggers that meterlink.network.outbox adds only once a
    station is set to sync; a file that never syncs keeps two empty tables."""
    import uuid

    db["meta"].upsert({"key": "file_uuid", "value": str(uuid.uuid4())}, pk="key")
    db.execute("CREATE TABLE sync_log (seq INTEGER PRIMARY KEY AUTOINCREMENT, tbl TEXT NOT NULL, rid INTEGER NOT NULL)")
    db.execute("CREATE INDEX sync_log_tbl ON sync_log (tbl, seq)")
    db.execute("CREATE TABLE sync_cursor (tbl TEXT PRIMARY KEY, acked INTEGER NOT NULL DEFAULT 0, "
               "acked_utc REAL, rows_acked INTEGER NOT NULL DEFAULT 0)")


def _schema_v7_positions(db: sqlite_utils.Database) -> None:
    """GNSS positions of survey samples and readings (meterlink.device.gnss): WGS 84 latitude and
    longitude, altitude above mean sea level, the HDOP-based accuracy estimate and the fix time; and
    the declared sources the survey's predicted values come from.
    Columns are added (NULL for rows stored before, or stored while the receiver had no fix)."""
    db.execute("ALTER TABLE survey ADD COLUMN gnss_port TEXT")
    db.execute("ALTER TABLE survey ADD COLUMN declared_json TEXT")    # the sources file as read, for predictions
    for col, typ in (("lat_deg", "REAL"), ("lon_deg", "REAL"), ("alt_m", "REAL"), ("pos_u_m", "REAL"),
                     ("fix_utc", "REAL"), ("n_positioned", "INTEGER")):
        db.execute(f"ALTER TABLE survey_samples ADD COLUMN {col} {typ}")
    for col, typ in (("lat_deg", "REAL"), ("lon_deg", "REAL"), ("alt_m", "REAL"), ("pos_u_m", "REAL"),
                     ("fix_utc", "REAL"), ("fix_quality", "INTEGER"), ("n_sats", "INTEGER"), ("hdop", "REAL")):
        db.execute(f"ALTER TABLE survey_trace ADD COLUMN {col} {typ}")


def _schema_v8_field_spans(db: sqlite_utils.Database) -> None:
    """Calibrated values also kept per run of readings as packed arrays (field_spans), beside the
    per-reading rows of field_values: long records then stream back at the speed of a file read.
    Calibrations made before have none and are read from field_values."""
    db.execute("CREATE TABLE field_spans (id INTEGER PRIMARY KEY, calibration_id INTEGER NOT NULL "
               "REFERENCES calibrations(id), id_lo INTEGER NOT NULL, id_hi INTEGER NOT NULL, n INTEGER NOT NULL, "
               "t_lo REAL NOT NULL, t_hi REAL NOT NULL, reading_id BLOB NOT NULL, t_utc BLOB NOT NULL, "
               "e_v_per_m BLOB NOT NULL, axes_v_per_m BLOB NOT NULL, u_expanded_db BLOB NOT NULL, "
               "flags BLOB NOT NULL)")
    db.execute("CREATE INDEX field_spans_calibration ON field_spans (calibration_id, id_lo)")


def _schema_v9_remeasure(db: sqlite_utils.Database) -> None:
    """A survey point may be measured again: each capture is kept (capture_no 1, 2, ...), the earlier one
    pointing to the capture that replaced it, the new one carrying the reason. ADD COLUMN: no row rewritten."""
    db.execute("ALTER TABLE survey_points ADD COLUMN capture_no INTEGER NOT NULL DEFAULT 1")
    db.execute("ALTER TABLE survey_points ADD COLUMN replaced_by INTEGER REFERENCES survey_points(id)")
    db.execute("ALTER TABLE survey_points ADD COLUMN remeasure_reason TEXT")
    db.execute("DROP INDEX IF EXISTS idx_survey_points_session_id_point_no")
    db.execute("CREATE UNIQUE INDEX survey_points_capture ON survey_points (session_id, point_no, capture_no)")


def _schema_v10_selective(db: sqlite_utils.Database) -> None:
    """Frequency-selective points (meterlink.survey.selstore, docs/selective.md): the point with its
    analyser and antenna identity, one row per band with its assessed values and extrapolation, and
    each sweep's trace packed (float32 levels over a linear frequency axis) so that a point can be
    re-evaluated later with another antenna-factor file."""
    db.execute("CREATE TABLE sel_points (id INTEGER PRIMARY KEY, session_id INTEGER NOT NULL REFERENCES sessions(id), "
               "point_no INTEGER, label TEXT NOT NULL, x_m REAL, y_m REAL, height_m REAL, lat_deg REAL, lon_deg REAL, "
               "antenna_name TEXT NOT NULL, antenna_sha256 TEXT NOT NULL, antenna_text TEXT NOT NULL, "
               "antenna_mode TEXT NOT NULL, cable TEXT, analyser_address TEXT NOT NULL, analyser_idn TEXT, "
               "bands_path TEXT, standard TEXT NOT NULL, tier TEXT NOT NULL, summation_rule TEXT, check_status TEXT, "
               "total_exposure_ratio REAL, total_exposure_ratio_at_max REAL, e_total_v_per_m REAL, "
               "e_total_at_max_v_per_m REAL, u_expanded_db REAL, analyser_level_db REAL, journal_path TEXT, "
               "t_start_utc REAL NOT NULL, t_end_utc REAL, complete INTEGER NOT NULL, software_version TEXT)")
    db.execute("CREATE INDEX sel_points_session ON sel_points (session_id, point_no)")
    db.execute("CREATE TABLE sel_bands (id INTEGER PRIMARY KEY, point_id INTEGER NOT NULL REFERENCES sel_points(id), "
               "band_no INTEGER NOT NULL, name TEXT NOT NULL, technology TEXT, freq_hz REAL NOT NULL, "
               "bandwidth_hz REAL NOT NULL, rbw_hz REAL NOT NULL, window_lo_hz REAL NOT NULL, window_hi_hz REAL NOT NULL, "
               "p_dbm_json TEXT, af_db_per_m REAL, cable_loss_db REAL, e_v_per_m REAL, u_expanded_db REAL, "
               "e_limit_v_per_m REAL, percent_field REAL, exposure_ratio REAL, share REAL, "
               "extrapolation_json TEXT, power_factor REAL, e_at_max_v_per_m REAL, exposure_ratio_at_max REAL, "
               "UNIQUE (point_id, band_no))")
    db.execute("CREATE TABLE sel_traces (id INTEGER PRIMARY KEY, band_id INTEGER NOT NULL REFERENCES sel_bands(id), "
               "orientation TEXT NOT NULL, start_hz REAL NOT NULL, stop_hz REAL NOT NULL, n INTEGER NOT NULL, "
               "rbw_hz REAL NOT NULL, detector TEXT, sweep_time_s REAL, level_dbm BLOB NOT NULL, t_utc REAL, "
               "UNIQUE (band_id, orientation))")


def _schema_v11_photos(db: sqlite_utils.Database) -> None:
    """Photos of survey points kept in the file itself (bytes, type, checksum), so that a report still
    embeds them when the original image file has moved or gone."""
    db.execute("CREATE TABLE survey_photos (id INTEGER PRIMARY KEY, session_id INTEGER NOT NULL "
               "REFERENCES survey(session_id), point_no INTEGER NOT NULL, name TEXT NOT NULL, mime TEXT NOT NULL, "
               "data BLOB NOT NULL, sha256 TEXT NOT NULL, source_path TEXT, added_utc REAL NOT NULL, "
               "UNIQUE (session_id, point_no, sha256))")


def _schema_v12_signed(db: sqlite_utils.Database) -> None:
    """Survey reports a person signs: each issued revision kept whole (its sign-off, what changed, a digest
    of what it says and the HTML itself), so that an issued revision renders again unchanged and its
    number cannot be reused for other content; and what a photo shows (caption, direction of view,
    when it was taken and where that time came from). ADD COLUMN: no photo row rewritten."""
    db.execute("CREATE TABLE survey_revisions (id INTEGER PRIMARY KEY, session_id INTEGER NOT NULL "
               "REFERENCES survey(session_id), report_number TEXT NOT NULL, revision TEXT NOT NULL, "
               "issued_utc REAL NOT NULL, revision_date TEXT, change TEXT NOT NULL, issued_by TEXT, "
               "meta_json TEXT NOT NULL, content_sha256 TEXT NOT NULL, html TEXT NOT NULL, software_version TEXT, "
               "UNIQUE (report_number, revision))")
    db.execute("ALTER TABLE survey_photos ADD COLUMN caption TEXT")
    db.execute("ALTER TABLE survey_photos ADD COLUMN direction_deg REAL")
    db.execute("ALTER TABLE survey_photos ADD COLUMN taken TEXT")
    db.execute("ALTER TABLE survey_photos ADD COLUMN taken_from TEXT")


def _schema_v13_packed_only(db: sqlite_utils.Database) -> None:
    """Calibrations are stored packed only (field_spans; no more per-reading rows in field_values): H is
    packed too where it is not exactly E/Z0 (an H probe, a near-field row). Rows written before keep
    NULL there, which tells readers that their H and S are in field_values. ADD COLUMN: no row rewritten."""
    db.execute("ALTER TABLE field_spans ADD COLUMN h_a_per_m BLOB")


MIGRATIONS: dict[int, Callable[[sqlite_utils.Database], None]] = {1: _schema_v1, 2: _schema_v2_survey,
                                                                   3: _schema_v3_spans, 4: _schema_v4_epochs,
                                                                   5: _schema_v5_monitoring, 6: _schema_v6_sync,
                                                                   7: _schema_v7_positions, 8: _schema_v8_field_spans,
                                                                   9: _schema_v9_remeasure,
                                                                   10: _schema_v10_selective,
                                                                   11: _schema_v11_photos,
                                                                   12: _schema_v12_signed,
                                                                   13: _schema_v13_packed_only}
# migrations that read every reading (about 1 s per million here): announced on stderr
_SLOW_MIGRATIONS = {3: "building the readings' span index, about a second per million readings"}
