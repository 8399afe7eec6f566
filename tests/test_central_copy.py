"""The ingest's COPY path (rows whose keys are not stored yet go in with binary COPY) against a real
PostgreSQL: it stores exactly what the ON CONFLICT path stores, a re-sent batch is still a no-op, a
batch overlapping stored rows or racing another session falls back row by row, and an integer out of
the column's range is refused by PostgreSQL instead of wrapping.
"""

from __future__ import annotations

import uuid

import pytest

from test_central_support import central_database

T0 = 1_780_000_200.0          # a block boundary (a multiple of 360 s)
BLOCK_COLS = ["meter", "band", "t_start_utc", "block_s", "energy", "covered_s", "n", "e_rms_v_per_m",
              "e_max_v_per_m", "complete", "n_overrange"]
# values that a text round trip could change: the shortest repr of 0.1, a subnormal, 2**53 + 1 as an int in
# a float column (rounded to the nearest double, 2**53), a null, text with tab, newline, backslash and non-ASCII
ODD = [["m\t1", "b\\and\n2 µ", T0, 360, 0.1, 5e-324, 36, 2**53 + 1, None, 0, -2**31]]


def _blocks(n: int, t0: float = T0, seed: int = 0) -> list[list]:
    out = []
    for k in range(n):
        e = 0.5 + ((k * 7919 + seed * 104729) % 1000) / 1000.0
        out.append(["m1", "total", t0 + 360.0 * k, 360.0, e * e * 360.0, 360.0, 36, e, e * 1.3, k % 2, 2**31 - 1])
    return out


@pytest.fixture(scope="module")
def db():
    import psycopg

    with central_database() as dsn:
        conn = psycopg.connect(dsn)
        try:
            yield conn
        finally:
            conn.close()


def _station(conn, name: str) -> str:
    from meterlink.network import central

    return central.add_station(conn, name)


def _apply(conn, su: str, rows: list, file_uuid: str, batch_no: int = 1, ingest=None) -> dict:
    from meterlink.network.batch import check
    from meterlink.network.ingest import Ingest

    body = check({"format": 1, "station_uuid": su, "file_uuid": file_uuid, "batch_no": batch_no,
                  "schema_version": 12, "table": "mon_block", "columns": list(BLOCK_COLS),
                  "rows": [list(r) for r in rows]})
    return (ingest or Ingest()).apply(conn, su, body)


def _stored(conn, su: str) -> list[tuple]:
    return conn.execute(f"SELECT {', '.join(BLOCK_COLS)} FROM blocks WHERE station_uuid = %s ORDER BY meter, band, "
                        "t_start_utc", (su,)).fetchall()


def _copies(monkeypatch) -> list:
    """Record each COPY the ingest runs (its statement), by wrapping the cursor's copy()."""
    import psycopg

    seen = []
    orig = psycopg.Cursor.copy

    def copy(self, statement, *a, **kw):
        seen.append(str(statement))
        return orig(self, statement, *a, **kw)

    monkeypatch.setattr(psycopg.Cursor, "copy", copy)
    return seen


def test_copy_path_stores_what_the_on_conflict_path_stores(db, monkeypatch):
    """Equivalence test of two code paths: the same rows through binary COPY and through INSERT ... SELECT
    from jsonb ON CONFLICT DO NOTHING (forced by removing the COPY probe) are stored bit for bit alike."""
    from meterlink.network import ingest

    rows = _blocks(500) + ODD
    a, b = _station(db, "copy path"), _station(db, "insert path")
    copies = _copies(monkeypatch)
    ack_a = _apply(db, a, rows, str(uuid.uuid4()))
    assert any("FORMAT BINARY" in c for c in copies)
    monkeypatch.setattr(ingest, "_PROBE", {})
    copies.clear()
    ack_b = _apply(db, b, rows, str(uuid.uuid4()))
    assert copies == []
    assert ack_a["new"] == ack_b["new"] == len(rows) and ack_a["duplicate"] == ack_b["duplicate"] == 0
    got_a, got_b = _stored(db, a), _stored(db, b)
    assert got_a == got_b and len(got_a) == len(rows)
    odd = next(r for r in got_a if r[0] == "m\t1")
    # the float column holds 2**53 + 1 rounded to the nearest double (IEEE 754 binary64: 53-bit significand)
    assert odd == ("m\t1", "b\\and\n2 µ", T0, 360.0, 0.1, 5e-324, 36, float(2**53), None, False, -2**31)
    assert [r[9] for r in got_a if r[0] == "m1"][:3] == [False, True, False]     # 0/1 sent, boolean stored
    bands = "SELECT meter, band, first_t_utc, last_t_utc FROM bands WHERE station_uuid = %s ORDER BY meter"
    assert db.execute(bands, (a,)).fetchall() == db.execute(bands, (b,)).fetchall() == [
        ("m\t1", "b\\and\n2 µ", T0, T0), ("m1", "total", T0, T0 + 360.0 * 499)]


def test_a_resent_batch_after_copy_is_a_no_op(db, monkeypatch):
    su = _station(db, "resend after copy")
    fu = str(uuid.uuid4())
    rows = _blocks(300, seed=3) + ODD
    assert _apply(db, su, rows, fu)["new"] == len(rows)
    before = _stored(db, su)
    copies = _copies(monkeypatch)
    ack = _apply(db, su, rows, fu)                       # the same batch number again: a lost acknowledgement
    assert (ack["resent"], ack["new"], ack["duplicate"], ack["conflicts"]) == (True, 0, len(rows), 0)
    assert not any("FORMAT BINARY" in c for c in copies)   # the probe found the rows: no COPY tried
    assert _stored(db, su) == before
    n_conf = db.execute("SELECT count(*) FROM conflicts WHERE station_uuid = %s", (su,)).fetchone()[0]
    assert n_conf == 0


def test_a_batch_overlapping_stored_rows_takes_only_the_new_ones(db):
    su = _station(db, "overlap")
    fu = str(uuid.uuid4())
    first = _blocks(200, seed=5)
    _apply(db, su, first[:120], fu, batch_no=1)
    ack = _apply(db, su, first[80:], fu, batch_no=2)
    assert (ack["new"], ack["duplicate"], ack["conflicts"]) == (80, 40, 0)
    assert _stored(db, su) == [tuple(r[:9]) + (bool(r[9]), r[10]) for r in first]
    assert db.execute("SELECT meter, band, first_t_utc, last_t_utc FROM bands WHERE station_uuid = %s",
                      (su,)).fetchall() == [("m1", "total", T0, T0 + 360.0 * 199)]


def test_a_row_stored_by_another_session_undoes_only_the_copy(db, monkeypatch):
    """The probe misses a stored row (here: made to look at the file, and the row came from another file of
    the same station): the COPY's unique violation rolls back its savepoint and ON CONFLICT decides."""
    from meterlink.network import ingest

    su = _station(db, "race")
    rows = _blocks(100, seed=7)
    _apply(db, su, rows[40:60], str(uuid.uuid4()))
    monkeypatch.setattr(ingest, "_PROBE", {"mon_block": ("file_uuid", "t_start_utc", 2)})
    copies = _copies(monkeypatch)
    ack = _apply(db, su, rows, str(uuid.uuid4()))
    assert any("FORMAT BINARY" in c for c in copies)
    assert (ack["new"], ack["duplicate"], ack["conflicts"]) == (80, 20, 0)
    assert len(_stored(db, su)) == 100
    log = db.execute("SELECT rows_offered, rows_new FROM ingest_log WHERE station_uuid = %s ORDER BY id",
                     (su,)).fetchall()
    assert log == [(20, 20), (100, 80)]


def test_an_integer_out_of_the_column_range_is_refused_not_wrapped(db):
    """blocks.n is a PostgreSQL integer (-2**31 .. 2**31 - 1); binary COPY would wrap 2**40 to 0, so such a
    batch goes the INSERT way and PostgreSQL refuses it; nothing of the batch is stored."""
    import psycopg

    su = _station(db, "int range")
    rows = _blocks(10, seed=9)
    rows[4][6] = 2**40
    with pytest.raises(psycopg.errors.NumericValueOutOfRange):
        _apply(db, su, rows, str(uuid.uuid4()))
    db.rollback()
    assert _stored(db, su) == []


def test_two_meters_next_batch_sharing_a_block_time_still_goes_by_copy(db, monkeypatch):
    """A station with two meters logs their blocks interleaved, so one batch can end with meter A's block
    at time t and the next begin with meter B's at t: the probe looks at each meter and band's own range,
    so the next batch still takes COPY, and every block is stored once."""
    su = _station(db, "two meters")
    fu = str(uuid.uuid4())
    rows = [[m, "total", T0 + 360.0 * k, 360.0, 1.0, 360.0, 36, 0.5, 0.6, 1, 0] for k in range(50) for m in ("a", "b")]
    first, second = rows[:51], rows[51:]          # the first ends with meter a at k = 25, the second begins with b at 25
    assert first[-1][:3] == ["a", "total", T0 + 360.0 * 25] and second[0][:3] == ["b", "total", T0 + 360.0 * 25]
    _apply(db, su, first, fu, batch_no=1)
    copies = _copies(monkeypatch)
    ack = _apply(db, su, second, fu, batch_no=2)
    assert any("FORMAT BINARY" in c for c in copies)
    assert (ack["new"], ack["duplicate"]) == (49, 0) and len(_stored(db, su)) == 100
    copies.clear()
    ack = _apply(db, su, second, fu, batch_no=2)          # re-sent: the probe finds meter b's stored range
    assert not any("FORMAT BINARY" in c for c in copies) and (ack["new"], ack["duplicate"]) == (0, 49)
