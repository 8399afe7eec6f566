"""Central ingest: 6-minute blocks from many station files through the whole sync path (SQLite outbox,
gzip JSON over HTTP on loopback, the ingest service under uvicorn, COPY into staging, INSERT ... ON
CONFLICT DO NOTHING, acknowledgement, cursor advance), against PostgreSQL's own COPY of the same rows
into the same partitioned table of a fresh database, in the same run.

Needs the PostgreSQL server on 127.0.0.1:5432 (trust authentication). Each round uses fresh
databases (created and dropped here); rounds are interleaved and the medians reported, because the
machine is shared. The issue's scale, a year of blocks from 500 stations (about 44 M rows), is
`--stations 500 --blocks 87600 --rounds 1` (about 15 GB of disk while it runs).
"""

from __future__ import annotations

import concurrent.futures
import multiprocessing
import os
import signal
import sqlite3
import statistics
import subprocess
import sys
import tempfile
import time
import urllib.request
import uuid
from pathlib import Path

import _common
from meterlink.network import central
from meterlink.network.central_schema import Partitions, migrate
from meterlink.network.syncd import SyncSettings, sync_once
from meterlink.station import derived
from meterlink.storage.store import Store

ADMIN = "host=127.0.0.1 port=5432 user=postgres dbname=postgres"
T0 = 1_780_000_200.0                 # a block boundary (a multiple of 360 s)
YEAR_ROWS_500 = 500 * 365 * 240      # a year of 6-minute blocks from 500 stations (one meter, one band)


def make_station(path: Path, name: str, n_blocks: int, seed: int) -> None:
    """A station file holding n_blocks 'total' blocks of one meter (not timed)."""
    with Store(path) as store:
        with store.write() as conn:
            derived.ensure_schema(conn)
            conn.execute("INSERT INTO mon_station (name, standard, tier, convention, block_s) "
                         "VALUES (?, 'icnirp-2020', 'public', 'power', 360)", (name,))
            rows = []
            for k in range(n_blocks):
                e = 0.5 + ((k * 7919 + seed * 104729) % 1000) / 1000.0
                rows.append((1, "m1", "total", T0 + 360.0 * k, 360.0, e * e * 360.0, 360.0, 36, e, e * 1.3, 1, 0))
            conn.executemany("INSERT INTO mon_block VALUES (?,?,?,?,?,?,?,?,?,?,?,?)", rows)


def fresh_db(tag: str) -> str:
    import psycopg

    name = f"meterlink_bench_{tag}_{os.getpid()}_{uuid.uuid4().hex[:8]}"
    with psycopg.connect(ADMIN, autocommit=True) as c:
        c.execute(f"CREATE DATABASE {name}")
    dsn = ADMIN.replace("dbname=postgres", f"dbname={name}")
    with psycopg.connect(dsn, autocommit=True) as c:
        migrate(c)
    return dsn


def drop_db(dsn: str) -> None:
    import psycopg

    with psycopg.connect(ADMIN, autocommit=True) as c:
        c.execute(f"DROP DATABASE IF EXISTS {dsn.split('dbname=')[1]} WITH (FORCE)")


def sync_path(files: list[Path], tmp: Path, threads: int) -> tuple[float, int]:
    """Seconds to sync every station file into a fresh central store through the service; rows stored."""
    dsn = fresh_db("sync")
    sock_port = _free_port()
    cfg = tmp / "central.toml"
    cfg.write_text(f'format = "meterlink-central/1"\n[database]\ndsn = "{dsn}"\n[service]\nport = {sock_port}\n'
                   f'pool = {threads}\n')
    proc = subprocess.Popen([sys.executable, "-m", "meterlink", "central", "serve", "--config", str(cfg)],
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, cwd=_common.ROOT)
    try:
        url = f"http://127.0.0.1:{sock_port}"
        _wait_health(url, proc)
        conn = central.connect(dsn)
        creds = []
        for i, _ in enumerate(files):
            su = central.add_station(conn, f"bench {i}")
            creds.append((su, central.create_token(conn, su)[2]))
        conn.close()
        jobs = [(str(f), url, creds[i][1], creds[i][0]) for i, f in enumerate(files)]
        # stations are separate machines: each syncing station is a process of its own, started before timing
        with concurrent.futures.ProcessPoolExecutor(threads, mp_context=multiprocessing.get_context("fork")) as pool:
            list(pool.map(_noop, range(threads)))
            t = time.perf_counter()
            errors = [e for e in pool.map(_sync_file, jobs) if e]
            dt = time.perf_counter() - t
        if errors:
            raise SystemExit(f"sync failed: {errors[0]}")
        import psycopg

        with psycopg.connect(dsn) as c:
            stored = c.execute("SELECT count(*) FROM blocks").fetchone()[0]
        return dt, stored
    finally:
        proc.send_signal(signal.SIGTERM)
        proc.wait(30)
        drop_db(dsn)


def _noop(_):
    return None


def _sync_file(job) -> str | None:
    """One station's sync round (in a worker process); an error as text, or None."""
    path, url, token, su = job
    try:
        with Store(Path(path), create=False) as store:
            sync_once(store, SyncSettings(url=url, token=token, station_uuid=su, batch_rows=20000, timeout_s=120))
    except Exception as exc:  # noqa: BLE001 - reported by the caller
        return repr(exc)
    return None


def copy_baseline(files: list[Path]) -> tuple[float, int]:
    """Seconds for PostgreSQL's COPY of the same rows (text prepared beforehand) into a fresh store's blocks."""
    import psycopg

    dsn = fresh_db("copy")
    try:
        # the COPY text is prepared beforehand (not timed) in a file, so a 44 M-row year does not sit in memory
        text_path = Path(tempfile.mkstemp(prefix="meterlink_copy_", suffix=".tsv", dir=files[0].parent)[1])
        su = [str(uuid.uuid4()) for _ in files]
        fid = [str(uuid.uuid4()) for _ in files]
        times = set()
        n = 0
        with open(text_path, "w", encoding="ascii") as out:
            for i, f in enumerate(files):
                with sqlite3.connect(f) as c:
                    for r in c.execute("SELECT meter, band, t_start_utc, block_s, energy, covered_s, n, e_rms_v_per_m, "
                                       "e_max_v_per_m, complete, n_overrange FROM mon_block"):
                        times.add(r[2])
                        out.write("\t".join((su[i], *(repr(v) if isinstance(v, float) else str(v) for v in r[:9]),
                                              "t" if r[9] else "f", str(r[10]), fid[i], repr(T0))) + "\n")
                        n += 1
        with psycopg.connect(dsn, autocommit=True) as c:
            for i in su:
                c.execute("INSERT INTO stations (station_uuid, name, created_utc) VALUES (%s, %s, 0)", (i, i))
            with c.transaction():
                Partitions().ensure(c, "blocks", times)     # partitions exist before timing, as in a live store
        t = time.perf_counter()
        with psycopg.connect(dsn, autocommit=True) as c:
            with c.transaction():
                with c.cursor().copy("COPY blocks (station_uuid, meter, band, t_start_utc, block_s, energy, covered_s, "
                                     "n, e_rms_v_per_m, e_max_v_per_m, complete, n_overrange, file_uuid, "
                                     "received_utc) FROM STDIN") as cp:
                    with open(text_path, "rb") as fh:
                        while chunk := fh.read(1 << 20):
                            cp.write(chunk)
        dt = time.perf_counter() - t
        with psycopg.connect(dsn) as c:
            assert c.execute("SELECT count(*) FROM blocks").fetchone()[0] == n
        return dt, n
    finally:
        drop_db(dsn)
        if "text_path" in locals():
            text_path.unlink(missing_ok=True)


def _free_port() -> int:
    import socket

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _wait_health(url: str, proc) -> None:
    deadline = time.monotonic() + 30
    while time.monotonic() < deadline:
        if proc.poll() is not None:
            raise SystemExit(f"the ingest service exited with {proc.returncode}")
        try:
            with urllib.request.urlopen(url + "/health", timeout=2):
                return
        except OSError:
            time.sleep(0.05)
    raise SystemExit("the ingest service did not come up")



def main(argv=None) -> int:
    ap = _common.parser(__doc__)
    ap.add_argument("--stations", type=int, default=20)
    ap.add_argument("--blocks", type=int, default=10000, help="blocks per station (10000: about 42 days)")
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--threads", type=int, default=2, help="stations syncing at once (one process each)")
    args = ap.parse_args(argv)
    if args.quick:
        args.stations, args.blocks, args.rounds = 8, 2500, 2
    try:
        import psycopg
        psycopg.connect(ADMIN, connect_timeout=3).close()
    except Exception as exc:  # noqa: BLE001 - one line and a non-zero exit
        print(f"bench_central: no PostgreSQL at 127.0.0.1:5432 with trust auth: {exc}".splitlines()[0])
        return 2
    with tempfile.TemporaryDirectory() as d:
        tmp = Path(d)
        rows = args.stations * args.blocks
        print(f"{args.stations} station files x {args.blocks} blocks = {rows} rows; {args.rounds} interleaved rounds; "
              f"{args.threads} stations at once; load average {os.getloadavg()[0]:.2f}; CPU {_common.cpu_model()}; "
              f"{os.cpu_count()} cores")
        sync_s, copy_s = [], []
        for r in range(args.rounds):
            files = []
            for i in range(args.stations):
                f = tmp / f"r{r}_s{i}.db"
                make_station(f, f"bench {i}", args.blocks, seed=i)
                files.append(f)
            c, n_copy = copy_baseline(files)
            s, n_sync = sync_path(files, tmp, args.threads)
            assert n_sync == n_copy == rows, (n_sync, n_copy, rows)
            sync_s.append(s)
            copy_s.append(c)
            print(f"  round {r + 1}: sync path {s:.2f} s ({rows / s:,.0f} rows/s), COPY {c:.2f} s "
                  f"({rows / c:,.0f} rows/s); load average {os.getloadavg()[0]:.2f}")
            for f in files:
                for p in (f, Path(str(f) + "-wal"), Path(str(f) + "-shm"), Path(str(f) + ".sync-lock")):
                    p.unlink(missing_ok=True)
    s_med, c_med = statistics.median(sync_s), statistics.median(copy_s)
    rate, base = rows / s_med, rows / c_med
    ratio = rate / base
    hours = YEAR_ROWS_500 / rate / 3600
    if rows >= YEAR_ROWS_500:
        scale = f"the full size was run: {rows / 1e6:.1f} M rows in {s_med / 3600:.2f} h"
    else:
        scale = (f"a year of 500 stations ({YEAR_ROWS_500 / 1e6:.1f} M blocks) would take about {hours:.1f} h at "
                 f"this rate (extrapolated, not run; partition and index growth not included)")
    _common.report("central_ingest", f"sync path {rate:,.0f} rows/s (median of {args.rounds}; spread "
                   f"{rows / max(sync_s):,.0f}-{rows / min(sync_s):,.0f}); {scale}",
                   f"PostgreSQL COPY of the same rows into the same partitioned table: {base:,.0f} rows/s (spread "
                   f"{rows / max(copy_s):,.0f}-{rows / min(copy_s):,.0f})",
                   ratio, f"{ratio:.2f}x COPY", ">= 0.3x COPY", ratio >= 0.3, args.json,
                   rows=rows, stations=args.stations, load_avg=os.getloadavg()[0], cpu=_common.cpu_model())
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
