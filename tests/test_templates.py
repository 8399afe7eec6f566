"""The report templates: autoescaping of hostile text, restyling from a --template-dir folder, and the
guards (a misspelt field fails, a restyled page without the cautions is refused), on real reports.

HTML escaping as the HTML Living Standard, 13.1.2.6 and 13.1.2.3: in text and attribute values '<',
'>', '&' and '"' must be written as character references to stay text; control characters other
than tab and newline are shown as visible escapes (ECMA-48 5.2-5.3: ESC introduces control sequences).
"""

from __future__ import annotations

import datetime as dt
import subprocess
import sys

import pytest

from conftest import ROOT
from meterlink.cautions import SAFETY_LINE
from meterlink.cli import main
from meterlink.errors import MeterlinkError
from meterlink.reports.templating import render
from labitems import with_certificate_items


@pytest.fixture(scope="module")
def cal():
    from meterlink.lab import certify, procedures as pr
    from meterlink.lab.session import LabSession
    from meterlink.simulators.lab import InProcessLab

    s = LabSession("<script>alert('model')</script>", "S\x1b[2J-1", "Lab \"quoted\" & <b>bold</b>", "N-<1>",
                   dt.date(2027, 6, 1), dt.date(2028, 6, 1), operator="\u202eevil")
    s = with_certificate_items(s)
    plan = pr.full_plan(s, freqs=(1e8, 1e9, 3e9), levels=(0.2, 1, 5, 20), iso_step_deg=45)
    return certify.analyse(s, pr.run_plan(plan, InProcessLab(seed=2), repeats=3))


def test_hostile_text_stays_text_in_every_place(cal):
    from meterlink.lab import html

    page = html.render(cal)
    assert "<script>" not in page and "&lt;script&gt;alert(&#39;model&#39;)&lt;/script&gt;" in page
    assert "<b>bold</b>" not in page and "Lab &#34;quoted&#34; &amp; &lt;b&gt;bold&lt;/b&gt;" in page
    assert "\x1b" not in page and "S\\x1b[2J-1" in page               # ESC shown, never sent
    assert "\u202e" not in page and "\\u202eevil" in page              # bidi override shown, never applied
    assert "<title>Calibration certificate N-&lt;1&gt;</title>" in page
    assert page.count("<table") == page.count("</table>") >= 5         # the markup around stays whole


def test_a_template_dir_overrides_the_stylesheet_and_a_template_by_file_name(cal, tmp_path):
    from meterlink.lab import html

    (tmp_path / "report.css").write_text("h1{color:#0a5c36;font-family:serif}\n")
    (tmp_path / "certificate.html").write_text(
        '{% extends "base.html" %}{% block content %}<p id="ours">Issued by {{ summary_rows[1][1] }}</p>'
        "<p>{{ results_statement }}</p>{% endblock %}\n")
    plain = html.render(cal)
    styled = html.render(cal, None, tmp_path)
    assert "h1{color:#0a5c36;font-family:serif}" in styled and "h1{color:#0a5c36" not in plain
    assert "border-bottom:3px solid #2b6f77" in plain and "border-bottom:3px solid #2b6f77" not in styled
    assert '<p id="ours">Issued by Lab &#34;quoted&#34; &amp; &lt;b&gt;bold&lt;/b&gt;</p>' in styled
    assert "@page" in styled                        # print.css not overridden: the packaged one fills in
    # only report.css overridden: the packaged certificate layout with the new look
    (tmp_path / "certificate.html").unlink()
    assert "Measurement uncertainty" in html.render(cal, None, tmp_path)


def test_a_restyled_template_without_the_cautions_is_refused(tmp_path):
    # the base's cautions block stays unless a template empties it on purpose
    (tmp_path / "kept.html").write_text('{% extends "base.html" %}{% block content %}x{% endblock %}\n')
    assert SAFETY_LINE in render("kept.html", tmp_path, title="t", ident="i")
    (tmp_path / "dropped.html").write_text('{% extends "base.html" %}{% block cautions %}{% endblock %}'
                                           '{% block content %}x{% endblock %}\n')
    with pytest.raises(MeterlinkError, match="lacks the safety cautions"):
        render("dropped.html", tmp_path, title="t", ident="i")


def test_a_restyled_certificate_without_the_lab_statement_is_refused(cal, tmp_path):
    from meterlink.lab import html

    # a certificate's cautions block holds the lab's statements; the exposure cautions alone do not do
    (tmp_path / "certificate.html").write_text('{% extends "base.html" %}{% block content %}x{% endblock %}\n')
    with pytest.raises(MeterlinkError, match="lacks the statement 'The results in this certificate relate only"):
        html.render(cal, None, tmp_path)


def test_a_misspelt_field_fails_instead_of_leaving_a_blank(tmp_path):
    for name, text, msg in (("undefined", "<p>{{ safety_line }} {{ titel }}</p>\n", "'titel' is undefined"),
                            ("syntax", "<p>{{ safety_line }}\n{% if %}</p>\n", "line 2")):
        (tmp_path / name).mkdir()
        (tmp_path / name / "base.html").write_text(text)
        with pytest.raises(MeterlinkError, match=msg):
            render("base.html", tmp_path / name, title="x", ident="y")


def test_packaged_templates_autoescape_and_non_html_files_do_not(tmp_path):
    from meterlink.reports.templating import environment

    env = environment()
    assert env.get_template("base.html").render(title="<x>", ident="&", safety_line="s").count("&lt;x&gt;") == 2
    assert "&lt;" not in env.get_template("print.css").render()      # a stylesheet is not HTML


def test_template_dir_errors_are_one_line(tmp_path):
    p = subprocess.run([sys.executable, "-m", "meterlink", "render", str(tmp_path / "none.db"), "--template-dir",
                        str(tmp_path / "nowhere")], capture_output=True, text=True, cwd=ROOT, timeout=60)
    assert p.returncode == 2 and "Traceback" not in p.stderr
    lines = p.stderr.strip().splitlines()
    assert len(lines) == 1 and "nowhere" in lines[0] and "not a folder" in lines[0]


def test_report_command_takes_a_template_dir(tmp_path, capsys):
    # the session report of a real recording, restyled through the CLI
    from meterlink.simulators.pty_meter import SimulatedMeter
    from meterlink.storage.recorder import Recorder
    from meterlink.storage.store import Store

    db = tmp_path / "r.db"
    with SimulatedMeter("demo", sensor="probe", seed=5, speed=100.0) as sim, Store(db) as store:
        Recorder(store, sim.port, interval_ms=1000, duration_s=30.0, host_timeout_s=30.0, freq_hz=101.8e6).run()
    assert main(["assess", "--db", str(db), "--standard", "icnirp-2020", "--tier", "public", "--json"]) == 0
    style = tmp_path / "style"
    style.mkdir()
    (style / "report.css").write_text("body{background:#fdf6e3}\n")
    assert main(["report", "--db", str(db), "--session", "1", "--out", str(tmp_path / "a")]) == 0
    assert main(["report", "--db", str(db), "--session", "1", "--out", str(tmp_path / "b"), "--template-dir",
                 str(style)]) == 0
    capsys.readouterr()
    a = (tmp_path / "a" / "report.html").read_text()
    b = (tmp_path / "b" / "report.html").read_text()
    assert "body{background:#fdf6e3}" in b and "body{background:#fdf6e3}" not in a
    assert SAFETY_LINE in a and SAFETY_LINE in b
