"""The sync batch: what a station sends and how the central side checks it before anything is stored.

One batch carries rows of one station table, oldest first, as ``columns`` + ``rows`` (lists, not
objects: half the bytes), plus the station's current identity, meters and alarm states. It is JSON,
optionally gzip-compressed (Content-Encoding: gzip). ``batch_no`` counts the file's acknowledged
batches: the central store refuses one older than the last it took (a replay) and takes the last one
again without change (a re-send after a lost acknowledgement).
"""

from __future__ import annotations

import json
import math
import uuid
from itertools import repeat

try:        # a fast JSON library when installed (the central extra has it); a station needs only the stdlib
    import orjson
except ImportError:  # pragma: no cover - exercised where orjson is absent
    orjson = None

FORMAT = 1                 # batch format this meterlink writes and reads
MAX_ROWS = 50_000          # rows per batch the service takes

# station table -> columns sent, in order, with their kinds ('f' float, 'i' int, 's' text, 'b' 0/1),
# and a trailing '?' where null is allowed
TABLES: dict[str, tuple[tuple[str, str], ...]] = {
    "mon_block": (("meter", "s"), ("band", "s"), ("t_start_utc", "f"), ("block_s", "f"), ("energy", "f"),
                  ("covered_s", "f"), ("n", "i"), ("e_rms_v_per_m", "f?"), ("e_max_v_per_m", "f?"),
                  ("complete", "b"), ("n_overrange", "i")),
    "mon_running": (("meter", "s"), ("band", "s"), ("window_s", "f"), ("t_start_utc", "f"), ("e_end_v_per_m", "f?"),
                    ("coverage_end", "f?"), ("e_max_v_per_m", "f?"), ("t_max_utc", "f?")),
    "events": (("id", "i"), ("session_id", "i?"), ("t_utc", "f"), ("kind", "s"), ("severity", "s"),
               ("message", "s?"), ("detail", "s?")),
    "calibrations": (("certificate_name", "s?"), ("certificate_sha256", "s"), ("certificate_text", "s")),
    "readings": (("id", "i"), ("session_id", "i"), ("boot", "i"), ("epoch", "i"), ("seq", "i"), ("tick_ms", "i"),
                 ("t_utc", "f"), ("raw_x", "i"), ("raw_y", "i"), ("raw_z", "i"), ("flags", "i?"),
                 ("range_index", "i?")),
}
# the time column that places a row in its monthly partition
TIME_COLUMN = {"mon_block": "t_start_utc", "mon_running": "t_start_utc", "events": "t_utc", "readings": "t_utc"}

STATION_KEYS = {"name": "s", "latitude_deg": "f?", "longitude_deg": "f?", "elevation_m": "f?", "standard": "s?",
                "tier": "s?", "convention": "s?", "block_s": "f?", "timezone": "s?"}
METER_KEYS = {"meter": "s", "port": "s?", "certificate": "s?", "certificate_sha256": "s?", "cert_due": "s?",
              "freq_hz": "f?", "band_lo_hz": "f?", "band_hi_hz": "f?", "e_ref_v_per_m": "f?", "s_ref_w_per_m2": "f?",
              "last_seen_utc": "f?", "link_state": "s?", "battery_pct": "f?", "temperature_degc": "f?",
              "drift_ppm": "f?", "last_e_v_per_m": "f?", "u_expanded_db": "f?"}
CERT_KEYS = {"sha256": "s", "name": "s?", "text": "s"}
ALARM_KEYS = {"rule": "s", "meter": "s", "band": "s", "state": "s", "t_on_utc": "f?", "peak_t_utc": "f?",
              "peak_value": "f?", "last_t_utc": "f?"}


def encode(body: dict) -> bytes:
    """A batch as compact JSON (UTF-8); ValueError on a NaN or an infinity, which JSON cannot carry.

    orjson, when installed, writes the same JSON about ten times faster than the json module but
    writes NaN and infinities as null; so its text is taken only when it holds exactly as many nulls as
    the body holds None, otherwise (a non-finite float, or text containing "null") the json module
    writes it, or refuses it, as before."""
    if orjson is not None:
        try:
            out = orjson.dumps(body)
        except TypeError:           # an int beyond 64 bits, a lone surrogate: the json module decides
            out = None
        if out is not None and out.count(b"null") == _nones(body):
            return out
    return json.dumps(body, separators=(",", ":"), allow_nan=False).encode()


def decode(text: str):
    """Parse a JSON text (orjson when installed: about twice as fast on a batch); json.JSONDecodeError if invalid."""
    if orjson is not None:
        return orjson.loads(text)          # orjson.JSONDecodeError is a json.JSONDecodeError
    return json.loads(text)


def _nones(obj) -> int:
    """How many None values a body holds (a batch's rows, lists of scalars, counted by list.count)."""
    if obj is None:
        return 1
    if isinstance(obj, dict):
        return sum(sum(map(list.count, v, repeat(None))) if k == "rows" and isinstance(v, list)
                   and all(type(r) is list for r in v) else _nones(v) for k, v in obj.items())
    if isinstance(obj, (list, tuple)):
        return sum(map(_nones, obj))
    return 0


class BadBatch(ValueError):
    """A batch the service refuses; the message is the one-line reason sent back (HTTP status in .status)."""

    def __init__(self, reason: str, status: int = 400):
        super().__init__(reason)
        self.status = status


def _ok(v, kind: str) -> bool:
    if v is None:
        return kind.endswith("?")
    k = kind[0]
    if k == "s":
        return isinstance(v, str) and len(v) <= 1_000_000
    if k == "i":
        return isinstance(v, int) and not isinstance(v, bool) and -2**63 <= v < 2**63
    if k == "b":
        return v in (0, 1) and not isinstance(v, float)
    return (type(v) is float and math.isfinite(v)) or (type(v) is int and -2**63 <= v < 2**63)


def _check_record(obj, keys: dict, what: str) -> dict:
    if not isinstance(obj, dict):
        raise BadBatch(f"{what}: expected an object")
    extra = set(obj) - set(keys)
    if extra:
        raise BadBatch(f"{what}: unknown key {sorted(extra)[0]!r}")
    for k, kind in keys.items():
        if not _ok(obj.get(k), kind):
            raise BadBatch(f"{what}.{k}: expected {_KIND[kind[0]]}{' or null' if kind.endswith('?') else ''}, "
                           f"got {str(obj.get(k))[:40]!r}")
    return obj


_KIND = {"s": "text", "i": "an integer", "f": "a finite number", "b": "0 or 1"}
_ALLOWED = {"s": {str}, "s?": {str, type(None)}, "i": {int}, "i?": {int, type(None)}, "f": {int, float},
            "f?": {int, float, type(None)}, "b": {int}, "b?": {int, type(None)}}


def _floats(values):
    return (v for v in values if type(v) is float)


def _all_finite(values, types: set) -> bool:
    """No NaN or infinity among a column's floats (one C-level pass when the column is all floats)."""
    return all(map(math.isfinite, values if types == {float} else _floats(values)))


def _all_int64(values, types: set) -> bool:
    """Every int of a column fits a PostgreSQL bigint (min and max when the column is all ints)."""
    if types == {int}:
        return -2**63 <= min(values) and max(values) < 2**63
    return all(-2**63 <= v < 2**63 for v in values if type(v) is int)


def check(body) -> dict:
    """The batch if it is well formed, else BadBatch naming the first problem."""
    if not isinstance(body, dict):
        raise BadBatch("body: expected a JSON object")
    fmt = body.get("format")
    if not isinstance(fmt, int) or isinstance(fmt, bool):
        raise BadBatch("format: expected an integer batch format")
    if fmt > FORMAT:
        raise BadBatch(f"batch format {fmt} is newer than this service understands ({FORMAT}): upgrade the "
                       f"central service", 422)
    if fmt < 1:
        raise BadBatch(f"format: unknown batch format {fmt}")
    known = {"format", "station_uuid", "file_uuid", "batch_no", "schema_version", "software_version", "station",
             "meters", "alarms", "certificates", "table", "columns", "rows"}
    extra = set(body) - known
    if extra:
        raise BadBatch(f"unknown key {sorted(extra)[0]!r}")
    for k in ("station_uuid", "file_uuid"):
        try:
            body[k] = str(uuid.UUID(str(body.get(k))))
        except ValueError:
            raise BadBatch(f"{k}: expected a UUID, got {str(body.get(k))[:40]!r}") from None
    n = body.get("batch_no")
    if not isinstance(n, int) or isinstance(n, bool) or not 1 <= n < 2**62:
        raise BadBatch(f"batch_no: expected a positive integer, got {str(n)[:20]!r}")
    for k in ("schema_version",):
        if not isinstance(body.get(k), int):
            raise BadBatch(f"{k}: expected an integer")
    if body.get("software_version") is not None and not isinstance(body["software_version"], str):
        raise BadBatch("software_version: expected text")
    if body.get("station") is not None:
        _check_record(body["station"], STATION_KEYS, "station")
    for key, keys in (("meters", METER_KEYS), ("alarms", ALARM_KEYS), ("certificates", CERT_KEYS)):
        items = body.get(key) or []
        if not isinstance(items, list) or len(items) > 1000:
            raise BadBatch(f"{key}: expected a list of at most 1000 objects")
        for i, m in enumerate(items):
            _check_record(m, keys, f"{key}[{i}]")
    import hashlib

    for i, c in enumerate(body.get("certificates") or []):
        if hashlib.sha256(c["text"].encode("utf-8")).hexdigest() != c["sha256"]:
            raise BadBatch(f"certificates[{i}].sha256: does not match the SHA-256 of its text")
    table = body.get("table")
    if table is None:
        if body.get("rows"):
            raise BadBatch("rows given without a table")
        body["rows"] = []
        return body
    if table not in TABLES:
        raise BadBatch(f"table: unknown table {str(table)[:40]!r} (known: {', '.join(TABLES)})")
    spec = TABLES[table]
    cols = [c for c, _ in spec]
    if body.get("columns") != cols:
        raise BadBatch(f"columns of {table}: expected {cols}")
    rows = body.get("rows")
    if not isinstance(rows, list):
        raise BadBatch("rows: expected a list")
    if len(rows) > MAX_ROWS:
        raise BadBatch(f"rows: {len(rows)} rows, at most {MAX_ROWS} per batch", 413)
    width = len(spec)
    for i, r in enumerate(rows):
        if type(r) is not list or len(r) != width:
            raise BadBatch(f"rows[{i}]: expected a list of {width} values")
    if rows:
        from meterlink.network.central_schema import valid_time, valid_times

        tname = TIME_COLUMN.get(table)
        for (name, kind), values in zip(spec, zip(*rows)):    # column by column: one pass of C-level checks each
            types = set(map(type, values))
            if not types <= _ALLOWED[kind] or (float in types and not _all_finite(values, types)) \
                    or (int in types and not _all_int64(values, types)) \
                    or (kind[0] == "b" and not set(values) <= {0, 1}) \
                    or (name == tname and not valid_times(values)):
                i, v = next(((i, v) for i, v in enumerate(values) if not _ok(v, kind)
                             or (name == tname and not valid_time(v))), (0, values[0]))
                if name == tname and _ok(v, kind):
                    raise BadBatch(f"rows[{i}].{name}: time {v!r} is outside the years 1-9999")
                raise BadBatch(f"rows[{i}].{name}: expected {_KIND[kind[0]]}, got {str(v)[:40]!r}")
    return body
