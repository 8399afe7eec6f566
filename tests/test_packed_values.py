"""Calibrated values stored per span only (schema 13, meterlink/storage/queries.py), on real SQLite files.

1. Equivalence of code paths (labelled as such): for the same session, the values calibrate_axes hands
   the in-memory path (apply_certificate / calibrated_series) equal, bit for bit, what is read back from
   the packed rows, both through Store.field_values (field_series) and the streamed
   recalibrate + Recording.values; for an E probe, an H probe and a near-field calibration of each.
2. Against the plane-wave relations of the handbook (H = E / Z0, S = E^2 / Z0 = Z0 H^2, with Z0 from
   scipy.constants, CODATA): what the rebuilt H and S hold.
3. A new calibration writes no per-reading rows; an old-style calibration (rows in field_values only, or
   packed rows written before schema 13 beside them) still reads, from field_values.
4. Retention deletes packed rows once all their readings are gone; a row cut in part stays, and readers
   keep only the readings still stored.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
import scipy.constants as sc

from meterlink.device.protocol import SensorKind
from meterlink.physics import units
from meterlink.physics.calibrate import NEAR_FIELD, expected_counts
from meterlink.physics.certificate import load_certificate
from meterlink.station import retention
from meterlink.storage import queries, spans
from meterlink.storage import streamed as S
from meterlink.storage.files import StorageError
from meterlink.storage.processing import calibrated_series, field_series
from meterlink.storage.recording import load_recording
from meterlink.storage.store import Store

FREQ_HZ = 101.8e6
SMALL = 37                                    # readings per streamed chunk: many chunk boundaries
Z0 = sc.physical_constants["characteristic impedance of vacuum"][0]   # CODATA, ohm
KEYS = ("reading_id", "t_utc", "e_v_per_m", "axes_v_per_m", "h_a_per_m", "s_w_per_m2", "u_expanded_db", "flags")


def _session(path, quantity: str, n: int = 1800, t0: float = 1_790_000_000.0):
    """A probe session of two boots (a restart after a gap), counts from the certificate's own law."""
    cert = load_certificate("demo-probe")
    if quantity == "H":
        cert = dataclasses.replace(cert, quantity="H")     # the same tables read as A/m
    kind = SensorKind.H_PROBE if quantity == "H" else SensorKind.E_PROBE
    rng = np.random.default_rng(11)
    with Store(path) as store:
        dev = store.device_id("TEST-1", "T-0003", cert.serial, cert.certificate_number, int(kind), "1.0.0", "1.0")
        sid = store.begin_session("record", "test", dev, 1000, freq_hz=FREQ_HZ)
        half = n // 2
        for boot, k0 in ((1, 0), (2, half)):
            k = np.arange(k0, k0 + half)
            level = (2.0 + 1.5 * np.sin(k / 150.0) + rng.uniform(0, 0.3, half)) / np.sqrt(3.0)
            counts = np.stack([np.round(expected_counts(ax, level)) for ax in cert.axes], axis=1).astype(np.int64)
            seq = np.arange(half)
            store.add_reading_arrays(sid, boot, seq, seq * 1000, t0 + k + 60.0 * (boot - 1), counts, 0, 0)
    return sid, cert


def _h_lengths(store, cal_id) -> list[int]:
    return [r[0] for r in store.db.execute("select length(h_a_per_m) from field_spans where calibration_id = ? "
                                           "order by id_lo", [cal_id])]


@pytest.mark.parametrize("quantity", ["E", "H"])
@pytest.mark.parametrize("near_field", [False, True])
def test_equivalence_in_memory_and_streamed_values_read_back_from_the_packed_rows(tmp_path, quantity, near_field):
    """Equivalence test of code paths: calibrate_axes' own output (in memory) against the packed rows
    read back, for both writers (in-memory apply_certificate and streamed recalibrate)."""
    path = tmp_path / "s.db"
    sid, cert = _session(path, quantity)
    with Store(path) as store:
        mem = calibrated_series(store, sid, cert, near_field=near_field)    # as assess --near-field
        want = [mem.reading_ids, mem.t_utc, mem.e_v_per_m, mem.axes_v_per_m, mem.h_a_per_m, mem.s_w_per_m2,
                mem.u_expanded_db, mem.flags]
        back = field_series(store, sid, mem.calibration_id)
        got = [back.reading_ids, back.t_utc, back.e_v_per_m, back.axes_v_per_m, back.h_a_per_m, back.s_w_per_m2,
               back.u_expanded_db, back.flags]
        for k, a, b in zip(KEYS, want, got):
            assert a.tobytes() == np.ascontiguousarray(b, dtype=a.dtype).tobytes(), k   # bit for bit
        done = S.recalibrate(store, load_recording(store, sid), cert, near_field=near_field, rows=SMALL)
        assert done.quantity == quantity and done.n_values == int(np.isfinite(mem.e_v_per_m).sum())
        v = store.field_values(done.calibration_id)
        for k, a in zip(KEYS, want):
            assert a.tobytes() == np.ascontiguousarray(v[k], dtype=a.dtype).tobytes(), k
        chunks = list(load_recording(store, sid).values(rows=SMALL))
        assert len(chunks) > len(mem) // SMALL
        for k, a in (("reading_ids", mem.reading_ids), ("t_utc", mem.t_utc), ("e_v_per_m", mem.e_v_per_m),
                     ("axes_v_per_m", mem.axes_v_per_m), ("u_expanded_db", mem.u_expanded_db), ("flags", mem.flags)):
            np.testing.assert_array_equal(np.concatenate([getattr(c, k) for c in chunks]), a)
        # H is packed only where E / Z0 would not give it back to the last bit: always in near field (H or E
        # is NaN there), never for an E probe otherwise; for an H probe in the rows where E / Z0 misses
        stored = [n > 0 for n in _h_lengths(store, mem.calibration_id) + _h_lengths(store, done.calibration_id)]
        if quantity == "E" or near_field:
            assert stored and all(s == near_field for s in stored)
        else:
            assert stored[0] and any(stored[1:])      # the whole series in one row; the streamed rows of 37
    # what the values hold, against the plane-wave relations (handbook; Z0 from scipy.constants, CODATA)
    nf = (mem.flags & NEAR_FIELD) != 0
    assert nf.all() == near_field and nf.any() == near_field
    if near_field:
        assert np.isnan(mem.s_w_per_m2).all()
        assert np.isnan(mem.h_a_per_m).all() if quantity == "E" else np.isnan(mem.e_v_per_m).all()
    if quantity == "E" and not near_field:
        np.testing.assert_allclose(mem.h_a_per_m, mem.e_v_per_m / Z0, rtol=1e-12)
    if quantity == "H":
        h = mem.h_a_per_m
        assert np.isfinite(h).all() and np.all(h > 0)
        if not near_field:
            np.testing.assert_allclose(mem.e_v_per_m, Z0 * h, rtol=1e-12)
            np.testing.assert_allclose(mem.s_w_per_m2, Z0 * h ** 2, rtol=1e-12)
            # an H probe's E is Z0 * H rounded: E / Z0 (the code's Z0) misses H in the last bit for some
            # readings, which is why H is packed for it
            assert np.any(units.e_to_h(mem.e_v_per_m) != h)
    else:
        e = mem.e_v_per_m
        if not near_field:
            np.testing.assert_allclose(mem.s_w_per_m2, e ** 2 / Z0, rtol=1e-12)


def test_a_new_calibration_writes_no_per_reading_rows(tmp_path):
    path = tmp_path / "s.db"
    sid, cert = _session(path, "E")
    with Store(path) as store:
        mem = calibrated_series(store, sid, cert)
        done = S.recalibrate(store, load_recording(store, sid), cert, rows=SMALL)
        for cal in (mem.calibration_id, done.calibration_id):
            assert store.db.execute("select count(*) from field_values where calibration_id = ?",
                                    [cal]).fetchone()[0] == 0
            assert store.packed_count(cal) == len(mem) == 1800
        assert store.db.execute("select count(*) from field_values").fetchone()[0] == 0
        # one packed row per chunk of the streamed writer (the two boots' ids run on: one id range)
        assert store.db.execute("select count(*) from field_spans where calibration_id = ?",
                                [done.calibration_id]).fetchone()[0] == -(-1800 // SMALL)


def test_values_that_would_not_rebuild_are_refused(tmp_path):
    """S is not stored: a power density that is not E^2/Z0 (NaN in near field) would be lost, so it is refused."""
    path = tmp_path / "s.db"
    sid, cert = _session(path, "E", n=20)
    with Store(path) as store:
        mem = calibrated_series(store, sid, cert)
        s = mem.s_w_per_m2.copy()
        s[3] *= 1.5
        with pytest.raises(StorageError, match="power density"):
            store.add_field_values(mem.calibration_id, mem.reading_ids + 100, mem.e_v_per_m, mem.axes_v_per_m,
                                   mem.h_a_per_m, s, mem.u_expanded_db, mem.flags, t_utc=mem.t_utc)
        assert store.packed_count(mem.calibration_id) == 20          # nothing of the refused call was stored


def test_an_old_style_calibration_still_reads_from_field_values(tmp_path):
    """Files written before schema 13: (a) rows in field_values only (before schema 8), (b) field_values
    rows and packed rows without H (schema 8 to 12). Made here with plain SQL inserts; both read their
    H and S from field_values: for a near-field E calibration H is NULL there, not E / Z0."""
    path = tmp_path / "s.db"
    sid, cert = _session(path, "E", n=400)
    with Store(path) as store:
        mem = calibrated_series(store, sid, cert, near_field=True)
        cal = store.calibrations(sid)[-1]
        rows = [(int(i), float(e), *map(float, ax), None, None, float(u), int(f))    # H, S: NULL (near field)
                for i, e, ax, u, f in zip(mem.reading_ids, mem.e_v_per_m, mem.axes_v_per_m, mem.u_expanded_db, mem.flags)]
        packed = store.db.execute("select id_lo, id_hi, n, t_lo, t_hi, reading_id, t_utc, e_v_per_m, axes_v_per_m, "
                                  "u_expanded_db, flags from field_spans where calibration_id = ?",
                                  [mem.calibration_id]).fetchall()
        old = {}
        with store.write() as conn:
            for style in ("rows only", "rows and packed"):
                old[style] = conn.execute(
                    "insert into calibrations (session_id, certificate_name, certificate_sha256, certificate_text, "
                    "applied_utc, freq_hz, software_version) values (?,?,?,?,?,?,?)",
                    [sid, cal["certificate_name"], cal["certificate_sha256"], cal["certificate_text"],
                     cal["applied_utc"], cal["freq_hz"], "0.0.old"]).lastrowid
                conn.executemany("insert into field_values (reading_id, calibration_id, e_v_per_m, ex_v_per_m, "
                                 "ey_v_per_m, ez_v_per_m, h_a_per_m, s_w_per_m2, u_expanded_db, flags) values "
                                 f"(?,{old[style]},?,?,?,?,?,?,?,?)", rows)
            conn.executemany("insert into field_spans (calibration_id, id_lo, id_hi, n, t_lo, t_hi, reading_id, "
                             "t_utc, e_v_per_m, axes_v_per_m, u_expanded_db, flags) values "
                             f"({old['rows and packed']},?,?,?,?,?,?,?,?,?,?,?)", packed)
        for style, cid in old.items():
            v = store.field_values(cid)
            for k, a in zip(KEYS, [mem.reading_ids, mem.t_utc, mem.e_v_per_m, mem.axes_v_per_m, mem.h_a_per_m,
                                   mem.s_w_per_m2, mem.u_expanded_db, mem.flags]):
                np.testing.assert_array_equal(v[k], a, err_msg=f"{style}: {k}")
            assert np.isnan(v["h_a_per_m"]).all() and np.isfinite(v["e_v_per_m"]).all()
            rec = load_recording(store, sid, calibration_id=cid)
            assert rec.packed_n == (0 if style == "rows only" else 400)
            np.testing.assert_array_equal(np.concatenate([c.e_v_per_m for c in rec.values(rows=SMALL)]),
                                          mem.e_v_per_m)
        assert field_series(store, sid).calibration_id == old["rows and packed"]    # the latest is in force


def test_a_version_12_file_gains_the_h_column_with_nothing_rewritten(tmp_path):
    import sqlite_utils

    from meterlink.storage.schema import MIGRATIONS

    path = tmp_path / "v12.db"
    db = sqlite_utils.Database(path)
    for v in range(1, 13):
        MIGRATIONS[v](db)
    db["meta"].upsert({"key": "schema_version", "value": "12"}, pk="key")
    db.execute("INSERT INTO sessions (id, kind, started_utc) VALUES (1, 'record', 1.0e9)")
    db.execute("INSERT INTO calibrations (id, session_id, certificate_name) VALUES (1, 1, 'old')")
    db.execute("INSERT INTO field_spans (calibration_id, id_lo, id_hi, n, t_lo, t_hi, reading_id, t_utc, e_v_per_m, "
               "axes_v_per_m, u_expanded_db, flags) VALUES (1, 1, 1, 1, 1e9, 1e9, x'', ?, ?, ?, ?, ?)",
               [np.array([1e9]).tobytes(), np.array([2.0]).tobytes(), np.zeros(3).tobytes(),
                np.array([1.5]).tobytes(), np.zeros(1, np.int64).tobytes()])
    db.conn.commit()
    db.close()
    with Store(path) as store:
        assert store.schema_version >= 13
        assert store.db.execute("select h_a_per_m is null from field_spans").fetchall() == [(1,)]


def test_retention_deletes_packed_rows_whose_readings_are_all_gone(tmp_path, monkeypatch):
    """50 readings a packed row, 500 readings a second apart: cutting the first 175 deletes the three
    rows wholly before the first remaining reading and keeps the fourth (cut in part); readers give
    exactly the 325 readings left, with the values they had. Cutting the rest deletes every row."""
    monkeypatch.setattr(queries, "PACKED_ROWS", 50)      # a smaller packed row, so that a test session fills ten
    path = tmp_path / "s.db"
    t0 = 1_790_000_000.0
    sid, cert = _session(path, "E", n=500, t0=t0)
    with Store(path) as store:
        mem = calibrated_series(store, sid, cert)
        cal = mem.calibration_id
        assert store.db.execute("select count(*) from field_spans").fetchone()[0] == 10
        cut = mem.t_utc[175]                                 # readings 0..174 are older
        while retention.thin_readings(store, sid, cut, 7) == 7:      # in chunks of 7, as the daemon does
            pass
        assert store.count("readings", sid) == 325
        first = store.db.execute("select min(id) from readings where session_id = ?", [sid]).fetchone()[0]
        assert first == mem.reading_ids[175]
        los = [r[0] for r in store.db.execute("select id_lo from field_spans where calibration_id = ? order by id_lo",
                                              [cal])]
        assert los == [int(mem.reading_ids[k]) for k in range(150, 500, 50)]          # rows 3..9; row 3 is cut in part
        v = store.field_values(cal)
        np.testing.assert_array_equal(v["reading_id"], mem.reading_ids[175:])
        np.testing.assert_array_equal(v["e_v_per_m"], mem.e_v_per_m[175:])
        np.testing.assert_array_equal(v["s_w_per_m2"], mem.s_w_per_m2[175:])
        rec = load_recording(store, sid)
        np.testing.assert_array_equal(np.concatenate([c.reading_ids for c in rec.values(rows=SMALL)]), mem.reading_ids[175:])
        assert spans.check(store.db.conn) == []
        while retention.thin_readings(store, sid, mem.t_utc[-1] + 1.0, 100) == 100:
            pass
        assert store.count("readings", sid) == 0
        assert store.db.execute("select count(*) from field_spans").fetchone()[0] == 0
