"""Reports rendered to PDF through WeasyPrint, checked on its real layout and on the PDF read back.

Page size: A4 is 210 mm x 297 mm (ISO 216); in the PDF that is 595.28 x 841.89 points (1 pt = 1/72 in),
in WeasyPrint's CSS pixels 793.70 px wide (1 px = 1/96 in, CSS Values and Units Level 3, 5.2).
Every page must carry "page X of Y" and the report's identification (print.css footer), every line
of text inside a table must lie within the page's content box (nothing cut at the edge), and no table
row may be split across two pages; the rows of a table's header repeat on each page it spans.
The reports come from real runs: a survey and a recording over the simulated meter on its pty, a
calibration on the simulated lab bench.
"""

from __future__ import annotations

import dataclasses
import json
import re
import sys
from collections import defaultdict

import pytest
import pypdf
import weasyprint
from weasyprint.formatting_structure import boxes

from meterlink.cli import SAFETY_LINE, main
from meterlink.reports.templating import write_pdf
from meterlink.simulators.pty_meter import SimulatedMeter
from meterlink.simulators.scenario import load_scenario
from meterlink.storage.recorder import Recorder
from meterlink.storage.store import Store
from meterlink.survey.run import run_plan
from meterlink.survey.store import load_survey
from labitems import with_certificate_items

A4_PT = (210 / 25.4 * 72, 297 / 25.4 * 72)        # ISO 216 A4 in PDF points
A4_PX = 210 / 25.4 * 96                            # its width in CSS px
LONG = "0123456789abcdef" * 14                     # 224 characters with no break opportunity
PLAN = {
    "survey": {"title": "PDF check survey", "standard": "icnirp-1998", "tier": "public", "rule": "guarded",
               "certificate": "demo-probe", "settle_s": 2, "spot_s": 4, "followup_v_per_m": 5.0},
    "site": {"name": "Hollin Scar test ground (invented)", "technician": "A. Example",
             "notes": f"access code {LONG}"},
    "source": [{"name": "Pole LTE 800", "technology": "LTE", "freq_hz": 806e6, "power_w": 250, "max_power_w": 400}],
    "point": [
        {"label": f"long-{LONG}", "x_m": -60, "y_m": 40, "mode": "spot", "notes": LONG},
        {"label": "mast foot", "x_m": 4, "y_m": -4, "mode": "spatial", "scheme": "custom", "heights_m": [1.0, 1.6]},
    ],
}


def layout_problems(html: str) -> tuple[int, list[str]]:
    """(pages, problems) of WeasyPrint's layout of html: figures, tables or text in tables past the page's
    content box, table body rows split across pages."""
    doc = weasyprint.HTML(string=html).render()
    problems = []
    rows_on = defaultdict(set)
    for i, page in enumerate(doc.pages):
        pb = page._page_box
        assert pb.margin_width() == pytest.approx(A4_PX, abs=0.01)
        left, right = pb.content_box_x(), pb.content_box_x() + pb.width
        for img in (b for b in pb.descendants() if isinstance(b, boxes.ReplacedBox)):     # figures
            if img.position_x < left - 0.5 or img.position_x + img.margin_width() > right + 0.5:
                problems.append(f"page {i + 1}: a figure spans {img.position_x:.1f}..{img.position_x + img.margin_width():.1f} px")
        for table in (b for b in pb.descendants() if isinstance(b, boxes.TableBox)):
            for b in table.descendants():
                if isinstance(b, (boxes.TableBox, boxes.TableCellBox, boxes.TextBox)):
                    x0, x1 = b.position_x, b.position_x + b.margin_width()
                    if x0 < left - 0.5 or x1 > right + 0.5:
                        what = b.text[:20] if isinstance(b, boxes.TextBox) else type(b).__name__
                        problems.append(f"page {i + 1}: {what!r} spans {x0:.1f}..{x1:.1f} px, content {left:.1f}.."
                                        f"{right:.1f}")
                if isinstance(b, boxes.TableRowGroupBox) and not b.is_header:
                    for row in b.children:
                        rows_on[row.element].add(i)
    for pages in rows_on.values():
        if len(pages) > 1:
            problems.append(f"a body row is split over pages {sorted(pages)}")
    return len(doc.pages), problems


def wrapped_cells(html: str) -> dict[str, int]:
    """Text of every table cell laid out on more than one line -> its number of lines."""
    doc = weasyprint.HTML(string=html).render()
    out = {}
    for page in doc.pages:
        for cell in (b for b in page._page_box.descendants() if isinstance(b, boxes.TableCellBox)):
            lines = [b for b in cell.descendants() if isinstance(b, boxes.LineBox)]
            text = "".join(b.text for b in cell.descendants() if isinstance(b, boxes.TextBox))
            if len(lines) > 1:
                out[text] = len(lines)
    return out


def repeated_header_rows(html: str) -> int:
    """How many header rows (thead tr) WeasyPrint lays out on more than one page."""
    doc = weasyprint.HTML(string=html).render()
    on = defaultdict(set)
    for i, page in enumerate(doc.pages):
        for b in page._page_box.descendants():
            if isinstance(b, boxes.TableRowGroupBox) and b.is_header:
                for row in b.children:
                    on[row.element].add(i)
    return sum(1 for pages in on.values() if len(pages) > 1)


def check_pdf(pdf_path, html: str, ident: str, statement: str = SAFETY_LINE) -> int:
    """The PDF against the layout: same page count, A4, footer on every page; returns the page count."""
    pages, problems = layout_problems(html)
    assert problems == []
    reader = pypdf.PdfReader(str(pdf_path))
    assert len(reader.pages) == pages >= 1
    for i, page in enumerate(reader.pages, start=1):
        w, h = float(page.mediabox.width), float(page.mediabox.height)
        assert (w, h) == (pytest.approx(A4_PT[0], abs=0.05), pytest.approx(A4_PT[1], abs=0.05))
        text = " ".join(page.extract_text().split())
        assert f"page {i} of {pages}" in text
        assert ident in text
    whole = " ".join(" ".join(p.extract_text().split()) for p in reader.pages)
    assert " ".join(statement.split()[:6]) in whole     # the cautions (a certificate: the lab's statement)
    return pages


@pytest.fixture(scope="module")
def survey_db(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("pdfsurvey")
    sc = load_scenario("demo")
    sc = dataclasses.replace(sc, device={**sc.device, "model": "<script>alert(1)</script>"})
    with SimulatedMeter(sc, seed=11, speed=100.0) as sim:
        sid = run_plan(sim.port, PLAN, tmp / "s.db", mover=sim.move_to)
    return tmp / "s.db", sid


def test_survey_report_pdf_pages_footer_and_tables_within_the_page(survey_db, tmp_path, capsys):
    db, sid = survey_db
    assert main(["report", "--db", str(db), "--session", str(sid), "--out", str(tmp_path / "r"), "--pdf",
                 "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    html = (tmp_path / "r" / "report.html").read_text(encoding="utf-8")
    assert out["pdf"] == str(tmp_path / "r" / "report.pdf")
    assert '<p class="caution"><strong>Safety.</strong>' in html     # the exposure cautions stay on surveys
    pages = check_pdf(tmp_path / "r" / "report.pdf", html, f"survey session {sid}")
    assert pages >= 2            # the survey report of two points does not fit one A4 page
    # the long unbroken label is wrapped over several lines of its cell, whole, not cut
    cells = wrapped_cells(html)
    assert cells.get(f"long-{LONG}", 0) >= 3
    # the notes: on the point's second line (after its follow-up), across nine of the ten columns, wrapped whole
    assert [n for text, n in cells.items() if text.endswith("; " + LONG) or text.endswith(";" + LONG)] >= [2]


def test_a_long_wide_table_wraps_repeats_its_header_and_keeps_rows_whole(survey_db):
    from meterlink.survey.report import render_html

    db, sid = survey_db
    with Store(db, readonly=True) as store:
        sv = load_survey(store, sid)
    sv["points"] = [dict(sv["points"][0], point_no=n) for n in range(1, 41)]   # 40 rows of the long label
    html = render_html(sv, {})
    pages, problems = layout_problems(html)
    assert problems == [] and pages >= 3
    assert repeated_header_rows(html) >= 2           # the points and the extrapolation tables span pages
    # the points table: ten columns at 8 pt or more (it was twelve at 7 pt), and each point's second line
    # (follow-up, notes) on the page of its first
    doc = weasyprint.HTML(string=html).render()
    sizes, point_on = set(), defaultdict(set)
    for i, page in enumerate(doc.pages):
        for table in (b for b in page._page_box.descendants() if isinstance(b, boxes.TableBox)
                      and "points" in (b.element.get("class") or "").split()):
            sizes |= {b.style["font_size"] for b in table.descendants() if isinstance(b, boxes.TextBox)}
            for group in (b for b in table.descendants() if isinstance(b, boxes.TableRowGroupBox) and not b.is_header):
                point_on[group.element].add(i)
                assert len(group.element.findall("tr")) == 2            # every point here has notes
            assert len(table.element.find("thead").findall("tr/th")) == 10
    assert sizes and min(sizes) >= 8 * 96 / 72                            # CSS px: 96 per inch, 72 pt per inch
    assert len(point_on) == 40 and max(len(p) for p in point_on.values()) == 1
    assert len(set().union(*point_on.values())) >= 2                      # and the table does span pages


def test_the_check_finds_a_table_past_the_page_without_print_css(survey_db, tmp_path):
    # the same report with a print.css and report.css that let tables and figures size to their content:
    # the long cells and the figure now run past the right margin, and layout_problems says so (the
    # checks above can fail)
    from meterlink.survey.report import render_html

    db, sid = survey_db
    (tmp_path / "print.css").write_text("@page{size:A4;margin:18mm 15mm}\n"
                                        "@page{@bottom-right{content:'page ' counter(page) ' of ' counter(pages)}}\n")
    (tmp_path / "report.css").write_text("table{border-collapse:collapse}\n")
    from meterlink.survey import plots

    with Store(db, readonly=True) as store:
        sv = load_survey(store, sid)
    figures = {"points": plots.points_plot(sv["points"])}          # 8 in at 110 dpi: wider than the page
    assert layout_problems(render_html(sv, figures))[1] == []
    _, problems = layout_problems(render_html(sv, figures, tmp_path))
    assert any("a figure spans" in p for p in problems)
    assert any(LONG[:20] in p for p in problems)                       # the unbroken cell runs off the page


def test_session_report_pdf(tmp_path, capsys):
    db = tmp_path / "r.db"
    with SimulatedMeter("demo", sensor="probe", seed=9, speed=100.0) as sim, Store(db) as store:
        Recorder(store, sim.port, interval_ms=1000, duration_s=60.0, host_timeout_s=30.0, freq_hz=101.8e6,
                 notes=f"<b>north gate</b> {LONG}").run()
    assert main(["assess", "--db", str(db), "--standard", "icnirp-2020", "--tier", "public", "--json"]) == 0
    capsys.readouterr()
    assert main(["render", str(db), "--format", "pdf", "--out", str(tmp_path / "rep"), "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["kind"] == "recording" and out["session"] == 1
    html = (tmp_path / "rep" / "report.html").read_text(encoding="utf-8")
    assert "<b>north gate</b>" not in html and "&lt;b&gt;north gate&lt;/b&gt;" in html
    assert '<p class="caution"><strong>Safety.</strong>' in html     # and on recorded-session reports
    check_pdf(tmp_path / "rep" / "report.pdf", html, "Exposure record, session 1")


def test_lab_certificate_pdf(tmp_path):
    import datetime as dt

    from meterlink.lab import certify, html as lab_html, procedures as pr
    from meterlink.lab.session import LabSession
    from meterlink.simulators.lab import InProcessLab

    s = LabSession("three-axis probe (invented)", "P-77", "Test lab <i>(invented)</i>", "CERT-PDF-1",
                   dt.date(2027, 6, 1), dt.date(2028, 6, 1))
    s = with_certificate_items(s)
    plan = pr.full_plan(s, freqs=(3e7, 1e8, 3e8, 1e9, 3e9, 6e9), levels=(0.2, 1, 5, 20), iso_step_deg=30)
    cal = certify.analyse(s, pr.run_plan(plan + pr.temperature_plan(s, (10.0, 23.0, 35.0)), InProcessLab(seed=4),
                                         repeats=3))
    page = lab_html.render(cal)
    assert "Test lab &lt;i&gt;(invented)&lt;/i&gt;" in page
    pages = check_pdf(write_pdf(page, tmp_path / "certificate.pdf"), page, "Calibration certificate CERT-PDF-1",
                      lab_html.RESULTS_STATEMENT)
    assert pages >= 2
    # the budget's rows reach the PDF as numbers (the 9-column response table included)
    text = " ".join(" ".join(p.extract_text().split()) for p in pypdf.PdfReader(str(tmp_path / "certificate.pdf")).pages)
    assert "combined standard uncertainty u_c" in text and re.search(r"\b6000\b", text)


def test_pdf_without_weasyprint_is_one_line_with_the_install_hint(survey_db, tmp_path):
    # WeasyPrint made unimportable the way Python marks a missing module (sys.modules entry None)
    import subprocess

    from conftest import ROOT
    db, sid = survey_db
    code = ("import sys; sys.modules['weasyprint'] = None; from meterlink.cli import main; "
            f"sys.exit(main(['render', {str(db)!r}, '--session', '{sid}', '--format', 'pdf', '--out', "
            f"{str(tmp_path / 'o')!r}]))")
    p = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT, timeout=60)
    assert p.returncode == 2 and "Traceback" not in p.stderr
    lines = p.stderr.strip().splitlines()
    assert len(lines) == 1 and 'pip install "meterlink[pdf]"' in lines[0]
    assert not (tmp_path / "o").exists()            # refused before anything is written


def test_lab_import_writes_the_certificate_pdf_beside_the_page(tmp_path, capsys):
    from test_lab_cli import _readings

    _readings(tmp_path)
    out = tmp_path / "out"
    assert main(["lab", "import", str(tmp_path / "hand.csv"), "--session", str(tmp_path / "session.toml"),
                 "--out", str(out), "--register", str(tmp_path / "reg.tsv"), "--pdf", "--json"]) == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary["pdf"] == str(out / "certificate.pdf")
    from meterlink.lab.html import RESULTS_STATEMENT
    check_pdf(out / "certificate.pdf", (out / "certificate.html").read_text(encoding="utf-8"),
              "Calibration certificate LAB-CLI-1", RESULTS_STATEMENT)


def test_one_command_renders_a_survey_and_a_lab_folder_to_pdf(survey_db, tmp_path, capsys):
    # `meterlink render` is the one command for every report: the survey and the lab certificate as PDF too
    # (the session report through render is test_session_report_pdf above), each checked on its layout
    from test_lab_cli import _readings

    from meterlink.lab.html import RESULTS_STATEMENT

    db, sid = survey_db
    assert main(["render", str(db), "--session", str(sid), "--format", "pdf", "--out", str(tmp_path / "s")]) == 0
    html = (tmp_path / "s" / "report.html").read_text(encoding="utf-8")
    assert check_pdf(tmp_path / "s" / "report.pdf", html, f"survey session {sid}") >= 2
    _readings(tmp_path)
    issued = tmp_path / "issued"
    assert main(["lab", "import", str(tmp_path / "hand.csv"), "--session", str(tmp_path / "session.toml"),
                 "--out", str(issued), "--register", str(tmp_path / "reg.tsv"), "--json"]) == 0
    assert main(["render", str(issued), "--lab-session", str(tmp_path / "session.toml"), "--format", "pdf",
                 "--out", str(tmp_path / "c")]) == 0
    assert "certificate.pdf" in capsys.readouterr().out
    html = (tmp_path / "c" / "certificate.html").read_text(encoding="utf-8")
    assert html == (issued / "certificate.html").read_text(encoding="utf-8")
    check_pdf(tmp_path / "c" / "certificate.pdf", html, "Calibration certificate LAB-CLI-1", RESULTS_STATEMENT)
