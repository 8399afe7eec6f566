"""The period report of a set of monitoring stations: one command over several station databases (built
by the test helpers as the monitor leaves them), one HTML/PDF with a summary table and a section per
station, the same numbers `meterlink stats` gives for each station, escaped station names, one-line errors."""

from __future__ import annotations

import json
import re

import pytest

from meterlink.cautions import SAFETY_LINE
from meterlink.cli import main
from test_pages import _station_file
from test_pdf import check_pdf

MONTH = "2026-05"      # make_station_db starts its blocks at 2026-05-28T20:30Z
NAMES = ("Ridge <b>mast</b> & co", "Harbour roof", "Quarry gate")


@pytest.fixture(scope="module")
def stations(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("periodset")
    dbs = []
    for i, (name, conv, n, alarm) in enumerate(zip(NAMES, ("power", "field", "power"), (20, 30, 10),
                                                   (True, False, False))):
        db = tmp / f"st{i}.db"
        _station_file(db, name, conv, n_blocks=n, alarm=alarm)
        dbs.append(db)
    return tmp, dbs


def _stats(db, capsys) -> dict:
    capsys.readouterr()
    assert main(["stats", "--db", str(db), "--from", "2026-05-01", "--to", "2026-06-01", "--json"]) == 0
    return json.loads(capsys.readouterr().out)["meters"][0]["month"][0]


def test_one_report_of_three_stations_html_and_pdf(stations, capsys):
    tmp, dbs = stations
    out = tmp / "rep"
    assert main(["render", *map(str, dbs), "--period", MONTH, "--format", "pdf", "--out", str(out), "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["kind"] == "stations"
    assert doc["files"] == [str(out / f"stations-{MONTH}.html"), str(out / f"stations-{MONTH}.pdf")]
    html = (out / f"stations-{MONTH}.html").read_text(encoding="utf-8")
    # a section per station, in the order given, and every element id once
    pos = [html.index(f'id="station-{i}"') for i in (1, 2, 3)]
    assert pos == sorted(pos) and 'id="summary"' in html and 'id="s3-health"' in html
    ids = re.findall(r'id="([^"]+)"', html)
    assert len(ids) == len(set(ids))
    assert html.count("data:image/png;base64,") == 6                 # two plots per station
    assert "<b>mast</b>" not in html and "Ridge &lt;b&gt;mast&lt;/b&gt; &amp; co" in html
    # the summary row of each station: the numbers `stats` computes from the same blocks
    summary = html[html.index('id="summary"'):pos[0]]
    rows = re.findall(r"<tr><td>(.*?)</td></tr>", summary, re.S)
    assert len(rows) == 3
    for row, db, alarms in zip(rows, dbs, (1, 0, 0)):
        cells = row.split("</td><td")
        mo = _stats(db, capsys)
        assert f'{mo["max_pct"]:.3g} %' in cells[2]
        assert cells[3].endswith(f'>{100 * mo["coverage"]:.1f}')
        assert cells[4].endswith(f">{alarms}")
        assert "demo-probe.toml" in cells[5]                       # the certificate in force
    assert "block-over-50pct" in html[pos[0]:pos[1]]                 # the alarm in its station's section
    assert SAFETY_LINE in html
    assert check_pdf(out / f"stations-{MONTH}.pdf", html, f"report for {MONTH}") >= 3


def test_station_files_name_their_databases(stations, tmp_path, capsys):
    _, dbs = stations
    tomls = []
    for i, db in enumerate(dbs[:2]):
        p = tmp_path / f"s{i}.toml"
        p.write_text(f'format = "meterlink-station/1"\n[station]\nname = "x{i}"\ndatabase = "{db}"\n'
                     '[assessment]\nstandard = "icnirp-2020"\ntier = "public"\nfreq = 100e6\n'
                     '[[meter]]\nname = "m1"\nport = "/dev/null"\ncertificate = "demo-probe"\n', encoding="utf-8")
        tomls.append(str(p))
    assert main(["render", *tomls, "--period", MONTH, "--out", str(tmp_path / "o")]) == 0
    html = (tmp_path / "o" / f"stations-{MONTH}.html").read_text(encoding="utf-8")
    assert "Harbour roof" in html and "Quarry gate" not in html


@pytest.mark.parametrize("third, period, words", [
    (None, False, "--period"),                          # several files without --period
    ("SAME", True, "named twice"),
    ("MISSING", True, "does not exist"),
])
def test_bad_sets_are_one_line_and_write_nothing(stations, tmp_path, capsys, third, period, words):
    _, dbs = stations
    files = [str(dbs[0]), str(dbs[1]), *({"SAME": [str(dbs[0])], "MISSING": [str(tmp_path / "none.db")]}
                                         .get(third, []))]
    rc = main(["render", *files, *(["--period", MONTH] if period else []), "--out", str(tmp_path / "o")])
    err = capsys.readouterr().err.strip().splitlines()
    assert rc == 2 and len(err) == 1 and words in err[0] and "Traceback" not in err[0]
    assert not (tmp_path / "o").exists()
