"""meterlink export: the 6-minute series and summaries for publication, as CSV or JSON."""

HELP = "export a station's 6-minute series and period summaries (CSV or JSON) for publication"


def add_arguments(parser) -> None:
    parser.add_argument("--db", required=True, metavar="FILE", help="station database written by 'meterlink monitor'")
    parser.add_argument("--from", dest="t_from", metavar="DATE", help="start, ISO date or time (UTC)")
    parser.add_argument("--to", dest="t_to", metavar="DATE", help="end, exclusive (default: the end of the newest block)")
    parser.add_argument("--format", choices=("csv", "json"), default="csv", help="output format (default csv)")
    parser.add_argument("--out", metavar="PATH",
                        help="write here instead of standard output; a path ending in / or an existing folder "
                             "is a folder (created if need be) that receives a file named for the station and span")


def run(args) -> int:
    import os
    import sqlite3
    import sys
    import tempfile
    from pathlib import Path

    from meterlink.cli import SAFETY_LINE
    from meterlink.commands.stats import open_station
    from meterlink.errors import MeterlinkError
    from meterlink.storage.store import describe_sqlite_error
    from meterlink.station.publish import (export_file_name, header_lines, station_info, statistics,
                                           write_series_csv, write_series_json)

    conn, t0, t1 = open_station(args)
    try:
        st, meters = station_info(conn)

        def write(stream) -> None:
            """The export, streamed: rows go from the database cursor to the output one at a time."""
            if args.format == "csv":
                write_series_csv(stream, conn, t0, t1, st, meters, SAFETY_LINE)
            else:
                doc = {"about": header_lines(st, SAFETY_LINE), "caution": SAFETY_LINE,
                       "summaries": statistics(conn, t0, t1)}
                write_series_json(stream, doc, "series_6min", conn, t0, t1, st, meters)

        if not args.out:
            write(sys.stdout)
            return 0
        out = Path(args.out)
        folder = args.out.endswith(("/", os.sep)) or out.is_dir()
        if folder:
            try:
                out.mkdir(parents=True, exist_ok=True)
            except OSError as exc:
                raise MeterlinkError(f"{args.out}: cannot create the export folder: {exc.strerror or exc}") from None
            out = out / export_file_name(st, t0, t1, args.format)
        # written beside the target and renamed when complete: a failed export leaves no half file
        try:
            fd, tmp = tempfile.mkstemp(prefix=f".{out.name}.", suffix=".part", dir=out.parent)
        except OSError as exc:
            raise MeterlinkError(f"{out}: cannot write: {exc.strerror}") from None
        try:
            with open(fd, "w", encoding="utf-8", newline="") as f:
                write(f)
            os.chmod(tmp, 0o666 & ~_umask())
            os.replace(tmp, out)
        except OSError as exc:
            raise MeterlinkError(f"{out}: cannot write: {exc.strerror}") from None
        finally:
            if os.path.exists(tmp):
                os.unlink(tmp)
    except sqlite3.DatabaseError as exc:
        raise describe_sqlite_error(args.db, exc) from None
    finally:
        conn.close()
    if folder:
        print(f"wrote {out}")
    return 0


def _umask() -> int:
    """The process umask (read by setting and restoring it), so the export gets the usual file mode."""
    import os
    mask = os.umask(0)
    os.umask(mask)
    return mask
