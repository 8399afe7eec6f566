"""The central side's check of a batch's rows, column by column: each bad value is refused with the row
and column that hold it, whether the column is all of one type (the one-pass checks) or mixed.
"""

from __future__ import annotations

import json

import pytest

from meterlink.network.batch import BadBatch, check

COLS = ["meter", "band", "t_start_utc", "block_s", "energy", "covered_s", "n", "e_rms_v_per_m", "e_max_v_per_m",
        "complete", "n_overrange"]
T0 = 1_780_000_200.0
SU = "6f1c1c1e-7c1a-4e8e-9c1a-1c1e7c1a4e8e"


def _rows(n: int = 50) -> list[list]:
    return [["m1", "total", T0 + 360.0 * k, 360.0, 1.0 + k, 360.0, 36, 0.5, None if k % 3 else 0.6, k % 2, 0]
            for k in range(n)]


def _body(rows) -> dict:
    return {"format": 1, "station_uuid": SU, "file_uuid": SU, "batch_no": 1, "schema_version": 12,
            "table": "mon_block", "columns": list(COLS), "rows": rows}


def test_a_good_batch_passes_with_ints_in_float_columns_and_nulls():
    rows = _rows()
    rows[7][3] = 360                      # an int where a float is expected: allowed
    assert check(_body(rows))["rows"] == rows


@pytest.mark.parametrize("row, col, value, words", [
    (17, 4, float("nan"), "rows[17].energy: expected a finite number"),
    (3, 4, float("inf"), "rows[3].energy: expected a finite number"),
    (9, 8, float("-inf"), "rows[9].e_max_v_per_m: expected a finite number"),       # a column with nulls
    (21, 6, 2**63, "rows[21].n: expected an integer"),
    (30, 6, -2**63 - 1, "rows[30].n: expected an integer"),
    (30, 3, 2**63, "rows[30].block_s: expected a finite number"),                   # int in a float column
    (5, 6, True, "rows[5].n: expected an integer"),
    (11, 9, 2, "rows[11].complete: expected 0 or 1"),
    (40, 2, 1e300, "rows[40].t_start_utc: time 1e+300 is outside the years 1-9999"),
    (2, 2, -7e10, "rows[2].t_start_utc: time -70000000000.0 is outside the years 1-9999"),
    (48, 2, 253402300799, "rows[48].t_start_utc: time 253402300799 is outside the years 1-9999"),
    (12, 0, 5, "rows[12].meter: expected text"),
])
def test_a_bad_value_is_refused_naming_its_row_and_column(row, col, value, words):
    rows = _rows()
    rows[row][col] = value
    with pytest.raises(BadBatch) as exc:
        check(_body(rows))
    assert str(exc.value).startswith(words)


def test_nan_as_json_parses_but_is_refused():
    """Python's json module reads the non-standard NaN token; the check must still refuse it."""
    text = json.dumps(_body(_rows(4))).replace(", 360.0, 1.0, ", ", 360.0, NaN, ", 1)
    assert "NaN" in text
    body = json.loads(text)
    with pytest.raises(BadBatch, match="expected a finite number"):
        check(body)


def test_orjson_reads_and_writes_every_double_as_the_json_module_does():
    """Equivalence test of two code paths (orjson and the json module): 50,000 doubles drawn from random bit
    patterns, plus the extremes of IEEE 754 binary64, are written and read back bit for bit alike, so a
    re-sent row still compares equal to the row stored before."""
    import random
    import struct

    from meterlink.network import batch

    if batch.orjson is None:
        pytest.skip("orjson is not installed (the json module is used)")
    rng = random.Random(20261204)
    xs = [struct.unpack("<d", rng.getrandbits(64).to_bytes(8, "little"))[0] for _ in range(50_000)]
    xs = [x for x in xs if x == x and abs(x) != float("inf")]
    xs += [5e-324, 2.2250738585072014e-308, 1.7976931348623157e308, 0.1, -0.0, 1e23, 9007199254740993.0]
    body = {"rows": [[x] for x in xs]}
    fast = batch.encode(body)
    assert json.loads(fast) == body
    back = batch.decode(json.dumps(body))
    assert [struct.pack("<d", r[0]) for r in back["rows"]] == [struct.pack("<d", x) for x in xs]


@pytest.mark.parametrize("bad", [float("nan"), float("inf"), float("-inf")])
def test_encode_refuses_a_non_finite_float_as_the_json_module_does(bad):
    from meterlink.network import batch

    rows = _rows(20)
    rows[13][8] = bad             # a nullable column: writing null would silently change the value
    with pytest.raises(ValueError, match="not JSON compliant"):
        batch.encode(_body(rows))


def test_encode_keeps_text_holding_null_and_real_nulls():
    from meterlink.network import batch

    body = {**_body(_rows(10)), "software_version": "null, nullable"}
    assert json.loads(batch.encode(body)) == body


def test_without_orjson_the_json_module_writes_and_reads_the_same(monkeypatch):
    """Equivalence test of two code paths: a station without orjson sends the same JSON value."""
    from meterlink.network import batch

    body = _body(_rows(30))
    fast = batch.encode(body)
    monkeypatch.setattr(batch, "orjson", None)
    slow = batch.encode(body)
    assert json.loads(slow) == json.loads(fast) == body
    assert batch.decode(slow.decode()) == body
    rows = _rows(5)
    rows[2][4] = float("inf")
    with pytest.raises(ValueError, match="not JSON compliant"):
        batch.encode(_body(rows))
