"""Central side of the sync: one checked batch applied to PostgreSQL in one transaction (docs/network.md).

A batch none of whose keys is stored yet goes into the (partitioned) target with binary COPY; any
other batch is unpacked by PostgreSQL from its JSON and inserted with ``INSERT ... SELECT ... ON
CONFLICT DO NOTHING``, so a re-sent row changes nothing. A row whose key is stored with other content
is written to ``conflicts`` (once per distinct offered content) and the stored row stays as it was.
Tokens are kept as SHA-256 hashes only.
"""

from __future__ import annotations

import hashlib
import json
import secrets
import time
from operator import itemgetter

from meterlink.network.batch import TABLES, TIME_COLUMN, BadBatch
from meterlink.network.central_schema import Partitions


def _target(source: str, table: str, key: tuple, rename=None, extra=("station_uuid", "file_uuid", "received_utc"),
            bools=()) -> dict:
    rename = rename or {}
    sent = [rename.get(c, c) for c, _ in TABLES[source]]
    cols = (*extra, *sent)
    compare = tuple(c for c in cols if c not in key and c not in ("file_uuid", "received_utc", "first_seen_utc"))
    return {"table": table, "sent": sent, "cols": cols, "extra": extra, "key": key, "compare": compare,
            "bools": tuple(sent.index(b) for b in bools)}


TARGETS = {
    "mon_block": _target("mon_block", "blocks", ("station_uuid", "meter", "band", "t_start_utc"), bools=("complete",)),
    "mon_running": _target("mon_running", "running", ("station_uuid", "meter", "band", "window_s", "t_start_utc")),
    "events": _target("events", "events", ("file_uuid", "local_id", "t_utc"), rename={"id": "local_id"}),
    "readings": _target("readings", "readings", ("file_uuid", "local_id", "t_utc"), rename={"id": "local_id"}),
    "calibrations": _target("calibrations", "certificates", ("sha256",), extra=("first_seen_utc",),
                            rename={"certificate_name": "name", "certificate_sha256": "sha256",
                                    "certificate_text": "text"}),
}


# tables whose new rows may go in with COPY (Ingest._copy_new): (the per-batch key column, the key column
# ranged over, its index in a sent row); a probe of that range on an index finds any stored row
_PROBE = {"mon_block": ("station_uuid", "t_start_utc", 2), "events": ("file_uuid", "local_id", 0),
          "readings": ("file_uuid", "local_id", 0)}

_UUID_OID = 2950
_SMALL_INTS = {21: (-2**15, 2**15 - 1), 23: (-2**31, 2**31 - 1)}     # smallint, integer: the range binary COPY needs

# how a sent value is unpacked from the JSON row e (by kind), and the per-batch values bound as parameters
_CAST = {"s": "(e->>{i})", "f": "(e->>{i})::float8", "i": "(e->>{i})::int8", "b": "((e->>{i})::int <> 0)"}
_PARAM = {"station_uuid": "%s::uuid", "file_uuid": "%s::uuid", "received_utc": "%s::float8",
          "first_seen_utc": "%s::float8"}


class Refused(Exception):
    """A batch or request refused: HTTP status and one-line reason."""

    def __init__(self, status: int, reason: str):
        super().__init__(reason)
        self.status, self.reason = status, reason


def hash_token(token: str) -> str:
    return hashlib.sha256(token.encode("utf-8")).hexdigest()


def new_token() -> str:
    """A fresh bearer token (256 random bits, URL-safe text); only its hash is stored."""
    return "mlt_" + secrets.token_urlsafe(32)


def authenticate(conn, authorization: str | None) -> tuple[str, int]:
    """(station UUID, token id) of a bearer token; Refused 401 (missing, unknown) or 403 (revoked)."""
    if not authorization or not authorization.startswith("Bearer "):
        raise Refused(401, "no bearer token (Authorization: Bearer ...)")
    token = authorization[7:].strip()
    row = conn.execute("SELECT token_id, station_uuid, revoked_utc FROM tokens WHERE token_sha256 = %s",
                       (hash_token(token),)).fetchone()
    if row is None:
        raise Refused(401, "unknown token")
    if row[2] is not None:
        raise Refused(403, f"token {row[0]} was revoked")
    return str(row[1]), int(row[0])


class Ingest:
    """Applies batches to one central database connection at a time (one instance per worker)."""

    def __init__(self):
        self.parts = Partitions()
        self.oids: dict[str, list[int]] = {}

    @staticmethod
    def _stage(conn, table: str) -> str:
        """A temporary staging table like ``table`` on this connection (emptied at each commit)."""
        name = f"stage_{table}"
        conn.execute(f"CREATE TEMP TABLE IF NOT EXISTS {name} (LIKE {table}) ON COMMIT DELETE ROWS")
        return name

    def apply(self, conn, station_uuid: str, body: dict, token_id: int | None = None) -> dict:
        """Store one checked batch for the authenticated station; the acknowledgement, or Refused."""
        if body["station_uuid"] != station_uuid:
            raise Refused(403, f"token belongs to station {station_uuid}, batch names {body['station_uuid']}")
        now = time.time()
        try:
            with conn.transaction():
                ack = self._apply(conn, station_uuid, body, now)
                if token_id is not None:      # in the batch's transaction: no commit of its own
                    conn.execute("UPDATE tokens SET last_used_utc = %s WHERE token_id = %s", (now, token_id))
        except BaseException:
            self.parts.forget()
            raise
        return ack

    def _apply(self, conn, station_uuid: str, body: dict, now: float) -> dict:
        file_uuid, batch_no = body["file_uuid"], body["batch_no"]
        conn.execute("INSERT INTO station_files (file_uuid, station_uuid, first_seen_utc, last_seen_utc) "
                     "VALUES (%s, %s, %s, %s) ON CONFLICT DO NOTHING", (file_uuid, station_uuid, now, now))
        owner, last = conn.execute("SELECT station_uuid, last_batch_no FROM station_files WHERE file_uuid = %s "
                                   "FOR UPDATE", (file_uuid,)).fetchone()
        if str(owner) != station_uuid:
            raise Refused(403, f"database file {file_uuid} belongs to another station")
        if batch_no < last:
            raise Refused(409, f"replay of batch {batch_no}: this file's batches up to {last} are already stored")
        conn.execute("UPDATE station_files SET last_seen_utc = %s, last_batch_no = %s, schema_version = %s, "
                     "software_version = %s WHERE file_uuid = %s",
                     (now, batch_no, body["schema_version"], body.get("software_version"), file_uuid))
        self._snapshots(conn, station_uuid, body, now)
        ack = {"ok": True, "batch_no": batch_no, "resent": batch_no == last, "table": body.get("table"),
               "rows": len(body["rows"]), "new": 0, "duplicate": 0, "conflicts": 0}
        if body["rows"]:
            new, conflicts = self._rows(conn, station_uuid, body, now)
            ack.update(new=new, conflicts=conflicts, duplicate=len(body["rows"]) - new - conflicts)
        conn.execute("INSERT INTO ingest_log (t_utc, station_uuid, file_uuid, batch_no, tbl, status, rows_offered, "
                     "rows_new, rows_conflict) VALUES (%s,%s,%s,%s,%s,200,%s,%s,%s)",
                     (now, station_uuid, file_uuid, batch_no, body.get("table"), ack["rows"], ack["new"],
                      ack["conflicts"]))
        return ack

    def _snapshots(self, conn, su: str, body: dict, now: float) -> None:
        st = body.get("station")
        if st:
            conn.execute("UPDATE stations SET latitude_deg=%s, longitude_deg=%s, elevation_m=%s, standard=%s, tier=%s, "
                         "convention=%s, block_s=%s, timezone=%s, last_seen_utc=%s, last_batch_utc=%s "
                         "WHERE station_uuid=%s",
                         (st.get("latitude_deg"), st.get("longitude_deg"), st.get("elevation_m"), st.get("standard"),
                          st.get("tier"), st.get("convention"), st.get("block_s"), st.get("timezone"), now, now, su))
        else:
            conn.execute("UPDATE stations SET last_seen_utc=%s, last_batch_utc=%s WHERE station_uuid=%s", (now, now, su))
        for m in body.get("meters") or []:
            g = m.get
            conn.execute("INSERT INTO meters VALUES (%s,%s,%s,%s,%s,%s,%s,%s,%s,%s,%s,%s) ON CONFLICT (station_uuid, meter) "
                         "DO UPDATE SET port=EXCLUDED.port, certificate=EXCLUDED.certificate, "
                         "certificate_sha256=EXCLUDED.certificate_sha256, cert_due=EXCLUDED.cert_due, "
                         "freq_hz=EXCLUDED.freq_hz, band_lo_hz=EXCLUDED.band_lo_hz, band_hi_hz=EXCLUDED.band_hi_hz, "
                         "e_ref_v_per_m=EXCLUDED.e_ref_v_per_m, s_ref_w_per_m2=EXCLUDED.s_ref_w_per_m2, "
                         "updated_utc=EXCLUDED.updated_utc",
                         (su, g("meter"), g("port"), g("certificate"), g("certificate_sha256"), g("cert_due"),
                          g("freq_hz"), g("band_lo_hz"), g("band_hi_hz"), g("e_ref_v_per_m"), g("s_ref_w_per_m2"), now))
            conn.execute("INSERT INTO health VALUES (%s,%s,%s,%s,%s,%s,%s,%s,%s,%s) ON CONFLICT (station_uuid, meter) "
                         "DO UPDATE SET observed_utc=EXCLUDED.observed_utc, last_seen_utc=EXCLUDED.last_seen_utc, "
                         "link_state=EXCLUDED.link_state, battery_pct=EXCLUDED.battery_pct, "
                         "temperature_degc=EXCLUDED.temperature_degc, drift_ppm=EXCLUDED.drift_ppm, "
                         "last_e_v_per_m=EXCLUDED.last_e_v_per_m, u_expanded_db=EXCLUDED.u_expanded_db",
                         (su, g("meter"), now, g("last_seen_utc"), g("link_state"), g("battery_pct"),
                          g("temperature_degc"), g("drift_ppm"), g("last_e_v_per_m"), g("u_expanded_db")))
        for c in body.get("certificates") or []:
            conn.execute("INSERT INTO certificates (sha256, name, text, first_seen_utc) VALUES (%s,%s,%s,%s) "
                         "ON CONFLICT (sha256) DO NOTHING", (c["sha256"], c.get("name"), c["text"], now))
        for a in body.get("alarms") or []:
            g = a.get
            conn.execute("INSERT INTO alarms VALUES (%s,%s,%s,%s,%s,%s,%s,%s,%s,%s) ON CONFLICT (station_uuid, rule, "
                         "meter, band) DO UPDATE SET state=EXCLUDED.state, t_on_utc=EXCLUDED.t_on_utc, "
                         "peak_t_utc=EXCLUDED.peak_t_utc, peak_value=EXCLUDED.peak_value, "
                         "last_t_utc=EXCLUDED.last_t_utc, updated_utc=EXCLUDED.updated_utc",
                         (su, g("rule"), g("meter"), g("band"), g("state"), g("t_on_utc"), g("peak_t_utc"),
                          g("peak_value"), g("last_t_utc"), now))

    def _rows(self, conn, su: str, body: dict, now: float) -> tuple[int, int]:
        """Insert the new rows, record the conflicting ones: (new, conflicts).

        A batch whose key range holds nothing stored yet (the usual case) goes into the target with COPY
        (_copy_new). Otherwise the rows go to PostgreSQL as one JSON parameter, are unpacked there
        (jsonb_array_elements: no per-row Python work) and inserted with ON CONFLICT DO NOTHING; only a
        batch holding rows already stored is staged in a temporary table, to compare those rows with
        what is stored."""
        source = body["table"]
        tg = TARGETS[source]
        table, rows = tg["table"], body["rows"]
        if source in TIME_COLUMN:
            col = [c for c, _ in TABLES[source]].index(TIME_COLUMN[source])
            days = {r[col] // 86400.0 for r in rows}                # a partition is a month: one time per day is enough
            self.parts.ensure(conn, table, {d * 86400.0 for d in days})
        cols = ", ".join(tg["cols"])
        extra = {"station_uuid": su, "file_uuid": body["file_uuid"], "received_utc": now, "first_seen_utc": now}
        head = tuple(extra[c] for c in tg["extra"])
        spans = _spans(rows) if source == "mon_block" else None      # (meter, band) -> (first, last) block start
        new = self._copy_new(conn, source, head, rows, spans)
        if new is None:
            exprs = ", ".join([_PARAM[c] for c in tg["extra"]]
                              + [_CAST[k[0]].format(i=i) for i, (_, k) in enumerate(TABLES[source])])
            raw = body.get("_raw")
            if raw is not None:       # the body's own text: PostgreSQL takes "rows" from it, nothing re-encoded
                args = (*head, raw)
                select = f"SELECT {exprs} FROM jsonb_array_elements((%s::jsonb)->'rows') AS e"
            else:
                args = (*head, json.dumps(rows, separators=(",", ":")))
                select = f"SELECT {exprs} FROM jsonb_array_elements(%s::jsonb) AS e"
            new = conn.execute(f"INSERT INTO {table} ({cols}) {select} ON CONFLICT DO NOTHING", args).rowcount
        if source == "mon_block":
            with conn.cursor() as cur:
                cur.executemany("INSERT INTO bands VALUES (%s, %s, %s, %s, %s) ON CONFLICT (station_uuid, meter, band) "
                                "DO UPDATE SET first_t_utc = least(bands.first_t_utc, EXCLUDED.first_t_utc), "
                                "last_t_utc = greatest(bands.last_t_utc, EXCLUDED.last_t_utc)",
                                [(su, m, b, lo, hi) for (m, b), (lo, hi) in spans.items()])
        conflicts = 0
        if new < len(rows):
            stage = self._stage(conn, table)
            conn.execute(f"INSERT INTO {stage} ({cols}) {select}", args)
            on = " AND ".join(f"s.{k} = t.{k}" for k in tg["key"])
            cmp_s = ", ".join(f"s.{c}" for c in tg["compare"])
            cmp_t = ", ".join(f"t.{c}" for c in tg["compare"])
            found = conn.execute(f"SELECT json_build_array({', '.join(f's.{k}' for k in tg['key'])})::text, "
                                 f"row_to_json(t)::text, row_to_json(s)::text FROM {stage} s JOIN {table} t ON {on} "
                                 f"WHERE ROW({cmp_s}) IS DISTINCT FROM ROW({cmp_t})").fetchall()
            for key, stored, offered in found:
                o = json.loads(offered)
                for c in ("received_utc", "first_seen_utc"):
                    o.pop(c, None)
                offered = json.dumps(o, sort_keys=True)
                digest = hashlib.sha256(offered.encode()).hexdigest()
                conn.execute("INSERT INTO conflicts (tbl, station_uuid, file_uuid, batch_no, row_key, stored, offered, "
                             "offered_sha256, received_utc) VALUES (%s,%s,%s,%s,%s,%s,%s,%s,%s) "
                             "ON CONFLICT (tbl, row_key, offered_sha256) DO NOTHING",
                             (table, su, body["file_uuid"], body["batch_no"], key, stored, offered, digest, now))
            conflicts = len(found)
        return new, conflicts

    def _copy_new(self, conn, source: str, head: tuple, rows: list, spans: dict | None = None) -> int | None:
        """COPY the rows into the target when none of their keys can be stored yet: the number copied, or
        None (the caller then inserts with ON CONFLICT DO NOTHING).

        COPY is PostgreSQL's bulk path (rows written to each partition in groups), about twice as fast as
        INSERT ... SELECT row by row, but it cannot skip a stored key. So it is used only after an index
        probe finds nothing stored in the batch's key range, and inside a savepoint: a row stored
        meanwhile by another session (a unique violation) undoes just the COPY, and the caller's ON
        CONFLICT path then decides row by row. Idempotence is unchanged: a re-sent batch finds its rows
        and takes the ON CONFLICT path. Binary COPY: no float printed as text and parsed again."""
        probe = _PROBE.get(source)
        if probe is None or not rows:
            return None
        import uuid

        import psycopg

        tg = TARGETS[source]
        table, (scope, key, i) = tg["table"], probe
        at = head[tg["extra"].index(scope)]
        if spans and len(spans) <= 64:       # blocks: each meter and band's own time range (the primary key's order)
            ranges = " OR ".join(["(meter = %s AND band = %s AND t_start_utc BETWEEN %s AND %s)"] * len(spans))
            sql = f"SELECT EXISTS (SELECT 1 FROM {table} WHERE {scope} = %s AND ({ranges}))"
            args = (at, *(v for (m, b), (lo, hi) in spans.items() for v in (m, b, lo, hi)))
        else:
            keys = [r[i] for r in rows]
            sql = f"SELECT EXISTS (SELECT 1 FROM {table} WHERE {scope} = %s AND {key} BETWEEN %s AND %s)"
            args = (at, min(keys), max(keys))
        if conn.execute(sql, args).fetchone()[0]:
            return None
        oids = self._oids(conn, table, tg["cols"])
        n_extra = len(head)
        for j, oid in enumerate(oids[n_extra:]):   # binary int4 would wrap silently: out of range, let the INSERT say so
            if oid in _SMALL_INTS:
                lo, hi = _SMALL_INTS[oid]
                vals = [v for v in (r[j] for r in rows) if v is not None]
                if vals and (min(vals) < lo or max(vals) > hi):
                    return None
        # the per-batch UUIDs go as their 16 bytes, dumped as they are (not re-encoded from uuid.UUID per row)
        head = tuple(uuid.UUID(v).bytes if oid == _UUID_OID else v for v, oid in zip(head, oids))
        try:
            with conn.transaction(), conn.cursor() as cur:
                cur.adapters.register_dumper(None, _uuid_bytes_dumper())      # this cursor only
                with cur.copy(f"COPY {table} ({', '.join(tg['cols'])}) FROM STDIN (FORMAT BINARY)") as cp:
                    cp.set_types(oids)
                    write = cp.write_row
                    for r in rows:
                        write((*head, *r))
        except psycopg.errors.UniqueViolation:
            return None
        return len(rows)

    def _oids(self, conn, table: str, cols) -> list[int]:
        """The type OIDs of the table's columns, in the order given (read once per table and connection pool)."""
        if table not in self.oids:
            got = dict(conn.execute("SELECT attname, atttypid::int FROM pg_attribute WHERE attrelid = %s::regclass "
                                    "AND attnum > 0 AND NOT attisdropped", (table,)).fetchall())
            self.oids[table] = [got[c] for c in cols]
        return self.oids[table]

    @staticmethod
    def log_refusal(conn, status: int, reason: str, body: dict | None, station_uuid: str | None) -> None:
        """One ingest_log row for a refused request (its own short transaction)."""
        b = body if isinstance(body, dict) else {}
        try:
            with conn.transaction():
                conn.execute("INSERT INTO ingest_log (t_utc, station_uuid, file_uuid, batch_no, tbl, status, reason) "
                             "VALUES (%s,%s,%s,%s,%s,%s,%s)",
                             (time.time(), station_uuid, _uuid_or_none(b.get("file_uuid")),
                              b.get("batch_no") if isinstance(b.get("batch_no"), int) else None,
                              b.get("table") if isinstance(b.get("table"), str) else None, status, reason[:500]))
        except Exception:  # noqa: BLE001 - the refusal is logged to stderr anyway
            pass


def _spans(rows: list) -> dict:
    """(meter, band) -> (first, last) block start of a batch of blocks."""
    pairs = set(map(itemgetter(0, 1), rows))
    if len(pairs) == 1:           # one meter and band: no per-row loop
        times = list(map(itemgetter(2), rows))
        return {pairs.pop(): (min(times), max(times))}
    spans: dict = {}
    for r in rows:
        k = (r[0], r[1])
        lo, hi = spans.get(k, (r[2], r[2]))
        spans[k] = (min(lo, r[2]), max(hi, r[2]))
    return spans


_UUID_BYTES = []


def _uuid_bytes_dumper():
    """A binary COPY dumper for uuid columns that takes a UUID's 16 bytes as they are (made once)."""
    if not _UUID_BYTES:
        from psycopg.adapt import Dumper
        from psycopg.pq import Format

        class UUIDBytesDumper(Dumper):
            format = Format.BINARY
            oid = _UUID_OID

            def dump(self, obj):
                return obj

        _UUID_BYTES.append(UUIDBytesDumper)
    return _UUID_BYTES[0]


def _uuid_or_none(v):
    import uuid

    try:
        return str(uuid.UUID(str(v))) if v is not None else None
    except ValueError:
        return None


def check_or_refuse(body) -> dict:
    from meterlink.network.batch import check

    try:
        return check(body)
    except BadBatch as exc:
        raise Refused(exc.status, str(exc)) from None
