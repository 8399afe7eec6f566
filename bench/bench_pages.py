"""Network pages: the operator status page for 500 stations under 20 concurrent clients, and one station's
30-day plot, served by the real central service (uvicorn, one process) from a real PostgreSQL store.

Seeding (not timed): 500 stations with a meter each, a few active alarms, and --days of 6-minute blocks
per station loaded with COPY into the monthly partitions. Load generator: an asyncio HTTP/1.1 client on
loopback with 20 keep-alive connections, each sending its next request as soon as the last answer is read.
Baselines in the same run: ``/health`` (the same server, one trivial query) under the same load, and the
plot's own SQL run directly with psycopg (the database's share). The plans of the page queries are
printed and checked to use the index (blocks primary key per partition), not a sequential scan.
"""

from __future__ import annotations

import asyncio
import io
import os
import signal
import socket
import statistics
import subprocess
import sys
import tempfile
import time
import urllib.request
import uuid
from pathlib import Path

import numpy as np

import _common
from meterlink.network.central_schema import Partitions, migrate

ADMIN = "host=127.0.0.1 port=5432 user=postgres dbname=postgres"
TOKEN = "bench-operator-token-0123456789"
T_END = 1_780_000_200.0 + 30 * 86400.0       # the newest block boundary of the seeded data (a multiple of 360 s)



def seed(dsn: str, stations: int, days: float) -> tuple[list[str], int]:
    """Stations, meters, alarms and blocks (COPY); returns (station uuids, blocks stored)."""
    import psycopg

    n = int(days * 240)
    t = T_END - 360.0 * np.arange(n, 0, -1)
    uuids = [str(uuid.UUID(int=0x5EED << 96 | i)) for i in range(stations)]
    file_uuid = str(uuid.UUID(int=0xF11E << 96))
    now = time.time()
    rng = np.random.default_rng(17)
    with psycopg.connect(dsn, autocommit=True) as c:
        with c.transaction():
            Partitions().ensure(c, "blocks", [float(t[0]), float(t[-1])] + [float(x) for x in t[::240 * 28]])
            with c.cursor().copy("COPY stations (station_uuid, name, standard, tier, convention, block_s, "
                                 "created_utc, last_seen_utc) FROM STDIN") as cp:
                for i, su in enumerate(uuids):
                    cp.write_row((su, f"bench station {i:03d}", "icnirp-2020", "public",
                                  "field" if i % 3 == 0 else "power", 360.0, now, now - (i % 7) * 600.0))
            with c.cursor().copy("COPY meters (station_uuid, meter, freq_hz, e_ref_v_per_m, s_ref_w_per_m2, "
                                 "updated_utc) FROM STDIN") as cp:
                for su in uuids:
                    cp.write_row((su, "m1", 100e6, 27.7, 2.0, now))
            with c.cursor().copy("COPY alarms (station_uuid, rule, meter, band, state, t_on_utc, updated_utc) "
                                 "FROM STDIN") as cp:
                for su in uuids[::50]:
                    cp.write_row((su, "block-over-50pct", "m1", "total", "active", T_END - 3600.0, now))
        stored = 0
        ts = [repr(float(x)) for x in t]
        for su in uuids:
            e = 0.5 + 0.4 * np.sin(t / 5000.0 + rng.uniform(0, 6.28)) + rng.uniform(0, 0.05, n)
            buf = io.StringIO()
            buf.writelines(f"{su}\tm1\ttotal\t{tt}\t360\t{ee * ee * 360.0!r}\t360\t36\t{ee!r}\t{ee * 1.3!r}\tt\t0\t"
                           f"{file_uuid}\t{now}\n" for tt, ee in zip(ts, e.tolist()))
            with c.transaction(), c.cursor().copy("COPY blocks FROM STDIN") as cp:
                cp.write(buf.getvalue())
            stored += n
        c.execute("ANALYZE")
    return uuids, stored


def plans(dsn: str, su: str) -> dict[str, str]:
    """EXPLAIN of the overview and of the 30-day envelope; each must use an index on blocks."""
    import psycopg

    from meterlink.network import queries

    out = {}
    with psycopg.connect(dsn, autocommit=True) as c:
        p = "\n".join(r[0] for r in c.execute("EXPLAIN " + queries._OVERVIEW).fetchall())
        out["overview"] = p
        t0, w = T_END - 30 * 86400.0, 30 * 86400.0 / 240
        cur = psycopg.ClientCursor(c)          # binds on the client, as EXPLAIN takes no server parameters
        cur.execute("EXPLAIN " + queries.ENVELOPE, (t0, t0, w, w, su, "m1", t0, T_END))
        out["envelope"] = "\n".join(r[0] for r in cur.fetchall())
    for k, p in out.items():
        if "Seq Scan on blocks" in p or "Index" not in p:
            raise SystemExit(f"the {k} query does not use an index on blocks:\n{p}")
    return out


async def _client(port: int, path: str, auth: str, until: float, lat: list[float], status: list[int]) -> None:
    r, w = await asyncio.open_connection("127.0.0.1", port)
    req = f"GET {path} HTTP/1.1\r\nHost: 127.0.0.1\r\nAuthorization: {auth}\r\n\r\n".encode()
    try:
        while time.perf_counter() < until:
            t0 = time.perf_counter()
            w.write(req)
            head = await r.readuntil(b"\r\n\r\n")
            length = 0
            for line in head.split(b"\r\n"):
                if line.lower().startswith(b"content-length:"):
                    length = int(line.split(b":")[1])
            await r.readexactly(length)
            lat.append(time.perf_counter() - t0)
            status.append(int(head.split(b" ", 2)[1]))
    finally:
        w.close()


def load(port: int, path: str, clients: int, seconds: float) -> tuple[list[float], list[int]]:
    """Latencies (s) of every request answered in ``seconds`` by ``clients`` concurrent connections."""
    import base64

    auth = "Basic " + base64.b64encode(f"operator:{TOKEN}".encode()).decode()
    lat: list[float] = []
    status: list[int] = []

    async def run():
        until = time.perf_counter() + seconds
        await asyncio.gather(*(_client(port, path, auth, until, lat, status) for _ in range(clients)))

    asyncio.run(run())
    return lat, status


def pct(xs, q) -> float:
    return float(np.percentile(np.asarray(xs), q))


def main() -> int:
    ap = _common.parser(__doc__)
    ap.add_argument("--stations", type=int, default=500)
    ap.add_argument("--days", type=float, default=30.0)
    ap.add_argument("--clients", type=int, default=20)
    ap.add_argument("--seconds", type=float, default=15.0)
    args = ap.parse_args()
    if args.quick:
        args.stations, args.days, args.seconds = 100, 3.0, 5.0
    import psycopg

    name = f"meterlink_bench_pages_{os.getpid()}"
    try:
        with psycopg.connect(ADMIN, autocommit=True, connect_timeout=5) as c:
            c.execute(f"CREATE DATABASE {name}")
    except psycopg.Error as exc:
        print(f"bench_pages: PostgreSQL on 127.0.0.1:5432 is needed: {str(exc).strip().splitlines()[0]}", file=sys.stderr)
        return 2
    dsn = ADMIN.replace("dbname=postgres", f"dbname={name}")
    proc = None
    try:
        with psycopg.connect(dsn, autocommit=True) as c:
            migrate(c)
        t0 = time.perf_counter()
        uuids, stored = seed(dsn, args.stations, args.days)
        print(f"  seeded {args.stations} stations, {stored:,} blocks with COPY in {time.perf_counter() - t0:.1f} s")
        for k, p in plans(dsn, uuids[1]).items():
            print(f"  plan of the {k} query (first lines):")
            for line in p.splitlines()[:12]:
                print("    " + line)
        with tempfile.TemporaryDirectory() as tmp:
            with socket.socket() as s:
                s.bind(("127.0.0.1", 0))
                port = s.getsockname()[1]
            Path(tmp, "operator.token").write_text(TOKEN + "\n")
            cfg = Path(tmp, "central.toml")
            cfg.write_text(f'format = "meterlink-central/1"\n[database]\ndsn = "{dsn}"\n[service]\nport = {port}\n'
                           f'pool = 8\noperator_token_file = "operator.token"\n')
            proc = subprocess.Popen([sys.executable, "-m", "meterlink", "central", "serve", "--config", str(cfg)],
                                    stdout=subprocess.DEVNULL, stderr=open(Path(tmp, "service.log"), "wb"))
            base = f"http://127.0.0.1:{port}"
            for _ in range(200):
                try:
                    urllib.request.urlopen(base + "/health", timeout=2).close()
                    break
                except OSError:
                    time.sleep(0.1)
            req = urllib.request.Request(base + "/status", headers={"Authorization": f"Bearer {TOKEN}"})
            html = urllib.request.urlopen(req, timeout=30).read().decode()
            assert html.count("<tr>") >= args.stations and "bench station 499"[: 14] in html
            load(port, "/status", args.clients, 2.0)                     # warm up
            rounds = 3
            st_p95, he_p95, st_n, he_n = [], [], 0, 0
            for r in range(rounds):                                     # interleaved: the machine is shared
                lat, status = load(port, "/status", args.clients, args.seconds)
                assert set(status) == {200}, set(status)
                lat_h, status_h = load(port, "/health", args.clients, args.seconds / 3)
                assert set(status_h) == {200}, set(status_h)
                st_p95.append(pct(lat, 95))
                he_p95.append(pct(lat_h, 95))
                st_n += len(lat)
                he_n += len(lat_h)
                print(f"  round {r + 1}: /status p50 {pct(lat, 50) * 1e3:.0f} ms, p95 {st_p95[-1] * 1e3:.0f} ms "
                      f"({len(lat) / args.seconds:.1f} pages/s); /health p95 {he_p95[-1] * 1e3:.1f} ms; "
                      f"load average {os.getloadavg()[0]:.2f}")
            # a page built afresh: the first request after the page cache (CACHE_S) has expired
            from meterlink.network.pages import CACHE_S

            cold = []
            req = urllib.request.Request(base + "/status", headers={"Authorization": f"Bearer {TOKEN}"})
            for _ in range(5):
                time.sleep(CACHE_S + 0.1)
                t = time.perf_counter()
                urllib.request.urlopen(req, timeout=30).read()
                cold.append(time.perf_counter() - t)
            print(f"  /status built afresh (cache expired, no other load): {', '.join(f'{c * 1e3:.0f}' for c in cold)} ms")
            # one station's 30-day plot, one request at a time, and its SQL alone
            from meterlink.network import queries

            plot_s, sql_s = [], []
            su = uuids[1]
            req = urllib.request.Request(base + f"/status/plot/30d/{su}", headers={"Authorization": f"Bearer {TOKEN}"})
            with psycopg.connect(dsn, autocommit=True) as c:
                for _ in range(40):
                    t = time.perf_counter()
                    svg = urllib.request.urlopen(req, timeout=30).read()
                    plot_s.append(time.perf_counter() - t)
                    t = time.perf_counter()
                    pts = queries.envelope(c, su, "m1", T_END - 30 * 86400.0, T_END, 240)
                    sql_s.append(time.perf_counter() - t)
            assert svg.startswith(b"<svg") and b"<polygon" in svg and len(pts) > 10
    finally:
        if proc is not None:
            proc.send_signal(signal.SIGTERM)
            proc.wait(30)
        with psycopg.connect(ADMIN, autocommit=True) as c:
            c.execute(f"DROP DATABASE IF EXISTS {name} WITH (FORCE)")
    la, cpu = os.getloadavg()[0], _common.cpu_model()
    s95, h95 = statistics.median(st_p95), statistics.median(he_p95)
    full = args.stations >= 500 and args.clients >= 20
    _common.report("pages_status", f"/status with {args.stations} stations, {args.clients} concurrent clients: "
                   f"p95 {s95 * 1e3:.0f} ms (median of {rounds} rounds; spread {min(st_p95) * 1e3:.0f}-"
                   f"{max(st_p95) * 1e3:.0f} ms; {st_n} requests; the page is rebuilt at most every {CACHE_S:g} s, "
                   f"built afresh it took median {statistics.median(cold) * 1e3:.0f} ms)",
                   f"/health (same server, one trivial query) under the same load: p95 {h95 * 1e3:.1f} ms "
                   f"(spread {min(he_p95) * 1e3:.1f}-{max(he_p95) * 1e3:.1f} ms)",
                   s95 / h95, f"{s95 / h95:.1f}x /health", "p95 < 200 ms for 500 stations, 20 clients",
                   (s95 < 0.2) if full else None, args.json, load_avg=la, cpu=cpu, stations=args.stations,
                   built_afresh_ms=[round(c * 1e3, 1) for c in cold], cache_s=CACHE_S)
    p_med, q_med = statistics.median(plot_s), statistics.median(sql_s)
    _common.report("pages_plot_30d", f"one station's 30-day plot (SVG, {int(args.days * 240)} blocks reduced to "
                   f"240 min/max slices): median {p_med * 1e3:.1f} ms, p95 {pct(plot_s, 95) * 1e3:.1f} ms, max "
                   f"{max(plot_s) * 1e3:.1f} ms (40 requests)",
                   f"the envelope SQL alone via psycopg: median {q_med * 1e3:.1f} ms (spread {min(sql_s) * 1e3:.1f}-"
                   f"{max(sql_s) * 1e3:.1f} ms)",
                   p_med / q_med, f"{p_med / q_med:.1f}x the SQL alone", "< 300 ms",
                   (pct(plot_s, 95) < 0.3) if args.days >= 30 else None, args.json, load_avg=la, cpu=cpu)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
