"""Sending a station's outbox to the ingest service: once by hand, or in a background thread of the monitor.

The HTTP client is the standard library's (a station needs nothing more). A batch not acknowledged
(link cut, service or database down: timeout, connection error, 5xx) leaves the file as it was and is
sent again later with the same batch number; a refusal (4xx) is logged with its reason and tried
again only after a long pause (the central side may be upgraded meanwhile). Nothing is deleted here.
"""

from __future__ import annotations

import fcntl
import gzip
import json
import os
import threading
import time
import urllib.error
import urllib.parse
import urllib.request
import uuid
from dataclasses import dataclass, field
from pathlib import Path

from meterlink import __version__
from meterlink.errors import MeterlinkError
from meterlink.network import outbox
from meterlink.network.batch import FORMAT, encode


class SyncError(MeterlinkError):
    """A sync setting that cannot be used, or a file that another sync is sending."""


class Unavailable(Exception):
    """The batch was not acknowledged: the link, the service or its database is down. Try again later."""


class RefusedByCentral(Exception):
    """The service refused the batch (4xx) with a one-line reason; nothing was stored there."""

    def __init__(self, status: int, reason: str):
        super().__init__(f"{status}: {reason}")
        self.status, self.reason = status, reason


@dataclass(frozen=True)
class SyncSettings:
    """Where and as whom a station sends (station file ``[central]``, docs/station-file.md)."""

    url: str
    token: str
    station_uuid: str
    every_s: float = 60.0
    batch_rows: int = 5000
    send_raw: bool = False
    timeout_s: float = 30.0


def settings_from_table(central: dict, src: str, base: Path) -> SyncSettings:
    """Settings from a parsed ``[central]`` table; SyncError naming the key otherwise."""
    def fail(key, problem):
        raise SyncError(f"{src}: central.{key}: {problem}")

    known = {"url", "token", "token_file", "station_uuid", "every_s", "batch_rows", "send_raw", "timeout_s"}
    for k in central:
        if k not in known:
            fail(k, "unknown key")
    url = central.get("url")
    if not isinstance(url, str) or urllib.parse.urlsplit(url).scheme not in ("http", "https") \
            or not urllib.parse.urlsplit(url).netloc:
        fail("url", f"expected an http:// or https:// URL of the central service, got {url!r}")
    if ("token" in central) == ("token_file" in central):
        fail("token_file", "give exactly one of token_file (recommended) and token")
    if "token_file" in central:
        tf = central["token_file"]
        if not isinstance(tf, str):
            fail("token_file", "expected a path")
        p = Path(tf) if Path(tf).is_absolute() else base / tf
        try:
            token = p.read_text(encoding="utf-8").strip()
        except (OSError, UnicodeDecodeError) as exc:
            fail("token_file", f"cannot read {str(p)!r}: {getattr(exc, 'strerror', None) or exc}")
    else:
        token = central["token"]
    if not isinstance(token, str) or not token or any(c.isspace() for c in token) or len(token) > 200:
        fail("token", "expected the token printed by 'meterlink central token create'")
    try:
        su = str(uuid.UUID(str(central.get("station_uuid"))))
    except ValueError:
        fail("station_uuid", f"expected the station's UUID, got {central.get('station_uuid')!r}")
    nums = {}
    for k, default, lo, hi in (("every_s", 60.0, 1.0, 86400.0), ("batch_rows", 5000, 1, 50000),
                               ("timeout_s", 30.0, 1.0, 600.0)):
        v = central.get(k, default)
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not lo <= v <= hi:
            fail(k, f"expected a number in [{lo:g}, {hi:g}], got {v!r}")
        nums[k] = v
    if not isinstance(nums["batch_rows"], int):
        fail("batch_rows", "expected an integer")
    raw = central.get("send_raw", False)
    if not isinstance(raw, bool):
        fail("send_raw", f"expected true or false, got {raw!r}")
    return SyncSettings(url=url.rstrip("/"), token=token, station_uuid=su, send_raw=raw, **nums)


class Client:
    """POSTs batches to ``{url}/api/v1/batches`` as gzip JSON with the station's bearer token."""

    def __init__(self, settings: SyncSettings):
        self.s = settings

    def post(self, body: dict) -> dict:
        data = gzip.compress(encode(body), 1)
        req = urllib.request.Request(self.s.url + "/api/v1/batches", data=data, method="POST", headers={
            "Content-Type": "application/json", "Content-Encoding": "gzip",
            "Authorization": f"Bearer {self.s.token}"})
        try:
            with urllib.request.urlopen(req, timeout=self.s.timeout_s) as resp:
                return json.loads(resp.read())
        except urllib.error.HTTPError as exc:
            try:
                reason = json.loads(exc.read()).get("reason") or exc.reason
            except Exception:  # noqa: BLE001 - a proxy's HTML page, a cut body: the status says enough
                reason = str(exc.reason)
            if 400 <= exc.code < 500 and exc.code not in (408, 429):
                raise RefusedByCentral(exc.code, str(reason)) from None
            raise Unavailable(f"HTTP {exc.code}: {reason}") from None
        except (urllib.error.URLError, OSError, ValueError) as exc:   # refused, reset, timeout, cut reply
            raise Unavailable(str(getattr(exc, "reason", exc))) from None


@dataclass
class Summary:
    """What one sync round did."""

    batches: int = 0
    rows: int = 0
    new: int = 0
    duplicate: int = 0
    conflicts: int = 0
    pending: dict = field(default_factory=dict)
    error: str | None = None

    def line(self) -> str:
        left = sum(self.pending.values())
        s = (f"{self.batches} batch(es), {self.rows} row(s) acknowledged ({self.new} new, {self.duplicate} already "
             f"there, {self.conflicts} conflict(s)); {left} row(s) waiting")
        return s + (f"; stopped: {self.error}" if self.error else "")


class FileLock:
    """One sync per database file at a time (an flock beside the file; released by the kernel on death)."""

    def __init__(self, db_path: Path):
        self.db_path = Path(db_path)
        self.path = Path(str(db_path) + ".sync-lock")
        self.fd: int | None = None

    def __enter__(self):
        self.fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
        try:
            fcntl.flock(self.fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            os.close(self.fd)
            self.fd = None
            raise SyncError(f"{self.db_path}: another sync of this file is running") from None
        return self

    def __exit__(self, *exc):
        if self.fd is not None:
            os.close(self.fd)
            self.fd = None


def sync_once(store, settings: SyncSettings, client: Client | None = None, max_batches: int | None = None,
              stop: threading.Event | None = None) -> Summary:
    """Send every pending batch (or up to max_batches); raises Unavailable/RefusedByCentral after
    recording what was acknowledged before in the returned summary's place (see Summary.error)."""
    client = client or Client(settings)
    conn = store.db.conn
    with store.write():
        outbox.enable(conn, settings.send_raw)
    out = Summary()
    fid = outbox.file_uuid(conn)
    schema = store.schema_version
    try:
        for tbl in outbox.tables(conn):
            while max_batches is None or out.batches < max_batches:
                if stop is not None and stop.is_set():
                    break
                rows, upto = outbox.next_rows(conn, tbl, settings.batch_rows)
                if upto is None:
                    break
                n = outbox.batch_no(conn) + 1
                snap = outbox.snapshot(conn)
                certs = outbox.certificates_unsent(conn, snap["meters"])
                body = {"format": FORMAT, "station_uuid": settings.station_uuid, "file_uuid": fid, "batch_no": n,
                        "schema_version": schema, "software_version": __version__, **snap, "certificates": certs,
                        "table": tbl, "columns": [c for c, _ in outbox.TABLES[tbl]], "rows": rows}
                ack = client.post(body)
                if not (isinstance(ack, dict) and ack.get("ok") is True and ack.get("batch_no") == n
                        and ack.get("rows") == len(rows)):
                    raise Unavailable(f"unexpected acknowledgement {str(ack)[:120]!r}")
                outbox.acknowledge(store, tbl, upto, len(rows), n, [c["sha256"] for c in certs])
                out.batches += 1
                out.rows += len(rows)
                out.new += int(ack.get("new", 0))
                out.duplicate += int(ack.get("duplicate", 0))
                out.conflicts += int(ack.get("conflicts", 0))
        if out.batches == 0 and (max_batches is None or max_batches > 0):   # nothing to send: say we are alive
            n = outbox.batch_no(conn) + 1
            snap = outbox.snapshot(conn)
            certs = outbox.certificates_unsent(conn, snap["meters"])
            ack = client.post({"format": FORMAT, "station_uuid": settings.station_uuid, "file_uuid": fid,
                               "batch_no": n, "schema_version": schema, "software_version": __version__,
                               **snap, "certificates": certs})
            if isinstance(ack, dict) and ack.get("ok") is True and ack.get("batch_no") == n:
                with store.write() as c:
                    outbox.set_batch_no(c, n)
                    outbox.certificates_sent(c, [x["sha256"] for x in certs])
    except (Unavailable, RefusedByCentral) as exc:
        out.error = str(exc)
        out.pending = outbox.pending(conn)
        exc.summary = out
        raise
    out.pending = outbox.pending(conn)
    return out


class Syncer:
    """The monitor's background sync: a thread with its own connection to the station file."""

    PAUSE_REFUSED_S = 3600.0

    def __init__(self, db_path: Path, settings: SyncSettings, log=None):
        self.db_path, self.s = Path(db_path), settings
        self.log = log or (lambda line: None)
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name="meterlink-sync", daemon=True)
        self.rounds = 0

    def start(self) -> "Syncer":
        self._thread.start()
        return self

    def stop(self, timeout_s: float = 10.0) -> None:
        self._stop.set()
        self._thread.join(timeout_s)

    def _run(self) -> None:
        from meterlink.storage.store import Store

        delay = self.s.every_s
        client = Client(self.s)
        while not self._stop.is_set():
            try:
                with FileLock(self.db_path), Store(self.db_path, create=False) as store:
                    summary = sync_once(store, self.s, client, stop=self._stop)
                if summary.rows:
                    self.log(f"{_iso()} INFO    sync: {summary.line()}")
                delay = self.s.every_s
            except Unavailable as exc:
                delay = min(max(delay * 2, self.s.every_s), 1800.0)
                self.log(f"{_iso()} WARNING sync: central service unavailable ({exc}); next try in {delay:.0f} s")
            except RefusedByCentral as exc:
                delay = self.PAUSE_REFUSED_S
                self.log(f"{_iso()} ERROR   sync refused by the central service ({exc}); rows kept, next try in "
                         f"{delay:.0f} s")
            except Exception as exc:  # noqa: BLE001 - the monitor must go on acquiring whatever the sync does
                delay = min(max(delay * 2, self.s.every_s), 1800.0)
                self.log(f"{_iso()} ERROR   sync: {type(exc).__name__}: {exc}; next try in {delay:.0f} s")
            self.rounds += 1
            self._stop.wait(delay)


def start_for(station, log=None) -> Syncer | None:
    """Start the background sync of a parsed station file that names a central service ([central]), else None."""
    central = getattr(station, "central", None)
    if not central:
        return None
    try:
        settings = settings_from_table(central, str(station.path), Path(station.path).parent)
    except SyncError as exc:     # the file was checked when parsed; a token file gone since: say so, acquire on
        (log or print)(f"{_iso()} ERROR   sync not started: {exc}")
        return None
    return Syncer(station.database, settings, log).start()


def stop(syncer: Syncer | None) -> None:
    """Stop a background sync started by start_for (None: nothing to stop)."""
    if syncer is not None:
        syncer.stop()


def _iso() -> str:
    return time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())
