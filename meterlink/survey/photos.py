"""Photos of survey points: checked to be PNG or JPEG images, and copied into the survey's database
(table survey_photos, schema version 11) so that the report embeds them even after the original file
has moved. Named in the plan (relative to its folder) or given at the terminal.
"""

from __future__ import annotations

import base64
import hashlib
import time
from pathlib import Path

from meterlink.errors import MeterlinkError

#: the image types a report embeds, by their first bytes
IMAGE_MAGIC = {b"\x89PNG\r\n\x1a\n": "image/png", b"\xff\xd8\xff": "image/jpeg"}
#: larger than any camera photo needs; keeps a slip (a video, a disk image) out of the database
MAX_PHOTO_BYTES = 50 * 1024 * 1024


def image_type(data: bytes) -> str | None:
    """The MIME type of PNG or JPEG bytes, else None."""
    return next((m for magic, m in IMAGE_MAGIC.items() if data.startswith(magic)), None)


def read_photo(path, label: str) -> tuple[str, bytes]:
    """(mime, bytes) of an image file; a one-line MeterlinkError for a missing, unreadable, too large or
    non-image file, naming the file and the point."""
    p = Path(path)
    try:
        if p.stat().st_size > MAX_PHOTO_BYTES:
            raise MeterlinkError(f"photo {str(p)!r} of point {label!r} is larger than "
                                 f"{MAX_PHOTO_BYTES // 2**20} MiB")
        data = p.read_bytes()
    except OSError as exc:
        raise MeterlinkError(f"photo {str(p)!r} of point {label!r}: {exc.strerror}") from None
    mime = image_type(data)
    if mime is None:
        raise MeterlinkError(f"photo {str(p)!r} of point {label!r} is not a PNG or JPEG image")
    return mime, data


def data_uri(mime: str, data: bytes) -> str:
    return f"data:{mime};base64,{base64.b64encode(data).decode()}"


def store_photos(store, session_id: int, point_no: int, label: str, paths) -> int:
    """Copy the photo files into the database for one point (a photo already kept for it is not
    copied twice); returns how many were added. Every file is read and checked before any is stored."""
    read = [(Path(p), *read_photo(p, label)) for p in paths]
    added = 0
    with store.write():
        for path, mime, data in read:
            cur = store.db.execute(
                "INSERT OR IGNORE INTO survey_photos (session_id, point_no, name, mime, data, sha256, source_path, "
                "added_utc) VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
                [session_id, point_no, path.name, mime, data, hashlib.sha256(data).hexdigest(),
                 str(path.resolve()), time.time()])
            added += cur.rowcount
    return added


def stored_photos(db, session_id: int) -> dict[int, list[tuple[str, str]]]:
    """point_no -> [(file name, data: URI), ...] of the photos kept in the database, in the order added."""
    out: dict[int, list[tuple[str, str]]] = {}
    if "survey_photos" not in db.table_names():
        return out
    for no, name, mime, data in db.execute("SELECT point_no, name, mime, data FROM survey_photos WHERE "
                                           "session_id = ? ORDER BY id", [session_id]):
        out.setdefault(int(no), []).append((name, data_uri(mime, bytes(data))))
    return out
