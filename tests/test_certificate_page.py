"""The calibration certificate against what ISO/IEC 17025:2017 clause 7.8 asks it to state.

Items named as in ISO/IEC 17025:2017 7.8.2.1 (common to all reports) and 7.8.4.1 (calibration
certificates), lettering typed from memory of the standard's text: 7.8.2.1 a) title, b) name and
address of the laboratory, d) unique identification on every page and a clear end, e) customer,
f) method, g) item, i) date of the calibration, j) date of issue, l) results relate only to the
item, m) results with units, o) who authorises; 7.8.4.1 a) measurement uncertainty, b) conditions,
c) metrological traceability, d) results before and after adjustment (as found / as left).
The certificate is rendered for real (lab import of the shipped readings, HTML and WeasyPrint PDF).
"""

from __future__ import annotations

import datetime as dt
import json
import math
from markupsafe import escape

import pypdf
import pytest

from labitems import EXAMPLE_READINGS, EXAMPLE_SESSION
from meterlink.cautions import SAFETY_LINE
from meterlink.cli import main
from meterlink.lab.html import RESULTS_STATEMENT, coverage_probability_pct
from test_pdf import check_pdf

# a session of this test's own (text chosen here, hostile where a user types it)
SESSION = """
operator = "T. <em>Operator</em>"
ref_freq_hz = 1e9
[probe]
model = "Probe <script>alert(1)</script> model"
serial = "SN-7.8-\\u001b[31m"
condition = "scratched housing & loose cap"
[calibration]
lab = "Lab of the test"
address = "7 Clause Street, <b>Annex</b> A"
certificate_number = "T78-0001"
date = 2027-03-02
received = 2027-02-27
issued = 2027-03-05
interval_agreed_with_customer = true
due = 2028-03-02
[customer]
name = "Customer <i>&</i> Sons"
address = "9 Paragraph Road"
[signatory]
name = "Approver O'Neil"
function = "Quality manager"
[method]
kind = "tem-cell"
spacing_m = 0.15
procedure = "PROC-12 rev 4"
[ambient]
temp_c = 22.4
humidity_pct = 38.5
[[reference]]
name = "Sensor REF-A"
certificate_number = "CERT-OF-REF-A"
calibrated_by = "Upstream lab"
due = 2027-09-30
[[reference]]
name = "Coupler REF-B"
certificate_number = "CERT-OF-REF-B"
due = 2028-01-15
"""


def _pdf_text(path) -> list[str]:
    return [" ".join(p.extract_text().split()) for p in pypdf.PdfReader(str(path)).pages]


@pytest.fixture(scope="module")
def issued(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("cert78")
    (tmp / "session.toml").write_text(SESSION, encoding="utf-8")
    out = tmp / "out"
    rc = main(["lab", "import", str(EXAMPLE_READINGS), "--session", str(tmp / "session.toml"), "--out", str(out),
               "--register", str(tmp / "reg.tsv"), "--pdf", "--json"])
    assert rc == 0
    return out


def test_every_clause_7_8_item_is_on_the_page_and_in_the_pdf(issued):
    html = (issued / "certificate.html").read_text(encoding="utf-8")
    pdf = " ".join(_pdf_text(issued / "certificate.pdf"))
    items = {
        "7.8.2.1 a title": "Calibration certificate T78-0001",
        "7.8.2.1 b laboratory name": "Lab of the test",
        "7.8.2.1 b laboratory address": "7 Clause Street, <b>Annex</b> A",
        "7.8.2.1 e customer": "Customer <i>&</i> Sons",
        "7.8.2.1 e customer address": "9 Paragraph Road",
        "7.8.2.1 f method": "PROC-12 rev 4",
        "7.8.2.1 g item model": "Probe <script>alert(1)</script> model",
        "7.8.2.1 g item condition": "scratched housing & loose cap",
        "7.8.2.1 i date of calibration": "2027-03-02",
        "7.8.2.1 j date of issue": "2027-03-05",
        "7.8.2.1 l results relate only to the item": RESULTS_STATEMENT,
        "7.8.2.1 o authorised by": "Approver O'Neil",
        "7.8.2.1 o function": "Quality manager",
        "7.8.4.1 b temperature": "ambient temperature 22.4 degC",
        "7.8.4.1 b humidity": "relative humidity 38.5 %",
        "7.8.4.1 c reference standard": "Sensor REF-A",
        "7.8.4.1 c its certificate": "CERT-OF-REF-A",
        "7.8.4.1 c its due date": "2027-09-30",
        "7.8.4.1 c second standard": "CERT-OF-REF-B",
        "7.8.4.1 c traceability statement": "metrologically traceable to the International System of Units (SI)",
        "7.8.4.1 a coverage factor": "coverage factor k = 2",
        "7.8.4.1 a coverage probability": "coverage probability of approximately 95 %",
    }
    for item, text in items.items():
        assert str(escape(text)) in html, item
        assert " ".join(text.split()) in pdf, item
    # 7.8.2.1 m: results with units, each with its expanded uncertainty
    assert "<th>CF x (dB)</th>" in html and "<th>U (dB)</th>" in html and "unit 1" in html
    # 7.8.2.1 d: the end of the certificate is marked, after the signature
    assert pdf.rindex("End of certificate T78-0001") > pdf.rindex("Quality manager")


def test_identification_and_page_x_of_y_on_every_pdf_page(issued):
    html = (issued / "certificate.html").read_text(encoding="utf-8")
    pages = check_pdf(issued / "certificate.pdf", html, "Calibration certificate T78-0001", RESULTS_STATEMENT)
    assert pages >= 3
    for text in _pdf_text(issued / "certificate.pdf"):
        assert "Calibration certificate T78-0001" in text and "s/n SN-7.8-" in text


def test_device_and_user_text_is_escaped(issued):
    html = (issued / "certificate.html").read_text(encoding="utf-8")
    for raw in ("<script>", "<b>Annex</b>", "<i>&</i>", "<em>Operator</em>"):
        assert raw not in html
    assert "T. &lt;em&gt;Operator&lt;/em&gt;" in html
    assert "\x1b" not in html and "SN-7.8-\\x1b[31m" in html      # the escape shown, never sent


def test_the_certificate_carries_the_lab_statements_not_the_exposure_caution(issued):
    html = (issued / "certificate.html").read_text(encoding="utf-8")
    pdf = " ".join(_pdf_text(issued / "certificate.pdf"))
    assert str(escape(SAFETY_LINE)) not in html and 'class="caution"' not in html
    assert "energised antennas" not in pdf
    assert "reproduced only in full" in pdf


def test_coverage_probability_of_a_normal_distribution():
    # JCGM 100:2008 Table G.1: p = 95 % -> k = 1.960, p = 95.45 % -> k = 2, p = 99.73 % -> k = 3
    assert coverage_probability_pct(2.0) == pytest.approx(95.45, abs=0.005)
    assert coverage_probability_pct(1.960) == pytest.approx(95.0, abs=0.005)
    assert coverage_probability_pct(3.0) == pytest.approx(99.73, abs=0.005)


@pytest.mark.parametrize("drop, named", [
    ("[signatory]\nname = \"Approver O'Neil\"\nfunction = \"Quality manager\"\n", "signatory"),
    ('address = "7 Clause Street, <b>Annex</b> A"\n', "calibration.address"),
    ('humidity_pct = 38.5\n', "ambient.humidity_pct"),
    ('certificate_number = "CERT-OF-REF-B"\n', "certificate_number"),
])
def test_a_session_missing_a_required_item_is_one_line_naming_it(tmp_path, capsys, drop, named):
    assert drop in SESSION
    (tmp_path / "s.toml").write_text(SESSION.replace(drop, ""), encoding="utf-8")
    rc = main(["lab", "import", str(EXAMPLE_READINGS), "--session", str(tmp_path / "s.toml"),
               "--out", str(tmp_path / "o"), "--register", str(tmp_path / "reg.tsv")])
    err = capsys.readouterr().err.strip().splitlines()
    assert rc == 2 and len(err) == 1 and named in err[0] and "Traceback" not in err[0]
    assert not (tmp_path / "o").exists()


def test_a_reference_standard_past_its_due_date_is_refused(tmp_path, capsys):
    (tmp_path / "s.toml").write_text(SESSION.replace("due = 2027-09-30", "due = 2027-03-01"), encoding="utf-8")
    assert main(["lab", "budget", "--session", str(tmp_path / "s.toml")]) == 2
    err = capsys.readouterr().err.strip()
    assert "Sensor REF-A" in err and "2027-03-01" in err and len(err.splitlines()) == 1


def test_a_session_built_in_code_without_the_items_gets_no_certificate():
    from meterlink.lab import certify, html, procedures as pr
    from meterlink.lab.session import LabError, LabSession

    s = LabSession("probe (invented)", "P-1", "lab (invented)", "N-1", dt.date(2027, 1, 1), dt.date(2028, 1, 1))
    cal = certify.analyse(s, pr.import_csv(EXAMPLE_READINGS, s))
    with pytest.raises(LabError, match=r"lacks calibration.address, customer, \[\[reference\]\], signatory"):
        html.render(cal)


def test_the_shipped_example_runs_as_docs_lab_md_shows(tmp_path, capsys):
    # the command in docs/lab.md, on the files shipped in the package
    from conftest import ROOT

    doc = (ROOT / "docs" / "lab.md").read_text(encoding="utf-8")
    assert "meterlink lab import meterlink/lab/examples/readings.csv --session meterlink/lab/examples/session.toml" in doc
    assert main(["lab", "import", str(EXAMPLE_READINGS), "--session", str(EXAMPLE_SESSION), "--out",
                 str(tmp_path / "out"), "--json"]) == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary["certificate_number"].startswith("LAB-") and math.isfinite(summary["u_expanded_db"])
    page = (tmp_path / "out" / "certificate.html").read_text(encoding="utf-8")
    assert RESULTS_STATEMENT in page
    # ISO/IEC 17025:2017 7.8.4.3: the example's customer agreed no interval, so no due date anywhere
    assert "calibration due" not in page and "none was agreed with the customer" in page
    cert = (tmp_path / "out" / "certificate.toml").read_text(encoding="utf-8")
    assert "due" not in cert.split("[calibration]")[1].split("[")[0]
    from meterlink.physics.certificate import certificate_status, load_certificate
    loaded = load_certificate(tmp_path / "out" / "certificate.toml")
    assert loaded.due_date is None and certificate_status(loaded, dt.date(2040, 1, 1)) == []


def test_a_due_date_agreed_with_the_customer_is_stated(issued):
    # ISO/IEC 17025:2017 7.8.4.3: stated only when agreed (this session says it was)
    html = (issued / "certificate.html").read_text(encoding="utf-8")
    assert "<td>calibration due (as agreed with the customer)</td><td>2028-03-02</td>" in html
    assert 'due = 2028-03-02' in (issued / "certificate.toml").read_text(encoding="utf-8")


def test_a_due_date_not_agreed_with_the_customer_is_refused(tmp_path, capsys):
    (tmp_path / "s.toml").write_text(SESSION.replace("interval_agreed_with_customer = true\n", ""), encoding="utf-8")
    assert main(["lab", "budget", "--session", str(tmp_path / "s.toml")]) == 2
    err = capsys.readouterr().err.strip()
    assert "7.8.4.3" in err and "interval_agreed_with_customer" in err and len(err.splitlines()) == 1
