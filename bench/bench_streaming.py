"""Long probe records streamed: recalibrate, assess and report 30 days at 1 Hz, each against a baseline
run alongside in the same run; peak RSS of the three commands (30 days, and a year with --year);
Store calls made while producing one session report.

The database is made fast with the Store's batched writer (add_reading_arrays), its counts from the
demo certificate's own detector law. Timed runs are paired (baseline and streamed back to back,
alternating which goes first) with tracemalloc off; the tables give medians of the runs and the
spread of the per-pair ratios. Peak RSS is measured apart, each command in its own subprocess
(ru_maxrss of that process).
"""

from __future__ import annotations

import csv
import itertools
import os
import platform
import shutil
import sqlite3
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

import _common
from meterlink.physics.assessment import assess_field, assess_field_stats, averaging_time_s
from meterlink.physics.calibrate import calibrate_axes, expected_counts
from meterlink.physics.certificate import dump_certificate, load_certificate
from meterlink.reports.session_report import write_session_report
from meterlink.storage import streamed as S
from meterlink.storage.processing import field_series
from meterlink.storage.recording import CHUNK_ROWS, load_recording
from meterlink.storage.store import Store

FREQ_HZ = 101.8e6
T0 = 1_790_000_000.0
STANDARD, TIER, RULE = "icnirp-2020", "public", "guarded"


def machine() -> dict:
    """CPU model and load average, so that a figure can be read against the machine it came from."""
    cpu = platform.processor() or "?"
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    return {"cpu": cpu, "cores": os.cpu_count(), "load_avg_1m": round(os.getloadavg()[0], 2)}


def build(path: Path, n: int) -> int:
    """A probe session of n readings at 1 Hz (one boot), stored with add_reading_arrays."""
    cert = load_certificate("demo-probe")
    with Store(path) as store:
        dev = store.device_id("BENCH-1", "B-0001", cert.serial, cert.certificate_number, 1, "1.0.0", "1.0")
        sid = store.begin_session("record", "bench", dev, 1000, freq_hz=FREQ_HZ)
        step = 1 << 20
        for k in range(0, n, step):
            i = np.arange(k, min(k + step, n))
            e_axis = (4.0 + 2.0 * np.sin(2 * np.pi * i / 86400.0) + 0.3 * np.sin(i / 7.0)) / np.sqrt(3.0)
            counts = np.stack([np.round(expected_counts(ax, e_axis)) for ax in cert.axes], axis=1).astype(np.int64)
            store.add_reading_arrays(sid, 1, i, i * 1000, T0 + i, counts, 0, 0)
        store.add_event(sid, "assessment", "info", "bench", outcome="-", standard=STANDARD, tier=TIER, rule=RULE)
    return sid


# -- baselines: the plain way, in the same run ----------------------------------------------------
def _ranges(conn, sid, rows):
    for lo, hi in conn.execute("select id_lo, id_hi from reading_spans where session_id = ? order by id_lo", [sid]):
        for a in range(lo, hi + 1, rows):
            yield a, min(a + rows - 1, hi)


def _baseline_calibration(conn, sid, cert) -> int:
    """A calibrations row for a baseline's values (with the certificate, so that the file reads back)."""
    cal = conn.execute("insert into calibrations (session_id, certificate_name, certificate_text, applied_utc) "
                       "values (?, 'baseline', ?, ?)", [sid, dump_certificate(cert), time.time()]).lastrowid
    conn.commit()
    return cal


def _raw_chunks(conn, sid):
    """(ids, t_utc, counts) of a session by the streamed path's chunks: select of the raw columns by id range."""
    for lo, hi in list(_ranges(conn, sid, CHUNK_ROWS)):
        a = np.array(conn.execute("select id, t_utc, raw_x, raw_y, raw_z from readings where id between ? and ? and "
                                  "session_id = ? order by id", [lo, hi, sid]).fetchall(), dtype=np.float64)
        if a.size:
            yield a[:, 0].astype(np.int64), a[:, 1], a[:, 2:5].astype(np.int64)


def baseline_recalibrate_rows(path: Path, sid: int, cert) -> int:
    """The issue's baseline: streamed select of raw counts, numpy calibration, executemany of one row per
    reading into field_values (every column of a calibration's values), by the streamed path's chunks."""
    conn = sqlite3.connect(path)
    conn.execute("PRAGMA synchronous=NORMAL")     # as the Store's connection: no fsync per commit in WAL mode
    cal = _baseline_calibration(conn, sid, cert)
    for ids, _t, raw in _raw_chunks(conn, sid):
        res = calibrate_axes(cert, raw, FREQ_HZ, None)
        conn.executemany("insert into field_values (reading_id, calibration_id, e_v_per_m, ex_v_per_m, ey_v_per_m, "
                         "ez_v_per_m, h_a_per_m, s_w_per_m2, u_expanded_db, flags) values (?,?,?,?,?,?,?,?,?,?)",
                         zip(ids.tolist(), itertools.repeat(cal), res.e_v_per_m.tolist(),
                             *(res.axes_v_per_m[:, j].tolist() for j in range(3)), res.h_a_per_m.tolist(),
                             res.s_w_per_m2.tolist(), res.u_expanded_db.tolist(), res.flags.tolist()))
        conn.commit()
    conn.close()
    return cal


def baseline_recalibrate_packed(path: Path, sid: int, cert) -> int:
    """The same-output baseline: streamed select of raw counts, numpy calibration, one packed field_spans
    row per chunk as docs/schema.md gives it (each column's little-endian bytes; the id column empty when
    the ids run without a hole, uncertainty and flags one element when constant; H an empty blob, the
    demo certificate being an E probe used in the far field, so that H = E / Z0)."""
    conn = sqlite3.connect(path)
    conn.execute("PRAGMA synchronous=NORMAL")
    cal = _baseline_calibration(conn, sid, cert)
    for ids, t, raw in _raw_chunks(conn, sid):
        res = calibrate_axes(cert, raw, FREQ_HZ, None)
        u, fl = res.u_expanded_db, res.flags
        conn.execute("insert into field_spans (calibration_id, id_lo, id_hi, n, t_lo, t_hi, reading_id, t_utc, "
                     "e_v_per_m, axes_v_per_m, u_expanded_db, flags, h_a_per_m) values (?,?,?,?,?,?,?,?,?,?,?,?,?)",
                     [cal, int(ids[0]), int(ids[-1]), ids.size, float(t.min()), float(t.max()),
                      b"" if ids[-1] - ids[0] + 1 == ids.size else ids.astype("<i8").tobytes(),
                      t.astype("<f8").tobytes(), res.e_v_per_m.astype("<f8").tobytes(),
                      res.axes_v_per_m.astype("<f8").tobytes(),
                      (u[:1] if np.all(u == u[0]) else u).astype("<f8").tobytes(),
                      (fl[:1] if np.all(fl == fl[0]) else fl).astype("<i8").tobytes(), b""])
        conn.commit()
    conn.close()
    return cal


def same_packed(path: Path, cal_a: int, cal_b: int) -> bool:
    """Whether two calibrations hold the same field_spans rows, byte for byte."""
    conn = sqlite3.connect(path)
    try:
        cols = "id_lo, id_hi, n, t_lo, t_hi, reading_id, t_utc, e_v_per_m, axes_v_per_m, u_expanded_db, flags, h_a_per_m"
        return (conn.execute(f"select {cols} from field_spans where calibration_id = ? order by id_lo", [cal_a]).fetchall()
                == conn.execute(f"select {cols} from field_spans where calibration_id = ? order by id_lo",
                                [cal_b]).fetchall())
    finally:
        conn.close()


def same_values(path: Path, cal_a: int, cal_b: int) -> bool:
    """Whether two calibrations give the same values through Store.field_values (every column, H and S
    included), whichever way each is stored: here per reading against packed."""
    with Store(path, readonly=True) as store:
        a, b = store.field_values(cal_a), store.field_values(cal_b)
    return all(np.array_equal(a[k], b[k], equal_nan=True) for k in a) and a.keys() == b.keys()


def used_bytes(path: Path) -> int:
    """Bytes of the file's pages in use, after a checkpoint ((page_count - freelist_count) * page_size)."""
    conn = sqlite3.connect(path)
    try:
        conn.execute("PRAGMA wal_checkpoint(TRUNCATE)")
        return ((conn.execute("PRAGMA page_count").fetchone()[0] - conn.execute("PRAGMA freelist_count").fetchone()[0])
                * conn.execute("PRAGMA page_size").fetchone()[0])
    finally:
        conn.close()


def baseline_report(path: Path, sid: int, cal: int, out: Path) -> None:
    """Select the rows values.csv holds (values joined with reading times) and csv.writer them."""
    conn = sqlite3.connect(path)
    with open(out, "w", newline="") as f:
        w = csv.writer(f)
        for row in conn.execute("select r.id, r.t_utc, v.e_v_per_m, v.ex_v_per_m, v.ey_v_per_m, v.ez_v_per_m, "
                                "v.u_expanded_db, v.flags from readings r join field_values v on v.reading_id = r.id "
                                "and v.calibration_id = ? where r.session_id = ? order by r.id", [cal, sid]):
            w.writerow(row)
    conn.close()


def baseline_raw_dump(path: Path, sid: int, out: Path) -> None:
    """The earlier bench_report baseline: select the raw readings (no join) and csv.writer them."""
    conn = sqlite3.connect(path)
    with open(out, "w", newline="") as f:
        w = csv.writer(f)
        for row in conn.execute("select id, t_utc, raw_x, raw_y, raw_z from readings where session_id = ? "
                                "order by id", [sid]):
            w.writerow(row)
    conn.close()


def drop_calibration(path: Path, cal: int) -> None:
    """Remove a timed run's calibration again and checkpoint the write-ahead log (not timed), so that every
    run starts from the same file and none pays for moving the previous run's pages into it."""
    with Store(path) as store:
        store.drop_calibration(cal)
        store.make_room()


# -- the streamed paths ---------------------------------------------------------------------------
def streamed_recalibrate(path: Path, sid: int, cert) -> int:
    with Store(path) as store:
        return S.recalibrate(store, load_recording(store, sid), cert).calibration_id


def streamed_assess(path: Path, sid: int):
    with Store(path, readonly=True) as store:
        rec = load_recording(store, sid)
        window = averaging_time_s(STANDARD, TIER, FREQ_HZ)
        stats = S.field_stats(rec, window)
        return assess_field_stats(stats, S.series_facts(rec), STANDARD, TIER, RULE, freq_hz=FREQ_HZ,
                                  fallback_range=rec.certificate.freq_range_hz)


def in_memory_assess(path: Path, sid: int):
    with Store(path, readonly=True) as store:
        series = field_series(store, sid)
        cert = load_recording(store, sid).certificate
    return assess_field(series, STANDARD, TIER, RULE, freq_hz=FREQ_HZ, fallback_range=cert.freq_range_hz)


def timed(f, *a):
    t = time.perf_counter()
    out = f(*a)
    return time.perf_counter() - t, out


def paired(runs: int, mine, base):
    """(medians mine, base; per-pair ratios) of runs paired back to back, alternating which goes first."""
    m, b = [], []
    for k in range(runs):
        if k % 2:
            b.append(base())
            m.append(mine())
        else:
            m.append(mine())
            b.append(base())
    ratios = [x / y for x, y in zip(m, b)]
    return statistics.median(m), statistics.median(b), ratios


def interleaved(runs: int, fns):
    """Per-function lists of times of runs made back to back, the order rotating every run, so that each
    function goes first, second, ... equally often; the ratios are taken per run."""
    times = [[] for _ in fns]
    for k in range(runs):
        for j in range(len(fns)):
            i = (j + k) % len(fns)
            times[i].append(fns[i]())
    return times


def spread(ratios) -> str:
    return f"{min(ratios):.2f}..{max(ratios):.2f}"


# -- peak RSS, each command in a subprocess ------------------------------------------------------
# VmHWM, not ru_maxrss: a forked child's ru_maxrss starts from its parent's peak
_CHILD = ("import sys; from meterlink.cli import main; rc = main(sys.argv[1:]); "
          "hwm = [ln for ln in open('/proc/self/status') if ln.startswith('VmHWM')][0].split()[1]; "
          "print('RSS_MIB', int(hwm) / 1024); sys.exit(rc)")


def peak_rss_mib(argv: list[str]) -> float:
    out = subprocess.run([sys.executable, "-c", _CHILD, *argv], capture_output=True, text=True, cwd=_common.ROOT)
    if out.returncode != 0:
        raise RuntimeError(f"meterlink {' '.join(argv)} failed: {out.stderr.strip()[-400:]}")
    return float(next(ln.split()[1] for ln in out.stdout.splitlines() if ln.startswith("RSS_MIB")))


def rss_of_commands(db: Path, out: Path) -> dict[str, float]:
    return {"recalibrate": peak_rss_mib(["recalibrate", "--db", str(db), "--certificate", "demo-probe", "--again", "--json"]),
            "assess": peak_rss_mib(["assess", "--db", str(db), "--standard", STANDARD, "--tier", TIER, "--json"]),
            "report": peak_rss_mib(["report", "--db", str(db), "--session", "1", "--out", str(out), "--json"])}


# -- Store calls while producing one session report ---------------------------------------------
_COUNT_CHILD = """
import collections, sys, tempfile
from pathlib import Path
import numpy as np
from meterlink.physics.calibrate import expected_counts
from meterlink.physics.certificate import dump_certificate, load_certificate
from meterlink.reports.session_report import write_session_report
from meterlink.storage.processing import apply_certificate
from meterlink.storage.store import Store
d = Path(tempfile.mkdtemp(dir="."))     # inside the caller's temporary directory, removed with it
cert = load_certificate("demo-probe")
with Store(d / "s.db") as store:           # a small probe session with one calibration and an assessment
    dev = store.device_id("BENCH-1", "B-0001", cert.serial, cert.certificate_number, 1, "1.0.0", "1.0")
    sid = store.begin_session("record", "bench", dev, 1000, freq_hz=101.8e6)
    i = np.arange(5000)
    e = (4.0 + np.sin(i / 300.0)) / np.sqrt(3.0)
    counts = np.stack([np.round(expected_counts(ax, e)) for ax in cert.axes], axis=1).astype(np.int64)
    store.add_reading_arrays(sid, 1, i, i * 1000, 1.79e9 + i, counts, 0, 0)
    apply_certificate(store, sid, cert)
    store.add_event(sid, "assessment", "info", "bench", outcome="-", standard="icnirp-2020", tier="public",
                    rule="guarded")
calls, depth = collections.Counter(), [0]
def wrap(name, f):       # calls into the Store from outside it; the Store calling itself is not counted
    def g(*a, **k):
        if depth[0] == 0:
            calls[name] += 1
        depth[0] += 1
        try:
            return f(*a, **k)
        finally:
            depth[0] -= 1
    return g
for n in [n for n in dir(Store) if not n.startswith("_") and callable(getattr(Store, n))]:
    setattr(Store, n, wrap(n, getattr(Store, n)))
write_session_report(d / "s.db", sid, d / "rep", **({"streamed": False} if sys.argv[1:] == ["whole"] else {}))
calls.pop("close", None)
print("CALLS", sum(calls.values()), dict(calls))
"""


def count_store_calls(tree: Path | None = None, whole: bool = False) -> str:
    """Store calls made producing one session report, with the code of ``tree`` (default: this one)."""
    with tempfile.TemporaryDirectory() as cwd:
        got = subprocess.run([sys.executable, "-c", _COUNT_CHILD, *(["whole"] if whole else [])], capture_output=True,
                             text=True, cwd=cwd, env={**os.environ, "PYTHONPATH": str(tree or _common.ROOT)})
    if got.returncode != 0:
        return f"failed: {got.stderr.strip()[-300:]}"
    return next(ln for ln in got.stdout.splitlines() if ln.startswith("CALLS"))[6:]


def count_before(commit: str) -> str:
    """The same count with the code of an earlier commit (git archive into a temporary tree)."""
    with tempfile.TemporaryDirectory() as d:
        arch = subprocess.run(["git", "archive", commit], cwd=_common.ROOT, capture_output=True, check=True).stdout
        subprocess.run(["tar", "-x", "-C", d], input=arch, check=True)
        return count_store_calls(Path(d))


def main(argv=None) -> list[dict]:
    """30 days at 1 Hz (--quick: 2 days): recalibrate, assess and report against baselines; RSS; Store calls."""
    ap = _common.parser(__doc__)
    ap.add_argument("--runs", type=int, default=3, help="paired runs per target (default 3)")
    ap.add_argument("--year", action="store_true", help="also peak RSS on a year at 1 Hz (31.5 M readings; minutes)")
    ap.add_argument("--count-before", metavar="COMMIT", help="also count Store calls with the code of COMMIT")
    ap.add_argument("--only", metavar="T", action="append", choices=("recalibrate", "assess", "report", "rss", "calls"),
                    help="run only these targets (repeatable; default all)")
    args = ap.parse_args(argv)
    want = lambda t: not args.only or t in args.only  # noqa: E731
    n = 172_800 if args.quick else 2_592_000
    days = n / 86400
    cert = load_certificate("demo-probe")
    recs = []
    with tempfile.TemporaryDirectory() as d:
        d = Path(d)
        db = d / "month.db"
        t_build, sid = timed(build, db, n)
        # the report's baseline selects per-reading rows, which calibrations no longer write (schema 13):
        # an older calibration of the same values stored per reading, made by baseline (a)
        rows_cal = baseline_recalibrate_rows(db, sid, cert) if want("report") else None
        streamed_recalibrate(db, sid, cert)          # the calibration in force for assess and report
        host = machine()

        if want("recalibrate"):
            # 1. recalibrate: streamed vs (a) select + numpy + executemany of per-reading rows (the issue's
            # baseline) and (b) select + numpy + the same packed rows (the same output), streamed by the same chunks
            def run(f):
                def go():
                    t, cal = timed(f, db, sid, cert)
                    drop_calibration(db, cal)
                    return t
                return go

            sizes, cals = {}, {}
            for name, f in (("mine", streamed_recalibrate), ("rows", baseline_recalibrate_rows),
                            ("packed", baseline_recalibrate_packed)):
                before = used_bytes(db)
                cals[name] = f(db, sid, cert)
                sizes[name] = (used_bytes(db) - before) / n
            same_a, same_b = same_values(db, cals["mine"], cals["rows"]), same_packed(db, cals["mine"], cals["packed"])
            for cal in cals.values():
                drop_calibration(db, cal)
            tm, ta, tb = interleaved(args.runs, [run(streamed_recalibrate), run(baseline_recalibrate_rows),
                                                 run(baseline_recalibrate_packed)])
            m, b, b2 = statistics.median(tm), statistics.median(ta), statistics.median(tb)
            r, r2 = [x / y for x, y in zip(tm, ta)], [x / y for x, y in zip(tm, tb)]
            ratio, ratio2 = m / b, m / b2
            recs.append(_common.report(
                "streaming-recalibrate", f"recalibrate {days:g} days at 1 Hz ({n} readings), streamed, values stored "
                f"packed per span: {m:.2f} s (median of {args.runs}); {sizes['mine']:.1f} database bytes per reading",
                f"(a) select + numpy + executemany of one row per reading (field_values), streamed by the same chunks: "
                f"{b:.2f} s, {sizes['rows']:.1f} bytes per reading, same values: {'yes' if same_a else 'NO'}; "
                f"(b) select + numpy + the same packed rows: {b2:.2f} s, same rows: {'yes' if same_b else 'NO'}, "
                f"{ratio2:.2f}x (pairs {spread(r2)})", ratio,
                f"{ratio:.2f}x baseline (a) (pairs {spread(r)}); {ratio2:.2f}x the same-output baseline (b)",
                "<= 1.0x baseline (a)", ratio <= 1.0 and same_a and same_b, args.json, recalibrate_s=m,
                baseline_rows_s=b, baseline_packed_s=b2, pair_ratios=r, pair_ratios_packed=r2, ratio_packed=ratio2,
                bytes_per_reading=sizes, build_s=t_build, same_values_rows=same_a, same_rows_packed=same_b,
                load_avg_1m_end=round(os.getloadavg()[0], 2), **host))

        if want("assess"):
            # 2. assess: streamed vs the in-memory path (whole series loaded)
            m, b, r = paired(args.runs, lambda: timed(streamed_assess, db, sid)[0],
                             lambda: timed(in_memory_assess, db, sid)[0])
            a_s, a_m = streamed_assess(db, sid), in_memory_assess(db, sid)
            same = (a_s.verdict.outcome == a_m.verdict.outcome
                    and abs(a_s.value_v_per_m - a_m.value_v_per_m) <= 1e-12 * a_m.value_v_per_m)
            recs.append(_common.report(
                "streaming-assess", f"assess {days:g} days at 1 Hz, streamed: {m:.2f} s (median of {args.runs}); "
                f"same verdict and value as in memory: {same}", f"in-memory path (whole series loaded): {b:.2f} s",
                m / b, f"{m / b:.2f}x the in-memory time (pairs {spread(r)})", "< 1.5 s on 30 days",
                (m < 1.5) if not args.quick else None, args.json, assess_s=m, in_memory_s=b, pair_ratios=r, **host))

        if want("report"):
            # 3. report: streamed (assess + CSV + envelope plot + HTML) vs select + csv of the same rows
            cal = rows_cal
            runs = itertools.count()

            def mine_report():
                out = d / f"rep{next(runs)}"
                t = timed(write_session_report, db, sid, out)[0]
                shutil.rmtree(out)
                return t

            def base_report():
                out = d / "base.csv"
                t = timed(baseline_report, db, sid, cal, out)[0]
                out.unlink()
                return t

            def raw_report():
                out = d / "raw.csv"
                t = timed(baseline_raw_dump, db, sid, out)[0]
                out.unlink()
                return t

            m, b, r = paired(args.runs, mine_report, base_report)
            m2, b2, r2 = paired(args.runs, mine_report, raw_report)
            worst = max(m / b, m2 / b2)
            recs.append(_common.report(
                "streaming-report", f"HTML report + values.csv of {days:g} days at 1 Hz, streamed: {m:.2f} s and "
                f"{m2:.2f} s (medians of {args.runs}, one set per baseline)",
                f"select of the same rows (values joined with reading times) + csv.writer: {b:.2f} s; select of the raw "
                f"readings (no join) + csv.writer: {b2:.2f} s", worst,
                f"{m / b:.2f}x (pairs {spread(r)}) and {m2 / b2:.2f}x (pairs {spread(r2)}) the baselines",
                "<= 1.5x the baseline", worst <= 1.5, args.json, report_s=m, baseline_s=b, pair_ratios=r,
                report_raw_pairs_s=m2, raw_baseline_s=b2, raw_pair_ratios=r2, **host))

        if want("rss"):
            # 4. peak RSS, each command in its own process
            rss = rss_of_commands(db, d / "rss-rep")
            year = {}
            if args.year:
                ydb = d / "year.db"
                t_year = timed(build, ydb, 365 * 86400)[0]
                year = rss_of_commands(ydb, d / "rss-year")
                ydb.unlink()
            worst = max([*rss.values(), *year.values()])
            figure = ("peak RSS, 30 days: " + ", ".join(f"{k} {v:.0f} MiB" for k, v in rss.items())
                      + ("; a year: " + ", ".join(f"{k} {v:.0f} MiB" for k, v in year.items()) if year else ""))
            recs.append(_common.report(
                "streaming-rss", figure, "in-memory path: about 520 bytes per reading (1.35 GiB for 30 days)",
                worst / 150.0, f"worst {worst:.0f} MiB of the 150 MiB allowed", "< 150 MiB per command",
                worst < 150.0, args.json, peak_mb=worst, rss_month_mib=rss, rss_year_mib=year or None,
                **({"year_build_s": t_year} if year else {}), **host))

    if want("calls"):
        # 5. Store calls for one session report (a small session; the count does not depend on its length)
        after, whole = count_store_calls(), count_store_calls(whole=True)
        before = count_before(args.count_before) if args.count_before else None
        print(f"[streaming-calls] Store calls for one session report (closing the file not counted): streamed {after}; "
              f"in-memory path {whole}" + (f"; code of {args.count_before}: {before}" if before else ""))
    return recs


if __name__ == "__main__":
    main()
