"""Issued revisions of a survey report (table survey_revisions, schema version 12, docs/survey.md
"Revisions").

A report is a draft until it is issued (``meterlink render --issue``). Issuing keeps the revision
whole in the survey's database: its sign-off, what changed, by whom, a digest of what it says and the
HTML itself. Rendering an issued number and revision again writes that HTML unchanged when the
content is the same; when the survey or the sign-off changed since, the render is refused in one line
and a new revision must be given (issuing one after the first also needs a note of what changed).
"""

from __future__ import annotations

import hashlib
import json
import time

from meterlink.errors import MeterlinkError

#: the sign-off keys that say who signed what; the digest covers them with the survey's content
SIGNOFF_KEYS = ("number", "revision", "assessor", "qualification", "organisation", "date", "reviewer",
                "reviewer_qualification", "review_date", "revision_note")


class RevisionError(MeterlinkError):
    """An issued report number and revision that cannot be used for this content."""


def content_digest(sv: dict, meta: dict, conditions: dict | None = None) -> str:
    """SHA-256 of what the report says: every stored row of the survey (points, samples, captures
    replaced, selective bands, sources, trace, plan text, photos as shown), the sign-off and the site
    conditions given when rendering (if any); not the layout, the software's wording or the time the
    report was made."""
    def plain(v):
        if isinstance(v, dict):
            return {str(k): plain(x) for k, x in v.items()}
        if isinstance(v, (list, tuple)):
            return [plain(x) for x in v]
        if isinstance(v, bytes):
            return hashlib.sha256(v).hexdigest()
        if isinstance(v, (str, int, float, bool)) or v is None:
            return v
        if hasattr(v, "tolist"):
            return v.tolist()
        return repr(v)
    # a photo by the checksum of its stored bytes, not by the upright copy embedded (which another Pillow
    # version may encode differently)
    shown = {no: [{k: v for k, v in e.items() if k != "uri"} for e in entries]
             for no, entries in (sv.get("photos") or {}).items()}
    doc = {"survey": plain({**sv, "photos": shown}), "signoff": {k: meta.get(k, "") for k in SIGNOFF_KEYS}}
    if conditions:       # only then: a revision issued without them keeps its digest
        doc["conditions"] = plain(conditions)
    text = json.dumps(doc, sort_keys=True, ensure_ascii=True, separators=(",", ":"))
    return hashlib.sha256(text.encode()).hexdigest()


def issued(db, number: str) -> list[dict]:
    """The issued revisions of a report number, oldest first ([] in a file without the table)."""
    if not number or "survey_revisions" not in db.table_names():
        return []
    return list(db["survey_revisions"].rows_where("report_number = ?", [number], order_by="issued_utc, id"))


def recorded_conditions(rows: list[dict]) -> dict | None:
    """The site conditions given when the latest issued revision that has them was rendered (kept in its
    meta_json), so that a later render of the report says them too; None if none was given."""
    for r in reversed(rows):
        kept = json.loads(r["meta_json"] or "{}").get("conditions")
        if kept:
            return kept
    return None


def revision_date(meta: dict, t_utc: float) -> str:
    """The date a revision carries: the sign-off date, else the UTC day it was made."""
    return meta["date"] or time.strftime("%Y-%m-%d", time.gmtime(t_utc))


def history(rows: list[dict], meta: dict, made_utc: float, *, draft: bool) -> list[dict]:
    """The revision table of a report: the issued revisions before this one, then this one (marked a draft
    when it is not issued); each {revision, date, change, by, draft}."""
    out = [{"revision": r["revision"], "date": r["revision_date"] or "", "change": r["change"],
            "by": r["issued_by"] or "", "draft": False} for r in rows]
    out.append({"revision": meta["revision"], "date": revision_date(meta, made_utc), "by": meta["assessor"],
                "draft": draft,
                "change": meta["revision_note"] or ("first issue" if not rows else "(not stated)")})
    return out


def check(rows: list[dict], session_id: int, meta: dict, digest: str, *, issue: bool) -> dict | None:
    """The issued row this render must reproduce (same number, revision and content), None for a
    revision not issued yet; a RevisionError when the number belongs to another survey, when the content
    differs from what was issued under this number and revision, or when issuing a later revision
    without saying what changed."""
    number, rev = meta["number"], meta["revision"]
    if issue and not number:
        raise RevisionError("--issue needs a report number (--report-number, or number in the plan's [report])")
    other = next((r for r in rows if int(r["session_id"]) != int(session_id)), None)
    if other is not None:
        raise RevisionError(f"report {number} was issued for survey session {other['session_id']}, not "
                            f"{session_id}: give this report its own number")
    same = next((r for r in rows if r["revision"] == rev), None)
    if same is not None:
        if same["content_sha256"] != digest:
            when = time.strftime("%Y-%m-%d %H:%M UTC", time.gmtime(same["issued_utc"]))
            raise RevisionError(f"report {number} revision {rev} was issued {when} with other content (the survey "
                                "or its sign-off changed since): give a new --revision and say what changed "
                                "with --revision-note, or --as-issued for the copy issued then")
        return same
    if issue and rows and not meta["revision_note"].strip():
        raise RevisionError(f"report {number} revision {rev} follows issued revision "
                            f"{rows[-1]['revision']}: say what changed with --revision-note")
    return None


def as_issued(rows: list[dict], meta: dict) -> dict:
    """The kept row of an issued number and revision, whatever the survey holds now; one line if none."""
    same = next((r for r in rows if r["revision"] == meta["revision"]), None)
    if same is None:
        raise RevisionError(f"report {meta['number'] or '(no number)'} revision {meta['revision']} was never issued"
                            + (f" (issued: {', '.join(r['revision'] for r in rows)})" if rows else ""))
    return same


def record(store, session_id: int, meta: dict, digest: str, html: str, issued_utc: float,
           conditions: dict | None = None) -> None:
    """Keep an issued revision (one transaction; the UNIQUE number + revision guards against a
    second writer issuing the same one meanwhile), with the site conditions given when rendering."""
    import sqlite3

    from meterlink import __version__

    row = {"session_id": session_id, "report_number": meta["number"], "revision": meta["revision"],
           "issued_utc": issued_utc, "change": history_change(meta, store), "issued_by": meta["assessor"],
           "revision_date": revision_date(meta, issued_utc),
           "meta_json": json.dumps({k: meta.get(k, "") for k in SIGNOFF_KEYS}
                                   | ({"conditions": conditions} if conditions else {}), sort_keys=True),
           "content_sha256": digest, "html": html, "software_version": __version__}
    try:
        with store.write():
            store.db["survey_revisions"].insert(row)
    except sqlite3.IntegrityError:
        raise RevisionError(f"report {meta['number']} revision {meta['revision']} was issued meanwhile: "
                            "render again") from None


def history_change(meta: dict, store) -> str:
    """The change note kept for a revision: the note given, else "first issue" for the first."""
    if meta["revision_note"].strip():
        return meta["revision_note"]
    return "first issue" if not issued(store.db, meta["number"]) else "(not stated)"
