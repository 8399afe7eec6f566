"""The survey report a person signs and files: conclusion first, report number and revision on every
page, sign-off block, photos per point; rendered for real from a survey run on the simulated meter."""

from __future__ import annotations

import base64
import json
import re

import pypdf
import pytest

from meterlink.cautions import SAFETY_LINE
from meterlink.cli import main
from meterlink.simulators.pty_meter import SimulatedMeter
from meterlink.storage.store import Store
from meterlink.survey.report import site_outcome
from meterlink.survey.run import run_plan
from meterlink.survey.store import load_survey
from test_pdf import check_pdf

PLAN = """
[survey]
title = "Sign-off check survey"
standard = "icnirp-1998"
tier = "public"
rule = "guarded"
certificate = "demo-probe"
settle_s = 2
spot_s = 4
followup_v_per_m = 0.5

[report]
number = "SR-<b>77</b>"
revision = "2"
assessor = "A. <i>Assessor</i>"
qualification = "RF safety assessor, level 2"
organisation = "Org & Co"
date = "2027-04-01"

[site]
name = "Test ground"

[[source]]
name = "FM"
technology = "FM"
freq_hz = 94.3e6
power_w = 10000
max_power_w = 10000

[[point]]
label = "near <script>x</script>"
x_m = 4.0
y_m = -4.0
photos = ["near.png"]

[[point]]
label = "far"
x_m = -60.0
y_m = 40.0
"""


def _png() -> bytes:
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from meterlink.reports.htmlpage import figure_png
    fig, ax = plt.subplots(figsize=(2, 1.5))
    ax.plot([0, 1], [0, 1])
    png = figure_png(fig, dpi=50)
    plt.close(fig)
    return png


@pytest.fixture(scope="module")
def survey(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("signoff")
    (tmp / "plan.toml").write_text(PLAN, encoding="utf-8")
    (tmp / "near.png").write_bytes(_png())
    with SimulatedMeter("demo", seed=21, speed=100.0) as sim:
        sid = run_plan(sim.port, str(tmp / "plan.toml"), tmp / "s.db", mover=sim.move_to)
    return tmp, sid


def test_site_outcome_is_the_worst_assessable_point():
    # ILAC-G8:09/2019 4.2.3 zones, from best to worst: pass, conditional pass, conditional fail, fail;
    # a point without a conformity statement does not decide the site
    assert site_outcome(["compliant", "conditional pass"]) == "conditional pass"
    assert site_outcome(["compliant", "conditional fail", "conditional pass"]) == "conditional fail"
    assert site_outcome(["conditional fail", "not compliant", "not assessable"]) == "not compliant"
    assert site_outcome(["not assessable", "compliant"]) == "compliant"
    assert site_outcome(["not assessable", None]) == "not assessable"


def test_conclusion_first_sign_off_number_and_photos_in_html_and_pdf(survey, capsys):
    tmp, sid = survey
    assert main(["render", str(tmp / "s.db"), "--format", "pdf", "--out", str(tmp / "r"), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["kind"] == "survey"
    html = (tmp / "r" / "report.html").read_text(encoding="utf-8")
    with Store(tmp / "s.db", readonly=True) as store:
        pts = load_survey(store, sid)["points"]
    # the conclusion comes before everything else the report says
    concl = html[html.index('id="conclusion"'):html.index("</section>")]
    assert html.index('id="conclusion"') < html.index("id='site'") < html.index("id='signoff'")
    top = max(pts, key=lambda p: p["percent_power"])
    assert "Outcome for the site under the guarded decision rule" in concl
    assert f"{top['percent_power']:.1f} % of the power-density reference level" in concl
    assert str(__import__("markupsafe").escape(top["label"])) in concl
    follow = [p["label"] for p in pts if p["followup"]]
    assert follow and "Frequency-selective follow-up needed at" in concl     # 0.5 V/m threshold: FM site
    assert "</strong> (broadband value above the follow-up threshold" in concl
    # sign-off and report number, user text escaped
    for raw in ("<b>77</b>", "<i>Assessor</i>", "<script>x</script>"):
        assert raw not in html
    for esc in ("SR-&lt;b&gt;77&lt;/b&gt;", "A. &lt;i&gt;Assessor&lt;/i&gt;", "RF safety assessor, level 2",
                "Org &amp; Co", "2027-04-01", 'class="sigline"'):
        assert esc in html
    # the photo named in the plan, embedded byte for byte
    assert "data:image/png;base64," + base64.b64encode((tmp / "near.png").read_bytes()).decode() in html
    # every PDF page: the report number and revision, page x of y; the cautions stay
    pages = check_pdf(tmp / "r" / "report.pdf", html, "report SR-<b>77</b> rev. 2")
    text = " ".join(" ".join(p.extract_text().split()) for p in pypdf.PdfReader(str(tmp / "r" / "report.pdf")).pages)
    assert pages >= 2 and re.search(r"Conclusion Outcome for the site", text)
    assert " ".join(SAFETY_LINE.split()) in text


def test_options_override_number_and_revision(survey, capsys):
    tmp, _ = survey
    assert main(["render", str(tmp / "s.db"), "--out", str(tmp / "o"), "--report-number", "SR-9",
                 "--revision", "3"]) == 0
    html = (tmp / "o" / "report.html").read_text(encoding="utf-8")
    assert "Report SR-9, revision 3" in html and "SR-&lt;b&gt;77" not in html


def test_a_moved_photo_is_still_embedded_and_without_a_kept_copy_a_missing_one_is_one_line(survey, capsys):
    import sqlite3

    tmp, _ = survey
    png = (tmp / "near.png").read_bytes()
    uri = "data:image/png;base64," + base64.b64encode(png).decode()
    (tmp / "near.png").rename(tmp / "moved.png")
    try:
        # copied into the database when the point was measured (schema version 10)
        assert main(["render", str(tmp / "s.db"), "--out", str(tmp / "k")]) == 0
        assert uri in (tmp / "k" / "report.html").read_text(encoding="utf-8")
        # a survey stored before photos were kept: the plan's file is read, and its absence is one line
        con = sqlite3.connect(tmp / "s.db")
        con.execute("delete from survey_photos")
        con.commit()
        con.close()
        capsys.readouterr()
        assert main(["render", str(tmp / "s.db"), "--out", str(tmp / "m")]) == 2
    finally:
        (tmp / "moved.png").rename(tmp / "near.png")
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "near.png" in err[0] and "No such file" in err[0]
