"""A survey report a practitioner signs and revises: drafts, issued revisions kept in the database
(schema version 12) and rendered again unchanged, an issued number and revision refused for other
content, the revision history with a second signatory, site conditions and an unconfirmed transmitter
state, photos with caption, direction of view and time taken, shown upright. Rendered for real from a
survey run on the simulated meter on a pty."""

from __future__ import annotations

import base64
import io
import json
import re
import sqlite3

import pytest
from PIL import Image

from meterlink.cli import main
from meterlink.errors import MeterlinkError
from meterlink.simulators.pty_meter import SimulatedMeter
from meterlink.survey import photos as ph
from meterlink.survey.plan import PlanError, load_plan
from meterlink.survey.run import run_plan
from meterlink.survey.revisions import RevisionError, check

PLAN = """
[survey]
title = "Revision check survey"
standard = "icnirp-1998"
tier = "public"
rule = "guarded"
certificate = "demo-probe"
settle_s = 1
spot_s = 3

[conditions]
weather = "light rain"

[report]
number = "SR-<5>"
assessor = "A. Assessor"
qualification = "RF safety assessor"
date = "2027-04-01"

[site]
name = "Test ground"

[[source]]
name = "FM"
freq_hz = 94.3e6
power_w = 5000
max_power_w = 10000

[[point]]
label = "gate"
x_m = 4.0
y_m = -4.0
photos = [{file = "turned.jpg", caption = "the gate <from> the lane", direction_deg = 90}]
"""


def _turned_jpeg() -> bytes:
    """80 x 40 pixels stored, red block at stored top-left, blue at stored bottom-left; EXIF Orientation
    6 and DateTimeOriginal with its offset."""
    im = Image.new("RGB", (80, 40), (255, 255, 255))
    im.paste((255, 0, 0), (0, 0, 16, 16))
    im.paste((0, 0, 255), (0, 24, 16, 40))
    exif = Image.Exif()
    exif[0x0112] = 6
    exif.get_ifd(0x8769)[0x9003] = "2027:03:30 09:41:07"
    exif.get_ifd(0x8769)[0x9011] = "+01:00"
    buf = io.BytesIO()
    im.save(buf, "JPEG", quality=95, exif=exif)
    return buf.getvalue()


def _near(px, rgb, tol=40):
    return all(abs(a - b) <= tol for a, b in zip(px, rgb))


def test_exif_orientation_and_time_taken(tmp_path):
    data = _turned_jpeg()
    # JEITA CP-3451 (Exif 2.2), Orientation, tag 274: "6 = The 0th row is the visual right-hand side of the
    # image, and the 0th column is the visual top." So stored 80 x 40 shows 40 x 80, the stored top-left
    # (row 0, column 0) at the visual top-right, the stored bottom-left (last row, column 0) at the top-left.
    mime, shown = ph.upright("image/jpeg", data)
    with Image.open(io.BytesIO(shown)) as im:
        assert mime == "image/jpeg" and im.size == (40, 80)
        assert _near(im.getpixel((32, 8)), (255, 0, 0)) and _near(im.getpixel((8, 8)), (0, 0, 255))
    # DateTimeOriginal is "YYYY:MM:DD HH:MM:SS" (Exif 2.2, tag 36867); OffsetTimeOriginal (tag 36881, added
    # in Exif 2.31; from memory) gives the camera's offset from UTC
    assert ph.time_taken(data, None) == ("2027-03-30 09:41:07+01:00", "exif")
    # without EXIF: the file's modification time, said to be that
    f = tmp_path / "plain.png"
    buf = io.BytesIO()
    Image.new("RGB", (4, 4)).save(buf, "PNG")
    f.write_bytes(buf.getvalue())
    import os
    os.utime(f, (1800000000, 1800000000))          # 2027-01-15 08:00:00 UTC
    assert ph.time_taken(f.read_bytes(), f) == ("2027-01-15T08:00:00Z", "file")
    # an upright image is embedded byte for byte
    assert ph.upright("image/png", f.read_bytes())[1] == f.read_bytes()


def test_conditions_and_photo_entries_are_checked_in_one_line():
    base = {"survey": {"standard": "icnirp-2020", "rule": "simple", "certificate": "demo-probe"},
            "site": {"name": "x"}}
    for extra, msg in (({"conditions": {"humidity_percent": 130}}, "humidity_percent = 130 must be"),
                       ({"conditions": {"wind": "strong"}}, "unknown key 'wind'"),
                       ({"transmitter": {"confirmed_with": "N. Operator"}}, "missing 'confirmed_at'"),
                       ({"point": [{"label": "a", "photos": [{"file": "a.png", "direction_deg": 400}]}]},
                        "direction_deg = 400 must be")):
        with pytest.raises(PlanError, match=re.escape(msg)) as exc:
            load_plan({**base, **extra}, check_photos=False)
        assert "\n" not in str(exc.value)


def test_an_issued_number_of_another_survey_is_refused():
    meta = {"number": "R-1", "revision": "0", "revision_note": ""}
    with pytest.raises(RevisionError, match="issued for survey session 4"):
        check([{"session_id": 4, "revision": "0", "content_sha256": "x", "issued_utc": 0.0}], 5, meta, "x",
              issue=False)
    with pytest.raises(MeterlinkError, match="--issue needs a report number"):
        check([], 5, dict(meta, number=""), "x", issue=True)


@pytest.fixture(scope="module")
def survey(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("revisions")
    (tmp / "plan.toml").write_text(PLAN, encoding="utf-8")
    (tmp / "turned.jpg").write_bytes(_turned_jpeg())
    with SimulatedMeter("demo", seed=5, speed=100.0) as sim:
        sid = run_plan(sim.port, str(tmp / "plan.toml"), tmp / "s.db", mover=sim.move_to)
    return tmp, sid


def _render(tmp, name, *opts, capsys):
    capsys.readouterr()
    rc = main(["render", str(tmp / "s.db"), "--out", str(tmp / name), "--json", *opts])
    out, err = capsys.readouterr()
    return rc, (json.loads(out) if rc == 0 else None), err.strip().splitlines()


def _issued(tmp):
    con = sqlite3.connect(tmp / "s.db")
    try:
        return con.execute("select revision, change, issued_by, html from survey_revisions order by id").fetchall()
    finally:
        con.close()


def test_draft_issue_reissue_refuse_and_revise(survey, capsys):
    tmp, _ = survey
    rc, doc, _ = _render(tmp, "draft", capsys=capsys)
    draft = (tmp / "draft" / "report.html").read_text(encoding="utf-8")
    assert rc == 0 and doc["revision_state"] == "draft" and "(draft: not issued)" in draft
    assert _issued(tmp) == []
    # conditions in the basis; extrapolated to maximum power without a confirmed transmitter state: said plainly
    basis = draft[draft.index("id='basis'"):draft.index("id='points'")]
    assert "light rain" in basis and "not confirmed with the operator" in basis
    concl = draft[draft.index('id="conclusion"'):draft.index("</section>")]
    assert "The transmitter state during the measurement was not confirmed with the operator" in concl
    # the photo: caption, direction, EXIF time, embedded upright (40 x 80 shown)
    photos = draft[draft.index("id='photos'"):draft.index("id='signoff'")]
    assert "turned.jpg: the gate &lt;from&gt; the lane." in photos and "Looking 90° from north (E)." in photos
    assert "Taken 2027-03-30 09:41:07+01:00 (camera clock, EXIF DateTimeOriginal)." in photos
    uri = re.search(r'src="data:image/jpeg;base64,([^"]+)"', photos).group(1)
    with Image.open(io.BytesIO(base64.b64decode(uri))) as im:
        assert im.size == (40, 80)

    # issue revision 0: kept whole, no draft mark, the history says first issue
    rc, doc, _ = _render(tmp, "r0", "--issue", capsys=capsys)
    r0 = (tmp / "r0" / "report.html").read_bytes()
    assert rc == 0 and doc["revision_state"] == "issued" and b"(draft" not in r0
    assert [(r[0], r[1], r[2]) for r in _issued(tmp)] == [("0", "first issue", "A. Assessor")]
    # rendered again (and as PDF): the same page, byte for byte
    rc, doc, _ = _render(tmp, "again", "--format", "pdf", capsys=capsys)
    assert rc == 0 and doc["revision_state"] == "as issued"
    assert (tmp / "again" / "report.html").read_bytes() == r0 and (tmp / "again" / "report.pdf").is_file()
    # the footer of every page names the report and revision; the draft's also says DRAFT
    assert "report SR-&lt;5&gt; rev. 0, survey session" in r0.decode()
    assert "report SR-&lt;5&gt; rev. 0 DRAFT, survey session" in draft

    # the same number and revision with another sign-off: one line, nothing written
    rc, _, err = _render(tmp, "x1", "--reviewer", "B. Reviewer", capsys=capsys)
    assert rc == 2 and len(err) == 1 and "SR-<5> revision 0 was issued" in err[0] and "--revision" in err[0]
    assert not (tmp / "x1" / "report.html").exists()
    # ... or with other survey content (a photo added to the record since)
    buf = io.BytesIO()
    Image.new("RGB", (8, 8), (0, 255, 0)).save(buf, "PNG")
    (tmp / "late.png").write_bytes(buf.getvalue())
    from meterlink.storage.store import Store
    with Store(tmp / "s.db") as store:
        ph.store_photos(store, survey[1], 1, "gate", [tmp / "late.png"])
    rc, _, err = _render(tmp, "x2", capsys=capsys)
    assert rc == 2 and len(err) == 1 and "with other content" in err[0]
    rc, _, err = _render(tmp, "x4", "--revision", "7", "--as-issued", capsys=capsys)
    assert rc == 2 and err == ["meterlink render: error: report SR-<5> revision 7 was never issued (issued: 0)"]

    # revision 1: refused without saying what changed, issued with it; a second signatory and the history
    rc, _, err = _render(tmp, "x3", "--revision", "1", "--issue", capsys=capsys)
    assert rc == 2 and len(err) == 1 and "say what changed with --revision-note" in err[0]
    rc, doc, _ = _render(tmp, "r1", "--revision", "1", "--issue", "--revision-note", "photo <late> added",
                         "--reviewer", "B. Reviewer", "--reviewer-qualification", "senior assessor",
                         "--review-date", "2027-04-03", capsys=capsys)
    r1 = (tmp / "r1" / "report.html").read_text(encoding="utf-8")
    assert rc == 0 and doc["revision_state"] == "issued"
    sign = r1[r1.index("id='signoff'"):r1.index("id='cautions'")]
    for text in ("checked by", "B. Reviewer", "senior assessor", "2027-04-03"):
        assert text in sign
    hist = [re.sub(r"\s+", " ", re.sub(r"<[^>]+>", " ", row)).strip()
            for row in re.findall(r"<tr>(.*?)</tr>", sign[sign.index("id='revisions'"):], re.S)]
    assert hist[1:] == ["0 2027-04-01 first issue A. Assessor", "1 2027-04-01 photo &lt;late&gt; added A. Assessor"]
    assert [r[0] for r in _issued(tmp)] == ["0", "1"]
    # revision 0 stays as issued, without the later revision in its history: asked for as issued, since
    # the record has changed
    rc, _, err = _render(tmp, "old", "--revision", "0", capsys=capsys)
    assert rc == 2 and "--as-issued" in err[0]
    rc, doc, _ = _render(tmp, "old", "--revision", "0", "--as-issued", capsys=capsys)
    assert rc == 0 and doc["revision_state"] == "as issued" and (tmp / "old" / "report.html").read_bytes() == r0


def test_a_version_11_file_gains_the_revision_table_and_keeps_its_photos(tmp_path):
    import sqlite_utils

    from meterlink.storage.schema import MIGRATIONS
    from meterlink.storage.store import Store

    path = tmp_path / "v11.db"
    db = sqlite_utils.Database(path)
    for v in range(1, 12):
        MIGRATIONS[v](db)
    db["meta"].upsert({"key": "schema_version", "value": "11"}, pk="key")
    png = io.BytesIO()
    Image.new("RGB", (4, 4)).save(png, "PNG")
    db.execute("INSERT INTO sessions (id, kind, started_utc) VALUES (1, 'survey', 1.0e9)")
    db.execute("INSERT INTO survey (session_id, standard, tier, decision_rule, created_utc) VALUES "
               "(1, 'icnirp-2020', 'public', 'simple', 1.0e9)")
    db.execute("INSERT INTO survey_photos (session_id, point_no, name, mime, data, sha256, added_utc) VALUES "
               "(1, 1, 'old.png', 'image/png', ?, 'x', 1.0e9)", [png.getvalue()])
    db.conn.commit()
    db.close()
    with Store(path) as store:
        assert store.schema_version >= 12 and "survey_revisions" in store.db.table_names()
        (entry,) = ph.stored_photos(store.db, 1)[1]
    assert entry["name"] == "old.png" and entry["caption"] == "" and entry["direction_deg"] is None
    assert entry["taken"] is None and entry["uri"].endswith(base64.b64encode(png.getvalue()).decode())


def test_site_conditions_given_at_render_are_said_kept_with_the_issue_and_checked(survey, tmp_path, capsys):
    import shutil

    src, _ = survey
    shutil.copy(src / "s.db", tmp_path / "s.db")       # its own copy: the other tests issue in the fixture's file
    num = ("--report-number", "SC-1")

    def basis(name):
        html = (tmp_path / name / "report.html").read_text(encoding="utf-8")
        return html[html.index("id='basis'"):html.index("id='points'")]

    # a draft with the weather and temperature given now: over the plan's "light rain"
    rc, doc, err = _render(tmp_path, "d", *num, "--weather", "overcast, dry", "--temperature-degc", "7.5",
                           capsys=capsys)
    assert rc == 0, err
    b = basis("d")
    assert "overcast, dry; air temperature 7.5 °C" in b and "light rain" not in b
    # issued with a conditions file (the transmitter state confirmed): kept with the revision
    (tmp_path / "cond.toml").write_text('[conditions]\nhumidity_percent = 81\n[transmitter]\n'
                                        'confirmed_with = "N. Operator"\nconfirmed_at = "2027-04-01 10:05"\n'
                                        'state = "all carriers at full power"\n', encoding="utf-8")
    rc, doc, err = _render(tmp_path, "r0", *num, "--issue", "--conditions", str(tmp_path / "cond.toml"),
                           "--weather", "overcast, dry", capsys=capsys)
    assert rc == 0 and doc["revision_state"] == "issued", err
    b = basis("r0")
    assert "overcast, dry; relative humidity 81 %" in b and "confirmed with N. Operator, 2027-04-01 10:05" in b
    con = sqlite3.connect(tmp_path / "s.db")
    kept = json.loads(con.execute("select meta_json from survey_revisions where report_number = 'SC-1'").fetchone()[0])
    con.close()
    assert kept["conditions"] == {"weather": "overcast, dry", "humidity_percent": 81.0, "transmitter": {
        "confirmed_with": "N. Operator", "confirmed_at": "2027-04-01 10:05", "state": "all carriers at full power"}}
    # rendered again without them: the issued revision, unchanged (it says them)
    rc, doc, _ = _render(tmp_path, "again", *num, capsys=capsys)
    assert rc == 0 and doc["revision_state"] == "as issued"
    assert (tmp_path / "again" / "report.html").read_bytes() == (tmp_path / "r0" / "report.html").read_bytes()
    # other conditions under the issued revision: refused in one line; a new revision says them
    rc, _, err = _render(tmp_path, "x", *num, "--weather", "sunny", capsys=capsys)
    assert rc == 2 and len(err) == 1 and "SC-1 revision 0 was issued" in err[0]
    rc, doc, err = _render(tmp_path, "r1", *num, "--revision", "1", "--revision-note", "weather corrected",
                           "--weather", "sunny", "--issue", capsys=capsys)
    assert rc == 0, err
    b = basis("r1")
    assert "sunny; relative humidity 81 %" in b and "N. Operator" in b      # the rest as issued before
    # bad input: one line each, nothing written
    (tmp_path / "bad.toml").write_text("[conditions]\nwind = 3\n", encoding="utf-8")
    for opts, says in ((("--humidity-percent", "130"), "--humidity-percent '130' is not a number from 0 to 100"),
                       (("--temperature-degc", "warm"), "--temperature-degc 'warm' is not a number"),
                       (("--weather", " "), "--weather is empty"),
                       (("--conditions", str(tmp_path / "bad.toml")), "[conditions]: unknown key 'wind'"),
                       (("--conditions", str(tmp_path / "none.toml")), "no such conditions file"),
                       (("--as-issued", "--weather", "fog"), "leave out the site conditions")):
        rc, _, err = _render(tmp_path, "bad", *num, *opts, capsys=capsys)
        assert rc == 2 and len(err) == 1 and says in err[0], (opts, err)
    assert not (tmp_path / "bad" / "report.html").exists()
