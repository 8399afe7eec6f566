"""Photos of survey points: checked to be PNG or JPEG images, and copied into the survey's database
(table survey_photos, schema version 11) so that the report embeds them even after the original file
has moved. Named in the plan (relative to its folder) or given at the terminal, with a caption and the
direction of view (schema version 12). When a photo was taken comes from its EXIF DateTimeOriginal,
else from the file's modification time, and the report says which. The stored bytes are never
changed; the report shows a photo upright by applying its EXIF orientation when embedding it.
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


#: EXIF tags (CIPA DC-008, Exif 2.32): Orientation in IFD0, the Exif IFD pointer, DateTimeOriginal and
#: OffsetTimeOriginal in the Exif IFD
_ORIENTATION, _EXIF_IFD, _DATETIME_ORIGINAL, _OFFSET_ORIGINAL = 0x0112, 0x8769, 0x9003, 0x9011


def _exif(data: bytes):
    """The image's EXIF (a PIL.Image.Exif), or None when Pillow cannot read the image or it has none."""
    import io

    from PIL import Image, UnidentifiedImageError

    try:
        with Image.open(io.BytesIO(data)) as im:
            return im.getexif()
    except (UnidentifiedImageError, OSError, ValueError, SyntaxError):
        return None


def time_taken(data: bytes, path=None) -> tuple[str | None, str | None]:
    """(when, where from) a photo was taken: ("YYYY-MM-DD HH:MM:SS[+hh:mm]", "exif") from EXIF
    DateTimeOriginal (the camera's clock; its offset when the camera recorded one), else
    ("YYYY-MM-DDTHH:MM:SSZ", "file") from the file's modification time, else (None, None)."""
    import re

    exif = _exif(data)
    if exif is not None:
        sub = exif.get_ifd(_EXIF_IFD)
        raw, off = sub.get(_DATETIME_ORIGINAL), sub.get(_OFFSET_ORIGINAL)
        m = re.fullmatch(r"(\d{4}):(\d\d):(\d\d) (\d\d:\d\d:\d\d)", str(raw or "").strip("\x00 "))
        if m and m.group(1) != "0000":
            off = str(off or "").strip("\x00 ")
            return (f"{m.group(1)}-{m.group(2)}-{m.group(3)} {m.group(4)}"
                    + (off if re.fullmatch(r"[+-]\d\d:\d\d", off) else ""), "exif")
    if path is not None:
        try:
            t = Path(path).stat().st_mtime
        except OSError:
            return None, None
        return time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(t)), "file"
    return None, None


def upright(mime: str, data: bytes) -> tuple[str, bytes]:
    """The image as it should be seen: bytes unchanged when its EXIF orientation is absent or 1 (upright),
    else turned and mirrored as the tag says (Pillow's exif_transpose) and encoded again, same type."""
    import io

    from PIL import Image, ImageOps

    exif = _exif(data)
    if exif is None or exif.get(_ORIENTATION, 1) not in range(2, 9):
        return mime, data
    with Image.open(io.BytesIO(data)) as im:
        turned = ImageOps.exif_transpose(im)
        buf = io.BytesIO()
        if mime == "image/jpeg":
            turned.convert("RGB").save(buf, "JPEG", quality=92)
        else:
            turned.save(buf, "PNG")
    return mime, buf.getvalue()


def photo_entry(name: str, mime: str, data: bytes, caption=None, direction_deg=None, taken=None,
                taken_from=None) -> dict:
    """What the report shows of one photo: file name, data: URI (upright), SHA-256 of the bytes as
    stored, caption, direction, time."""
    return {"name": name, "uri": data_uri(*upright(mime, data)), "sha256": hashlib.sha256(data).hexdigest(),
            "caption": caption or "",
            "direction_deg": direction_deg, "taken": taken, "taken_from": taken_from}


def store_photos(store, session_id: int, point_no: int, label: str, paths) -> int:
    """Copy the photo files (paths, or model.Photo with caption and direction) into the database for
    one point (a photo already kept for it is not copied twice), with when each was taken; returns how
    many were added. Every file is read and checked before any is stored."""
    read = [(p, Path(p), *read_photo(p, label)) for p in paths]
    added = 0
    with store.write():
        for photo, path, mime, data in read:
            taken, taken_from = time_taken(data, path)
            cur = store.db.execute(
                "INSERT OR IGNORE INTO survey_photos (session_id, point_no, name, mime, data, sha256, source_path, "
                "added_utc, caption, direction_deg, taken, taken_from) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                [session_id, point_no, path.name, mime, data, hashlib.sha256(data).hexdigest(),
                 str(path.resolve()), time.time(), getattr(photo, "caption", "") or None,
                 getattr(photo, "direction_deg", None), taken, taken_from])
            added += cur.rowcount
    return added


def stored_photos(db, session_id: int) -> dict[int, list[dict]]:
    """point_no -> [photo_entry, ...] of the photos kept in the database, in the order added (a file of
    schema version 11 opened read-only has no caption, direction or time)."""
    out: dict[int, list[dict]] = {}
    if "survey_photos" not in db.table_names():
        return out
    v12 = "caption" in db["survey_photos"].columns_dict
    cols = "point_no, name, mime, data" + (", caption, direction_deg, taken, taken_from" if v12 else "")
    for no, name, mime, data, *more in db.execute(f"SELECT {cols} FROM survey_photos WHERE session_id = ? "
                                                  "ORDER BY id", [session_id]):
        out.setdefault(int(no), []).append(photo_entry(name, mime, bytes(data), *more))
    return out
