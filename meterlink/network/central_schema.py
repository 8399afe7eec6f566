"""The central store's schema as numbered migrations (docs/central-schema.md), and monthly partitions on demand.

Times are UTC seconds since the epoch in ``double precision``, exactly as the stations store them, so a
re-sent row compares equal bit for bit. The large tables are partitioned by month on that column
(declarative RANGE partitioning); a partition is created the first time a row of its month arrives,
whatever the month: a station whose clock was wrong still has its rows kept, in their own partition.
"""

from __future__ import annotations

import datetime as dt

SCHEMA_VERSION = 1
# the tables partitioned by month and the column that places a row
PARTITIONED = {"blocks": "t_start_utc", "running": "t_start_utc", "events": "t_utc", "readings": "t_utc"}

_V1 = """
CREATE TABLE schema_meta (key text PRIMARY KEY, value text NOT NULL);
CREATE TABLE stations (
    station_uuid uuid PRIMARY KEY, name text NOT NULL UNIQUE, latitude_deg double precision,
    longitude_deg double precision, elevation_m double precision, standard text, tier text, convention text,
    block_s double precision, timezone text, created_utc double precision NOT NULL, last_seen_utc double precision,
    last_batch_utc double precision);
CREATE TABLE station_files (
    file_uuid uuid PRIMARY KEY, station_uuid uuid NOT NULL REFERENCES stations, first_seen_utc double precision NOT NULL,
    last_seen_utc double precision NOT NULL, last_batch_no bigint NOT NULL DEFAULT 0, schema_version int,
    software_version text);
CREATE TABLE tokens (
    token_id bigserial PRIMARY KEY, station_uuid uuid NOT NULL REFERENCES stations, token_sha256 text NOT NULL UNIQUE,
    label text, created_utc double precision NOT NULL, revoked_utc double precision, last_used_utc double precision);
CREATE TABLE certificates (
    sha256 text PRIMARY KEY, name text, text text NOT NULL, first_seen_utc double precision NOT NULL);
CREATE TABLE meters (
    station_uuid uuid NOT NULL REFERENCES stations, meter text NOT NULL, port text, certificate text,
    certificate_sha256 text, cert_due text, freq_hz double precision, band_lo_hz double precision,
    band_hi_hz double precision, e_ref_v_per_m double precision, s_ref_w_per_m2 double precision,
    updated_utc double precision NOT NULL, PRIMARY KEY (station_uuid, meter));
CREATE TABLE health (
    station_uuid uuid NOT NULL REFERENCES stations, meter text NOT NULL, observed_utc double precision NOT NULL,
    last_seen_utc double precision, link_state text, battery_pct double precision, temperature_degc double precision,
    drift_ppm double precision, last_e_v_per_m double precision, u_expanded_db double precision,
    PRIMARY KEY (station_uuid, meter));
CREATE TABLE bands (
    station_uuid uuid NOT NULL REFERENCES stations, meter text NOT NULL, band text NOT NULL,
    first_t_utc double precision NOT NULL, last_t_utc double precision NOT NULL, PRIMARY KEY (station_uuid, meter, band));
CREATE TABLE alarms (
    station_uuid uuid NOT NULL REFERENCES stations, rule text NOT NULL, meter text NOT NULL, band text NOT NULL,
    state text NOT NULL, t_on_utc double precision, peak_t_utc double precision, peak_value double precision,
    last_t_utc double precision, updated_utc double precision NOT NULL, PRIMARY KEY (station_uuid, rule, meter, band));
CREATE TABLE blocks (
    station_uuid uuid NOT NULL, meter text NOT NULL, band text NOT NULL, t_start_utc double precision NOT NULL,
    block_s double precision NOT NULL, energy double precision NOT NULL, covered_s double precision NOT NULL,
    n integer NOT NULL, e_rms_v_per_m double precision, e_max_v_per_m double precision, complete boolean NOT NULL,
    n_overrange integer NOT NULL, file_uuid uuid NOT NULL, received_utc double precision NOT NULL,
    PRIMARY KEY (station_uuid, meter, band, t_start_utc)) PARTITION BY RANGE (t_start_utc);
CREATE INDEX blocks_latest ON blocks (station_uuid, t_start_utc DESC);
CREATE TABLE running (
    station_uuid uuid NOT NULL, meter text NOT NULL, band text NOT NULL, window_s double precision NOT NULL,
    t_start_utc double precision NOT NULL, e_end_v_per_m double precision, coverage_end double precision,
    e_max_v_per_m double precision, t_max_utc double precision, file_uuid uuid NOT NULL,
    received_utc double precision NOT NULL,
    PRIMARY KEY (station_uuid, meter, band, window_s, t_start_utc)) PARTITION BY RANGE (t_start_utc);
CREATE TABLE events (
    station_uuid uuid NOT NULL, file_uuid uuid NOT NULL, local_id bigint NOT NULL, t_utc double precision NOT NULL,
    session_id bigint, kind text NOT NULL, severity text NOT NULL, message text, detail text,
    received_utc double precision NOT NULL,
    PRIMARY KEY (file_uuid, local_id, t_utc)) PARTITION BY RANGE (t_utc);
CREATE INDEX events_station ON events (station_uuid, t_utc DESC);
CREATE TABLE readings (
    station_uuid uuid NOT NULL, file_uuid uuid NOT NULL, local_id bigint NOT NULL, session_id bigint NOT NULL,
    boot integer NOT NULL, epoch integer NOT NULL, seq bigint NOT NULL, tick_ms bigint NOT NULL,
    t_utc double precision NOT NULL, raw_x integer NOT NULL, raw_y integer NOT NULL, raw_z integer NOT NULL,
    flags integer, range_index integer, received_utc double precision NOT NULL,
    PRIMARY KEY (file_uuid, local_id, t_utc)) PARTITION BY RANGE (t_utc);
CREATE TABLE conflicts (
    id bigserial PRIMARY KEY, tbl text NOT NULL, station_uuid uuid NOT NULL, file_uuid uuid NOT NULL,
    batch_no bigint NOT NULL, row_key text NOT NULL, stored text NOT NULL, offered text NOT NULL,
    offered_sha256 text NOT NULL, received_utc double precision NOT NULL, UNIQUE (tbl, row_key, offered_sha256));
CREATE TABLE ingest_log (
    id bigserial PRIMARY KEY, t_utc double precision NOT NULL, station_uuid uuid, file_uuid uuid, batch_no bigint,
    tbl text, status int NOT NULL, rows_offered int, rows_new int, rows_conflict int, reason text);
"""

MIGRATIONS = {1: _V1}


def migrate(conn) -> int:
    """Bring the central database up to SCHEMA_VERSION, each migration in its own transaction; the version reached."""
    with conn.transaction():
        conn.execute("SELECT pg_advisory_xact_lock(7301)")        # two services starting at once: one migrates
        have = conn.execute("SELECT to_regclass('schema_meta') IS NOT NULL").fetchone()[0]
        version = int(conn.execute("SELECT value FROM schema_meta WHERE key='schema_version'").fetchone()[0]) \
            if have else 0
        if version > SCHEMA_VERSION:
            from meterlink.errors import MeterlinkError
            raise MeterlinkError(f"central database has schema {version}, newer than this meterlink "
                                 f"({SCHEMA_VERSION}): upgrade meterlink")
        for v in sorted(MIGRATIONS):
            if v <= version:
                continue
            for stmt in MIGRATIONS[v].split(";"):
                if stmt.strip():
                    conn.execute(stmt)
            conn.execute("INSERT INTO schema_meta VALUES ('schema_version', %s) ON CONFLICT (key) DO UPDATE "
                         "SET value = EXCLUDED.value", (str(v),))
            version = v
    return version


def month_bounds(t_utc: float) -> tuple[int, int, str]:
    """(start, end, suffix) of the UTC calendar month holding t_utc, as epoch seconds and 'yYYYYmMM'."""
    d = dt.datetime.fromtimestamp(t_utc, dt.timezone.utc)
    start = dt.datetime(d.year, d.month, 1, tzinfo=dt.timezone.utc)
    end = dt.datetime(d.year + (d.month == 12), d.month % 12 + 1, 1, tzinfo=dt.timezone.utc)
    return int(start.timestamp()), int(end.timestamp()), f"y{d.year:04d}m{d.month:02d}"


class Partitions:
    """Creates monthly partitions the first time a month is seen; remembers those that exist."""

    def __init__(self):
        self.known: set[str] = set()

    def ensure(self, conn, table: str, times) -> None:
        """Make sure the partitions of ``table`` holding every time in ``times`` exist (inside the caller's transaction)."""
        need = {}
        for t in times:
            lo, hi, suffix = month_bounds(t)
            name = f"{table}_{suffix}"
            if name not in self.known:
                need[name] = (lo, hi)
        for name, (lo, hi) in sorted(need.items()):
            # serialise creators: CREATE ... IF NOT EXISTS alone races between two sessions
            conn.execute("SELECT pg_advisory_xact_lock(7302, hashtext(%s))", (name,))
            conn.execute(f"CREATE TABLE IF NOT EXISTS {name} PARTITION OF {table} FOR VALUES FROM ({lo}) TO ({hi})")
            self.known.add(name)

    def forget(self) -> None:
        """After a rolled-back transaction the partitions it created are gone too."""
        self.known.clear()


def valid_time(t) -> bool:
    """A time a partition can hold (years 1..9999 of the calendar; a clock far off is still kept)."""
    return isinstance(t, (int, float)) and not isinstance(t, bool) and -62135596800.0 <= t < 253402300799.0


def valid_times(values) -> bool:
    """valid_time of every value of a column already checked to hold finite numbers only (min and max suffice)."""
    return -62135596800.0 <= min(values) and max(values) < 253402300799.0
