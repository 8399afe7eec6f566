"""The interactive survey reaches the report a scripted one does: the same answers typed at the prompts
(declared band, sources and their powers, positions, photos, report number and sign-off) and written
in a plan file give the same site, sources, basis, points and sign-off sections. The interactive run
also measures a point again (the probe first stood at the wrong place) and adds a photo that is then
moved away: the report concludes on the new capture, lists the old one with its reason and still
embeds the photos; HTML and PDF, user text escaped. Both run on the simulated meter on a real pty."""

from __future__ import annotations

import base64
import re

import markupsafe
import pypdf
import pytest

from meterlink.simulators.pty_meter import SimulatedMeter
from meterlink.storage.store import Store
from meterlink.survey.interactive import run_interactive
from meterlink.survey.report import write_report
from meterlink.survey.run import run_plan
from meterlink.survey.store import load_survey
from test_pdf import check_pdf

REASON = "probe <b>misplaced</b> & wet"
PLAN = """
[survey]
standard = "icnirp-1998"
tier = "public"
rule = "guarded"
certificate = "demo-probe"
followup_percent = 20.0
band_hz = [80000000.0, 6000000000.0]

[site]
name = "Test <i>ground</i>"
technician = "T. Tester"

[[source]]
name = "Pole <LTE>"
freq_hz = 806000000.0
technology = "LTE"
power_w = 250.0
max_power_w = 400.0

[conditions]
weather = "overcast, <dry>"
temperature_degc = 11.5
humidity_percent = 55.0

[transmitter]
confirmed_with = "N. Operator & desk"
confirmed_at = "2027-03-30 09:40"
state = "all sectors on air at <typical> load"

[report]
number = "SR-<7>"
assessor = "A. Assessor"
qualification = "RF safety assessor"
organisation = "Org & Co"
date = "2027-04-01"
reviewer = "C. <Checker>"
reviewer_qualification = "senior assessor"
review_date = "2027-04-02"

[[point]]
label = "gate <x>"
x_m = -60.0
y_m = 40.0
height_m = 1.5
duration_s = 4.0
photos = [{file = "gate.png", caption = "looking <in> from the gate", direction_deg = 250.0}]

[[point]]
label = "mast"
x_m = 4.0
y_m = -4.0
height_m = 1.5
duration_s = 4.0
notes = "by the <fence>"
"""


def _png(color="blue") -> bytes:
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from meterlink.reports.htmlpage import figure_png
    fig, ax = plt.subplots(figsize=(2, 1.5))
    ax.plot([0, 1], [0, 1], color=color)
    png = figure_png(fig, dpi=50)
    plt.close(fig)
    return png


def _answers(tmp):
    """(prompt fragment, answer) in the order the interactive survey asks; None takes the default."""
    head = [("Site name", "Test <i>ground</i>"), ("Technician", "T. Tester"), ("Standard", "icnirp-1998"),
            ("Tier", "public"), ("Decision rule", "guarded"), ("Certificate", "demo-probe"), ("Follow-up", "20"),
            ("Declared frequency", "80-6000"),
            ("Source 1 name", "Pole <LTE>"), ("frequency (MHz)", "806"), ("technology", "LTE"),
            ("power during the survey", "oops"), ("power during the survey", "250"),   # a slip is asked again
            ("maximum power", "400"), ("Source 2 name", ""),
            ("Weather", "overcast, <dry>"), ("air temperature", "11.5"), ("relative humidity", "120"),
            ("relative humidity", "55"),                                  # out of range: asked again
            ("Transmitter state confirmed with", "N. Operator & desk"), ("confirmed when", "2027-03-30 09:40"),
            ("state confirmed", "all sectors on air at <typical> load"),
            ("Report number", "SR-<7>"), ("Assessor", "A. Assessor"), ("qualification", "RF safety assessor"),
            ("Organisation", "Org & Co"), ("Report date", "2027-04-01"), ("Checked by", "C. <Checker>"),
            ("reviewer's qualification", "senior assessor"), ("review date", "2027-04-02")]

    def point(n, label, xy, notes, photos):
        return ([(f"Point {n} label", label), ("Mode", "spot"), ("Height", "1.5"), ("Position", xy),
                 ("Duration", "4"), ("Notes", notes)] + [a for p in photos for a in p] + [("Photo of", "")]
                )                              # positions given: the mover places the probe, no "hold" prompt
    gate = [("Photo of", str(tmp / "missing.png")), ("Photo of", str(tmp / "gate.png")),
            ("caption", "looking <in> from the gate"), ("direction", "400"), ("direction", "250")]
    return (head + point(1, "gate <x>", "-60, 40", "", [gate])
            + [("Measure a point again", "")]
            + point(2, "mast", "4, -4", "by the <fence>", [])
            + [("Measure a point again", "r"), ("Reason", "  "), ("Reason", REASON),
               ("Photo of 'mast'", str(tmp / "mast.png")), ("caption", ""), ("direction", ""),
               ("Photo of 'mast'", ""),
               ("Measure a point again", ""), ("Point 3 label", "")])


@pytest.fixture(scope="module")
def both(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("parity")
    (tmp / "gate.png").write_bytes(_png())
    (tmp / "mast.png").write_bytes(_png(color="red"))
    (tmp / "plan.toml").write_text(PLAN, encoding="utf-8")
    script, asked = iter(_answers(tmp)), []

    def ask(prompt, default=None, choices=None):
        want, answer = next(script)
        assert want in prompt, (want, prompt)
        asked.append(prompt)
        return default if answer is None else answer
    with SimulatedMeter("demo", seed=41, speed=100.0) as sim:
        sid_s = run_plan(sim.port, str(tmp / "plan.toml"), tmp / "s.db", mover=sim.move_to)
        placed = []

        def mover(pos):        # the first capture at the mast: the probe stood 40 m off, on the far side
            placed.append(pos)
            first_at_mast = pos[:2] == (4.0, -4.0) and sum(p[:2] == (4.0, -4.0) for p in placed) == 1
            sim.move_to((-36.0, 36.0, pos[2]) if first_at_mast else pos)
        sid_i = run_interactive(sim.port, tmp / "i.db", ask=ask, mover=mover)
    assert next(script, None) is None
    (tmp / "mast.png").rename(tmp / "moved-away.png")        # kept in the database: the report still has it
    (tmp / "gate.png").rename(tmp / "gate-moved.png")
    out = {}
    for name, db, sid in (("scripted", tmp / "s.db", sid_s), ("interactive", tmp / "i.db", sid_i)):
        html = write_report(db, sid, tmp / name, pdf=name == "interactive").read_text(encoding="utf-8")
        with Store(db, readonly=True) as store:
            out[name] = (html, load_survey(store, sid), tmp / name / "report.pdf")
    return tmp, out


def _section(html: str, start: str, end: str) -> str:
    return html[html.index(start):html.index(end)]


def test_the_same_answers_give_the_same_report_sections(both):
    _, out = both
    (hs, svs, _), (hi, svi, _) = out["scripted"], out["interactive"]
    for start, end in (("id='site'", "id='sources'"), ("id='sources'", "id='instrument'"),
                       ("id='basis'", "id='points'"), ("id='signoff'", "id='cautions'")):
        assert _section(hs, start, end) == _section(hi, start, end), start
    assert "Report SR-&lt;7&gt;, revision 0" in hs and "Report SR-&lt;7&gt;, revision 0" in hi
    basis = _section(hi, "id='basis'", "id='points'")
    assert "overcast, &lt;dry&gt;; air temperature 11.5 °C; relative humidity 55 %" in basis
    assert "confirmed with N. Operator &amp; desk, 2027-03-30 09:40: all sectors on air at &lt;typical&gt; load" in basis
    assert "C. &lt;Checker&gt;" in _section(hi, "id='signoff'", "id='cautions'")
    # extrapolated to 400 W, with the transmitter state confirmed: no warning that it was not
    assert "not confirmed with the operator" not in hi and "at the maximum\npower declared" in hi
    for key in ("standard", "tier", "decision_rule", "e_ref_v_per_m", "band_lo_hz", "band_hi_hz", "followup_percent",
                "certificate_sha256"):
        assert svs[key] == svi[key], key
    cols = ("point_no", "label", "mode", "x_m", "y_m", "height_m", "notes")
    assert [[p[c] for c in cols] for p in svs["points"]] == [[p[c] for c in cols] for p in svi["points"]]
    assert svs["photos"][1] == svi["photos"][1]                          # the gate photo, same bytes
    # both reports compare the mast point with the same extrapolation factor: sqrt(400 / 250)
    assert "1.26" in _section(hs, "id='sources'", "id='instrument'")


def test_the_interactive_record_is_a_plan_that_reads_back(both):
    from meterlink.survey.plan import load_plan

    _, out = both
    sv = out["interactive"][1]
    import tomllib
    doc = tomllib.loads(sv["plan_text"])
    plan = load_plan(doc, check_photos=False)          # the photos' originals have moved since
    assert [p.label for p in plan.points] == ["gate <x>", "mast"]
    assert plan.band_hz == (80e6, 6e9) and plan.sources[0].max_power_w == 400.0
    assert doc["report"]["number"] == "SR-<7>"


def test_report_concludes_on_the_new_capture_lists_the_old_and_embeds_moved_photos(both):
    tmp, out = both
    html, sv, pdf = out["interactive"]
    (old,) = sv["replaced"]
    mast = next(p for p in sv["points"] if p["label"] == "mast")
    assert old["label"] == "mast" and old["reason"] == REASON and mast["capture_no"] == 2
    assert mast["percent_power"] > 1.5 * old["percent_power"]      # 50 m off, then at the mast foot
    concl = _section(html, 'id="conclusion"', "</section>")
    top = max(sv["points"], key=lambda p: p["percent_power"])
    assert top["id"] == mast["id"]
    assert f"{mast['percent_power']:.1f} % of the power-density reference level" in concl
    assert f"{old['percent_power']:.1f} %" not in concl
    replaced = _section(html, "id='remeasured'", "id='statements'")
    assert f"<td class=\"n\">{old['percent_power']:.1f}</td>" in replaced
    assert str(markupsafe.escape(REASON)) in replaced
    # user text escaped everywhere: reason, labels, notes, site, source, report number
    for raw in ("<b>misplaced</b>", "gate <x>", "<fence>", "<i>ground</i>", "Pole <LTE>", "SR-<7>"):
        assert raw not in html
    # both photos embedded byte for byte although their files have moved
    photos = _section(html, "id='photos'", "id='signoff'")
    for f in ("gate-moved.png", "moved-away.png"):
        assert "data:image/png;base64," + base64.b64encode((tmp / f).read_bytes()).decode() in photos
    assert "point 1\ngate &lt;x&gt;: gate.png: looking &lt;in&gt; from the gate." in photos
    # 250 degrees from north: west-south-west on the 16-point compass (247.5 to 270 less half a point)
    assert "Looking 250° from north (WSW)." in photos
    assert "Direction of view not given." in photos                      # the mast photo: none entered
    assert "at the latest (file modification time; the photo holds no EXIF time)" in photos
    # the PDF: every page numbered and identified, the conclusion and the replaced capture in it
    ident = "Survey of Test <i>ground</i>, report SR-<7> rev. 0"
    pages = check_pdf(pdf, html, ident)
    text = " ".join(" ".join(p.extract_text().split()) for p in pypdf.PdfReader(str(pdf)).pages)
    assert pages >= 2 and re.search(r"Conclusion Outcome for the site", text)
    assert "Re-measured points" in text and "probe<b>misplaced</b>&wet" in text.replace(" ", "")


def test_a_missing_or_non_image_photo_in_a_plan_is_one_line_before_the_meter(tmp_path, capsys):
    from meterlink.cli import main

    plan = tmp_path / "plan.toml"
    plan.write_text(PLAN, encoding="utf-8")
    assert main(["survey", "--port", str(tmp_path / "no-meter"), "--plan", str(plan), "--db",
                 str(tmp_path / "x.db")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "gate.png" in err[0] and "No such file" in err[0]
    (tmp_path / "gate.png").write_text("not an image", encoding="utf-8")
    assert main(["survey", "--port", str(tmp_path / "no-meter"), "--plan", str(plan), "--db",
                 str(tmp_path / "x.db")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "is not a PNG or JPEG image" in err[0]
    assert not (tmp_path / "x.db").exists()
