"""Plain terminal tables (meterlink.reports.termtable): fitting a width, words whole, styles only on a terminal."""

from __future__ import annotations

import os
import re

from meterlink.reports.termtable import Column, Styled, Table, cell_width, colour_wanted, paint_lines

SGR_RE = re.compile(r"\x1b\[[0-9;]*m")


def _table() -> Table:
    t = Table([Column("id", "right"), Column("source", wrap=True), Column("E V/m", "right")], title="levels",
              caption="a caption long enough to be wrapped at forty columns or so, at spaces")
    t.add_heading(Styled("a heading wider than the first column", "bold"))
    t.add_row("1", "ICNIRP 2020 Table 5, whole-body exposure, 100 kHz to 300 GHz", "41.25")
    t.add_row("22", ["two lines", Styled("2 warn", "yellow")], "1234567")
    return t


def test_a_table_fits_its_width_wrapping_only_the_wrapping_column_at_spaces():
    lines = _table().lines(width=40)
    assert max(len(ln) for ln in lines) <= 40
    assert lines[0] == "levels" and lines[1].split() == ["id", "source", "E", "V/m"]
    assert set(lines[2].replace(" ", "")) == {"─"}
    assert lines[3] == "a heading wider than the first column"     # a heading runs across the columns
    # the numbers stay whole and right-aligned; the source is wrapped at spaces over several lines
    assert lines[4].endswith("41.25") and lines[4].startswith(" 1  ICNIRP")
    assert "1234567" in "".join(lines) and "whole-body" in " ".join(lines)
    source = " ".join(ln[4:4 + 24].strip() for ln in lines[4:8])
    assert source.startswith("ICNIRP 2020 Table 5, whole-body exposure, 100 kHz to 300 GHz")
    assert "two lines" in lines[-4] and "2 warn" in lines[-3]
    assert " ".join(lines[-2:]).startswith("a caption long enough")


def test_a_word_longer_than_the_width_is_never_cut():
    t = Table([Column("a", wrap=True), Column("b", "right")])
    t.add_row("x" * 30 + " short", "3.14159")
    lines = t.lines(width=20)
    assert any("x" * 30 in ln for ln in lines) and any(ln.endswith("3.14159") for ln in lines)


def test_styles_are_ansi_codes_only_when_colour_is_on():
    plain = _table().lines(40, colour=False)
    coloured = _table().lines(40, colour=True)
    assert not any(SGR_RE.search(ln) for ln in plain)
    assert "\x1b[33m2 warn" in "\n".join(coloured) and "\x1b[1mid" in coloured[1]
    assert [SGR_RE.sub("", ln).rstrip() for ln in coloured] == [ln.rstrip() for ln in plain]
    assert paint_lines([Styled("safety", "bold")], 80, True) == ["\x1b[1msafety\x1b[0m"]


def test_colour_only_on_a_terminal_and_never_with_no_color(monkeypatch):
    # NO_COLOR: "when present and not an empty string, prevents the addition of ANSI color" (no-color.org)
    master, slave = os.openpty()
    try:
        with open(slave, "w", closefd=False) as tty, open(os.devnull, "w") as null:
            monkeypatch.delenv("NO_COLOR", raising=False)
            monkeypatch.setenv("TERM", "xterm")
            assert colour_wanted(tty) and not colour_wanted(null)
            monkeypatch.setenv("NO_COLOR", "1")
            assert not colour_wanted(tty)
            monkeypatch.delenv("NO_COLOR")
            monkeypatch.setenv("TERM", "dumb")
            assert not colour_wanted(tty)
    finally:
        os.close(master)
        os.close(slave)


def test_wide_characters_take_two_columns():
    # Unicode Standard Annex #11 (East Asian Width): U+6F22 and U+5B57 are W (wide), two terminal cells each;
    # U+0301 COMBINING ACUTE ACCENT takes none
    assert cell_width("\u6f22\u5b57") == 4 and cell_width("e\u0301") == 1 and cell_width("abc") == 3


def test_wrap_words_breaks_after_hyphens_and_marks_any_cut():
    from meterlink.reports.termtable import wrap_words

    assert wrap_words("roof-east-sector-A", 10) == ["roof-east-", "sector-A"]
    assert wrap_words("north mast roof", 10) == ["north mast", "roof"]
    assert wrap_words("roof-east", 20) == ["roof-east"]
    got = wrap_words("ABCDEFGHIJKLMNOPQRST", 8)
    assert got == ["ABCDEFG\u2026", "HIJKLMN\u2026", "OPQRST"]              # every cut line carries the mark
    assert all(len(x) <= 8 for x in got)
