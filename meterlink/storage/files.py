"""Database files before SQLite opens them: refusing what is not a meterlink database, with clear errors."""

from __future__ import annotations

import sqlite3
import urllib.parse
from pathlib import Path

from meterlink.errors import MeterlinkError


class StorageError(MeterlinkError):
    """A database file that cannot be created, opened or written."""



class DamagedDatabaseError(StorageError):
    """A database file whose pages SQLite cannot read ("malformed"): see `sessions --verify`."""


SQLITE_HEADER = b"SQLite format 3\x00"


def check_database_file(path: Path, must_exist: bool, allow_empty: bool) -> bool:
    """Whether path exists as an SQLite file; StorageError naming the path if it is anything else.

    Looks at the file's first bytes before SQLite does, so that a 0-byte file or a stray PNG given
    to a command that only reads is refused instead of being turned into a database.
    """
    name = str(path)
    if path.is_dir():
        raise StorageError(f"database path {name!r} is a directory")
    if not path.exists():
        if must_exist:
            raise StorageError(f"no database at {name!r}")
        return False
    try:
        with open(path, "rb") as fh:
            head = fh.read(len(SQLITE_HEADER))
    except OSError as exc:
        raise StorageError(f"cannot read database {name!r}: {exc.strerror}") from None
    if not head:
        if allow_empty:
            return True
        raise StorageError(f"{name!r} is empty (0 bytes), not a meterlink database")
    if head != SQLITE_HEADER:
        raise StorageError(f"{name!r} is not an SQLite database (its first bytes are not an SQLite header)")
    return True


def open_readonly(path: str | Path) -> sqlite3.Connection:
    """A read-only (``mode=ro``) connection to an existing SQLite file; StorageError naming it otherwise."""
    p = Path(path)
    check_database_file(p, must_exist=True, allow_empty=False)
    uri = "file:" + urllib.parse.quote(str(p.resolve())) + "?mode=ro"
    try:
        conn = sqlite3.connect(uri, uri=True, check_same_thread=False, timeout=10.0)
        conn.execute("select count(*) from sqlite_master").fetchone()   # the schema must be readable
    except sqlite3.DatabaseError as exc:
        raise describe_sqlite_error(p, exc) from None
    return conn


def describe_sqlite_error(path: str | Path, exc: sqlite3.Error) -> StorageError:
    """The StorageError a user should see for an sqlite3 error on the file at path."""
    text = str(exc)
    if "malformed" in text or "not a database" in text or "disk I/O" in text:
        return DamagedDatabaseError(f"database {str(path)!r} is damaged ({text}); 'meterlink sessions --db "
                                    f"{path} --verify' says what can be salvaged")
    return StorageError(f"cannot use database {str(path)!r}: {text}")

