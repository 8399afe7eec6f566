"""Numbers in CSV and JSON carry meaningful digits (docs/formats.md): each writer runs on a recorded
demo database or a station database, and every numeric cell is scanned against the documented rule of
its column or key. The rule table below is typed from docs/formats.md, not taken from the code."""

from __future__ import annotations

import csv
import json
import math
import re
import sqlite3

import numpy as np
import pytest

from meterlink.cli import main
from meterlink.reports import digits
from test_pages import _station_file

# docs/formats.md: (name pattern, kind, digits), first match wins
DOC_RULES = ((r"(^|_)(lat|lon|latitude|longitude)(_|$)", "dec", 7), (r"(^|_)freq|_hz$|^hz$", "sig", 9),
             (r"_utc$|^t$|^t[01]$|^t_|_s$|^time$|_time$", "dec", 3))
NUM = re.compile(r"^-?\d+(\.\d+)?([eE][-+]?\d+)?$")


def allowed(name: str) -> tuple[str, int]:
    for pat, kind, n in DOC_RULES:
        if re.search(pat, name.lower()):
            return kind, n
    return "sig", 5


def digits_of(text: str) -> tuple[int, int]:
    """(significant digits, decimal places) of a number as written."""
    mant, _, exp = text.lower().lstrip("-").partition("e")
    whole, _, frac = mant.partition(".")
    sig = (whole + frac).lstrip("0").rstrip("0") if frac.strip("0") == "" else (whole + frac).lstrip("0")
    places = len(frac.rstrip("0")) - (int(exp) if exp else 0)
    return len(sig), max(places, 0)


def check(name: str, text: str, where: str) -> bool:
    """True when text is a fractional number (checked), False when not one; fails on too many digits."""
    if not NUM.match(text) or ("." not in text and "e" not in text.lower()):
        return False                                              # text, or an integer count / id
    kind, n = allowed(name)
    s, places = digits_of(text)
    assert (s if kind == "sig" else places) <= n, f"{where}: {name} = {text} has more than {n} {kind} digits"
    return True


def scan_csv(path) -> int:
    lines = [ln for ln in path.read_text(encoding="utf-8").splitlines() if not ln.startswith("#")]
    rows = list(csv.reader(lines))
    return sum(check(h, c, path.name) for r in rows[1:] for h, c in zip(rows[0], r))


def scan_json(doc, where: str, name: str = "") -> int:
    if isinstance(doc, dict):
        return sum(scan_json(v, where, k) for k, v in doc.items())
    if isinstance(doc, list):
        return sum(scan_json(v, where, name) for v in doc)
    if isinstance(doc, float):
        return check(name, repr(doc), where)
    return 0


def test_rounding_to_significant_digits_and_places():
    # decimal arithmetic: 27.50000001375 to 5 significant digits is 27.500, written 27.5
    assert digits.rounded(27.50000001375, "e_v_per_m") == 27.5 and repr(digits.rounded(0.1 + 0.2, "x")) == "0.3"
    assert digits.rounded(915_123_456.78, "freq_hz") == 915_123_457.0
    assert digits.rounded(47.123456789, "lat_deg") == 47.1234568
    assert digits.rounded(1_780_000_200.1234567, "t_utc") == 1_780_000_200.123
    assert digits.rounded(7, "e_v_per_m") == 7 and digits.rounded(None, "x") is None
    assert math.isnan(digits.rounded(float("nan"), "x"))
    x = np.random.default_rng(4).lognormal(0, 6, 20_000) * np.where(np.arange(20_000) % 3, 1, -1)
    assert digits.rounded_array(x, "e_v_per_m").tolist() == [digits.sig(v, 5) for v in x.tolist()]
    assert digits.iso_utc(1_780_000_200.25) == "2026-05-28T20:30:00.250Z"


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("digits")
    assert main(["demo", "--out", str(tmp / "d"), "--minutes", "1", "--json"]) == 0
    _station_file(tmp / "st.db", "Digit mast", "power", n_blocks=15, alarm=True)
    return tmp


def test_every_csv_writer(demo, capsys):
    survey = demo / "d" / "survey-report"
    counts = {p.name: scan_csv(p) for p in sorted(survey.glob("*.csv"))}
    assert counts["points.csv"] > 0 and counts["samples.csv"] > 0 and counts["trace.csv"] > 0
    # times a person reads are ISO 8601 UTC in the trace, never epoch seconds
    trace = list(csv.DictReader((survey / "trace.csv").read_text(encoding="utf-8").splitlines()))
    assert re.match(r"^\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d\.\d{3}Z$", trace[0]["t_utc"])
    db = demo / "d" / "demo.db"
    for sid in (1, 2):
        assert main(["report", "--db", str(db), "--session", str(sid), "--out", str(demo / f"r{sid}")]) == 0
        assert scan_csv(demo / f"r{sid}" / "values.csv") > 0
    assert main(["export", "--db", str(demo / "st.db"), "--format", "csv", "--out", str(demo / "x.csv")]) == 0
    assert scan_csv(demo / "x.csv") > 0
    capsys.readouterr()


def test_every_json_output(demo, capsys, tmp_path):
    db, st = demo / "d" / "demo.db", demo / "st.db"
    runs = {"assess 1": ["assess", "--db", str(db), "--session", "1", "--standard", "icnirp-2020", "--tier", "public", "--json"],
            "assess 2": ["assess", "--db", str(db), "--session", "2", "--standard", "fcc-1310", "--tier", "public", "--json"],
            "limits": ["limits", "915.3e6", "--json"],
            "stats": ["stats", "--db", str(st), "--json"],
            "status": ["status", "--db", str(st), "--json"],
            "predict": ["predict", "deploy/example-sources.toml", "--at", "20,0,2", "--json"],
            "lab budget": ["lab", "budget", "--json"]}
    for what, argv in runs.items():
        capsys.readouterr()
        assert main(argv) == 0, what
        n = scan_json(json.loads(capsys.readouterr().out), what)
        assert n > 0, what
    assert main(["export", "--db", str(st), "--format", "json", "--out", str(tmp_path / "x.json")]) == 0
    assert scan_json(json.loads((tmp_path / "x.json").read_text()), "export json") > 0


def test_stored_values_keep_full_precision(demo):
    # rounding is for writing only: the database still holds values with more than 5 digits
    with sqlite3.connect(demo / "st.db") as c:
        e = [r[0] for r in c.execute("SELECT e_rms_v_per_m FROM mon_block")]
    assert any(digits_of(repr(v))[0] > 5 for v in e)
