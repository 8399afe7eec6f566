"""The central service's configuration file, its database connections and the admin actions (stations, tokens).

psycopg is imported here only, and only when a central command runs: a station never needs it.
"""

from __future__ import annotations

import queue
import time
import tomllib
import uuid
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

from meterlink.errors import MeterlinkError

FORMAT = "meterlink-central/1"


class CentralError(MeterlinkError):
    """A central configuration, database or admin request that cannot be used."""


@dataclass(frozen=True)
class CentralConfig:
    """A parsed central configuration file (deploy/central.toml is the example)."""

    dsn: str
    host: str = "127.0.0.1"
    port: int = 8600
    max_body_bytes: int = 16 * 1024 * 1024
    pool: int = 4
    operator_token_file: str | None = None      # the operator's token for the status pages (None: no status pages)


def parse_config(text: str, src: str = "<central>") -> CentralConfig:
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise CentralError(f"{src}: not valid TOML: {exc}") from None
    if doc.get("format") != FORMAT:
        raise CentralError(f"{src}: format: expected {FORMAT!r}, got {doc.get('format')!r}")
    extra = set(doc) - {"format", "database", "service"}
    if extra:
        raise CentralError(f"{src}: unknown key {sorted(extra)[0]!r}")
    db, sv = doc.get("database", {}), doc.get("service", {})
    if not isinstance(db, dict) or not isinstance(db.get("dsn"), str) or not db["dsn"].strip():
        raise CentralError(f"{src}: database.dsn: expected a PostgreSQL connection string")
    if set(db) - {"dsn"}:
        raise CentralError(f"{src}: database: unknown key {sorted(set(db) - {'dsn'})[0]!r}")
    if not isinstance(sv, dict):
        raise CentralError(f"{src}: service: expected a table")
    known = {"host": str, "port": int, "max_body_bytes": int, "pool": int, "operator_token_file": str}
    for k, v in sv.items():
        if k not in known:
            raise CentralError(f"{src}: service: unknown key {k!r}")
        if not isinstance(v, known[k]) or isinstance(v, bool):
            raise CentralError(f"{src}: service.{k}: expected {known[k].__name__}, got {v!r}")
    port, pool, mb = sv.get("port", 8600), sv.get("pool", 4), sv.get("max_body_bytes", 16 * 1024 * 1024)
    if not 0 <= port <= 65535:
        raise CentralError(f"{src}: service.port: expected 0..65535, got {port}")
    if not 1 <= pool <= 64:
        raise CentralError(f"{src}: service.pool: expected 1..64 connections, got {pool}")
    if not 1024 <= mb <= 1 << 30:
        raise CentralError(f"{src}: service.max_body_bytes: expected 1024..1073741824, got {mb}")
    otf = sv.get("operator_token_file")
    if otf is not None and not Path(otf).is_absolute() and src != "<central>":
        otf = str(Path(src).parent / otf)            # relative to the configuration file
    return CentralConfig(dsn=db["dsn"], host=sv.get("host", "127.0.0.1"), port=port, max_body_bytes=mb, pool=pool,
                         operator_token_file=otf)


def load_config(path) -> CentralConfig:
    from meterlink.errors import read_input_text

    p = Path(path)
    return parse_config(read_input_text(p, "central configuration", CentralError), str(p))


def connect(dsn: str):
    """A psycopg connection (autocommit: transactions are explicit), or CentralError in one line."""
    import psycopg

    try:
        return psycopg.connect(dsn, autocommit=True, connect_timeout=5)
    except psycopg.Error as exc:
        msg = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise CentralError(f"cannot connect to the central database: {msg}") from None


class Pool:
    """A few reusable connections; a broken one is dropped and a new one made on the next request."""

    def __init__(self, dsn: str, size: int):
        self.dsn, self.size = dsn, size
        self._free: queue.LifoQueue = queue.LifoQueue()
        self._sem = queue.Queue()
        for _ in range(size):
            self._sem.put(None)

    @contextmanager
    def connection(self):
        self._sem.get()
        conn = None
        try:
            try:
                conn = self._free.get_nowait()
            except queue.Empty:
                conn = connect(self.dsn)
            yield conn
        finally:
            if conn is not None and not conn.closed and not conn.broken:
                self._free.put(conn)
            elif conn is not None:
                conn.close()
            self._sem.put(None)

    def close(self) -> None:
        while True:
            try:
                self._free.get_nowait().close()
            except queue.Empty:
                return


# -- admin actions ---------------------------------------------------------------------------------
def add_station(conn, name: str) -> str:
    """Register a station by name; its new UUID (CentralError if the name is taken)."""
    if not name.strip() or len(name) > 200:
        raise CentralError("station name: expected 1 to 200 characters")
    su = str(uuid.uuid4())
    with conn.transaction():
        if conn.execute("SELECT 1 FROM stations WHERE name = %s", (name,)).fetchone():
            raise CentralError(f"a station named {name!r} is already registered")
        conn.execute("INSERT INTO stations (station_uuid, name, created_utc) VALUES (%s, %s, %s)",
                     (su, name, time.time()))
    return su


def find_station(conn, ref: str) -> tuple[str, str]:
    """(uuid, name) of a station given by UUID or name."""
    try:
        row = conn.execute("SELECT station_uuid, name FROM stations WHERE station_uuid = %s",
                           (str(uuid.UUID(ref)),)).fetchone()
    except ValueError:
        row = conn.execute("SELECT station_uuid, name FROM stations WHERE name = %s", (ref,)).fetchone()
    if row is None:
        raise CentralError(f"no station {ref!r} is registered (see 'meterlink central station add')")
    return str(row[0]), row[1]


def create_token(conn, station_ref: str, label: str = "") -> tuple[int, str, str]:
    """(token id, station uuid, token): the token is shown once; only its SHA-256 is stored."""
    from meterlink.network.ingest import hash_token, new_token

    su, _ = find_station(conn, station_ref)
    token = new_token()
    with conn.transaction():
        tid = conn.execute("INSERT INTO tokens (station_uuid, token_sha256, label, created_utc) VALUES (%s,%s,%s,%s) "
                           "RETURNING token_id", (su, hash_token(token), label, time.time())).fetchone()[0]
    return tid, su, token


def revoke_token(conn, token_id: int) -> None:
    with conn.transaction():
        row = conn.execute("UPDATE tokens SET revoked_utc = coalesce(revoked_utc, %s) WHERE token_id = %s "
                           "RETURNING token_id", (time.time(), token_id)).fetchone()
    if row is None:
        raise CentralError(f"no token with id {token_id}")


def reset_file(conn, file_uuid: str) -> int:
    """Accept a station file's batch numbers from 1 again (a file restored from a backup sends numbers
    already used: refused as replays until this). Rows sent again are recognised by their keys as
    before. Returns the batch number the file had reached."""
    try:
        fid = str(uuid.UUID(file_uuid))
    except ValueError:
        raise CentralError(f"file {file_uuid!r}: expected a UUID (meta.file_uuid of the station file)") from None
    with conn.transaction():
        row = conn.execute("SELECT last_batch_no FROM station_files WHERE file_uuid = %s FOR UPDATE", (fid,)).fetchone()
        if row is None:
            raise CentralError(f"no station file {fid} has sent anything")
        conn.execute("UPDATE station_files SET last_batch_no = 0 WHERE file_uuid = %s", (fid,))
    return int(row[0])


def list_tokens(conn) -> list[dict]:
    cur = conn.execute("SELECT t.token_id, s.name, t.station_uuid::text, t.label, t.created_utc, t.revoked_utc, "
                       "t.last_used_utc FROM tokens t JOIN stations s USING (station_uuid) ORDER BY t.token_id")
    cols = [c.name for c in cur.description]
    return [dict(zip(cols, r)) for r in cur.fetchall()]


def stations_overview(conn) -> list[dict]:
    """Every station with its newest 'total' 6-minute block (served by the blocks_latest index), for the API."""
    cur = conn.execute(
        "SELECT s.station_uuid::text, s.name, s.latitude_deg, s.longitude_deg, s.standard, s.tier, s.convention, "
        "s.last_seen_utc, b.meter, b.t_start_utc, b.e_rms_v_per_m, b.complete, "
        "(SELECT count(*) FROM alarms a WHERE a.station_uuid = s.station_uuid AND a.state = 'active') AS alarms_on "
        "FROM stations s LEFT JOIN LATERAL (SELECT meter, t_start_utc, e_rms_v_per_m, complete FROM blocks "
        "WHERE station_uuid = s.station_uuid AND band = 'total' ORDER BY t_start_utc DESC LIMIT 1) b ON true "
        "ORDER BY s.name")
    cols = [c.name for c in cur.description]
    return [dict(zip(cols, r)) for r in cur.fetchall()]
