"""The ingest service: a Starlette (ASGI) app served by uvicorn (docs/network.md).

Routes: ``GET /health``; ``POST /api/v1/batches`` (a station's batch, bearer token); the status and public pages with their JSON API
(meterlink.network.pages). A refusal is a 4xx with a one-line ``reason``, logged, and nothing stored; a
database that cannot be reached gives 503, so the station keeps its rows and tries again later.
"""

from __future__ import annotations

import contextlib
import gzip
import json
import logging
import zlib

from meterlink.network.batch import decode
from meterlink.network.central import CentralConfig, CentralError, Pool
from meterlink.network.ingest import Ingest, Refused, authenticate, check_or_refuse

log = logging.getLogger("meterlink.central")


def create_app(cfg: CentralConfig):
    """The ASGI application for this configuration (the schema must be migrated before)."""
    import psycopg
    from starlette.applications import Starlette
    from starlette.concurrency import run_in_threadpool
    from starlette.responses import JSONResponse
    from starlette.routing import Route

    from meterlink.network.pages import add_routes, read_operator_token

    operator_sha256 = read_operator_token(cfg.operator_token_file)     # a bad file stops the start, in one line
    pool = Pool(cfg.dsn, cfg.pool)
    ingests: list[Ingest] = []

    def refuse(status: int, reason: str) -> JSONResponse:
        return JSONResponse({"ok": False, "reason": reason}, status_code=status)

    def health_sync() -> JSONResponse:
        try:
            with pool.connection() as conn:
                v = conn.execute("SELECT value FROM schema_meta WHERE key='schema_version'").fetchone()[0]
            return JSONResponse({"ok": True, "database": "reachable", "schema_version": int(v)})
        except (psycopg.Error, CentralError) as exc:
            return JSONResponse({"ok": False, "database": "unreachable", "reason": _line(exc)}, status_code=503)

    async def health(request):
        return await run_in_threadpool(health_sync)

    def ingest_sync(auth: str | None, raw: bytes, encoding: str | None, peer: str) -> JSONResponse:
        body, station = None, None
        try:
            body, text = _decode(raw, encoding, cfg.max_body_bytes)
            with pool.connection() as conn:
                try:
                    station, token_id = authenticate(conn, auth)
                    body = check_or_refuse(body)
                    body["_raw"] = text           # the rows are unpacked from this text by PostgreSQL
                    ing = ingests.pop() if ingests else Ingest()
                    try:
                        ack = ing.apply(conn, station, body, token_id)
                    finally:
                        ingests.append(ing)
                except Refused as exc:
                    log.warning("refused %d from %s (station %s): %s", exc.status, peer, station or "?", exc.reason)
                    Ingest.log_refusal(conn, exc.status, exc.reason, body, station)
                    return refuse(exc.status, exc.reason)
            return JSONResponse(ack)
        except Refused as exc:       # body not decodable: no database needed to say so
            log.warning("refused %d from %s: %s", exc.status, peer, exc.reason)
            return refuse(exc.status, exc.reason)
        except (psycopg.OperationalError, CentralError) as exc:
            log.error("central database unavailable: %s", _line(exc))
            return refuse(503, f"central database unavailable: {_line(exc)}")
        except psycopg.Error as exc:          # not the station's fault: it keeps the rows and tries again
            log.error("central store error on a batch from %s: %s", peer, _line(exc))
            return refuse(500, f"central store error: {_line(exc)}")

    async def batches(request):
        size = request.headers.get("content-length")
        if size is not None and (not size.isdigit() or int(size) > cfg.max_body_bytes):
            return refuse(413, f"body of {size} bytes exceeds max_body_bytes ({cfg.max_body_bytes})")
        raw = bytearray()
        async for chunk in request.stream():
            raw += chunk
            if len(raw) > cfg.max_body_bytes:
                return refuse(413, f"body exceeds max_body_bytes ({cfg.max_body_bytes})")
        peer = request.client.host if request.client else "?"
        return await run_in_threadpool(ingest_sync, request.headers.get("authorization"), bytes(raw),
                                       request.headers.get("content-encoding"), peer)

    @contextlib.asynccontextmanager
    async def lifespan(app):
        yield
        pool.close()

    # No anonymous station list: stations with their UUIDs are in the operator's /api/v1/status, and what
    # may be published in /api/v1/public/stations (pages.py).
    routes = [Route("/health", health), Route("/api/v1/batches", batches, methods=["POST"])]
    add_routes(routes, pool, operator_sha256)      # status pages (operator login) and public pages
    app = Starlette(routes=routes, lifespan=lifespan)
    app.state.pool = pool
    return app


def _decode(raw: bytes, encoding: str | None, limit: int):
    """(the JSON body, its text) (gzip allowed), or Refused 400/413/415 in one line."""
    enc = (encoding or "identity").strip().lower()
    if enc == "gzip":
        try:
            d = zlib.decompressobj(wbits=31)
            raw = d.decompress(raw, limit + 1)
            if len(raw) > limit or d.unconsumed_tail:
                raise Refused(413, f"decompressed body exceeds max_body_bytes ({limit})")
        except (zlib.error, EOFError, gzip.BadGzipFile) as exc:
            raise Refused(400, f"body is not valid gzip: {exc}") from None
    elif enc != "identity":
        raise Refused(415, f"content encoding {enc[:20]!r} not supported (identity or gzip)")
    try:
        text = raw.decode("utf-8")
        return decode(text), text
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise Refused(400, f"body is not valid JSON: {str(exc)[:120]}") from None


def _line(exc: BaseException) -> str:
    s = str(exc).strip()
    return s.splitlines()[0][:200] if s else type(exc).__name__


def serve(cfg: CentralConfig, log_level: str = "info") -> None:
    """Run the service in the foreground until SIGTERM/SIGINT (uvicorn handles both)."""
    import uvicorn

    logging.basicConfig(level=logging.INFO, format="%(asctime)s %(levelname)s %(name)s: %(message)s")
    uvicorn.run(create_app(cfg), host=cfg.host, port=cfg.port, log_level=log_level, access_log=False)
