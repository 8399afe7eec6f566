"""Untrusted text made safe to show: one helper for terminal, HTML, JSON and CSV output.

Strings from a device (model, serial, fault text), from a station file (station and meter names)
or from a database anyone may have written reach the terminal, HTML reports and CSV files. A
control character there does harm: ESC drives the terminal, NUL and other C0/C1 codes corrupt
HTML, CR/LF inject lines into a CSV or log, bidirectional overrides reorder what a reader sees.
``clean_text`` writes every such character as a visible escape (``\\x1b``, ``\\n``, ``\\u202e``)
so nothing is lost and nothing acts; ``csv_cell`` also stops spreadsheets running a cell as a formula.
"""

from __future__ import annotations

import re

# C0 controls, DEL, C1 controls; the bidirectional embeddings, overrides and isolates; the Unicode
# line and paragraph separators (line breaks to some viewers)
_UNSAFE = re.compile("[\x00-\x1f\x7f-\x9f\u202a-\u202e\u2066-\u2069\u2028\u2029]")
_NAMED = {"\t": "\\t", "\n": "\\n", "\r": "\\r"}
_FORMULA_START = ("=", "+", "-", "@", "\t", "\r", "\0")


def _escape(m: re.Match) -> str:
    c = m.group(0)
    if c in _NAMED:
        return _NAMED[c]
    o = ord(c)
    return f"\\x{o:02x}" if o < 0x100 else f"\\u{o:04x}"


def clean_text(s, keep: str = "") -> str:
    """``s`` as text with every control or bidi-override character escaped; ``keep`` lists the ones
    (tab, newline) that are legitimate where the text goes, e.g. a multi-line note in HTML."""
    s = "" if s is None else str(s)
    if keep:
        return _UNSAFE.sub(lambda m: m.group(0) if m.group(0) in keep else _escape(m), s)
    return _UNSAFE.sub(_escape, s)


def clean_tree(x):
    """Every string inside nested dicts, lists and tuples cleaned (keys too); other values unchanged."""
    if isinstance(x, str):
        return clean_text(x)
    if isinstance(x, dict):
        return {clean_tree(k): clean_tree(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return type(x)(clean_tree(v) for v in x)
    return x


def csv_cell(v):
    """A CSV value that is plain text to a spreadsheet: cleaned, and prefixed with ' when it would
    start a formula. Numbers, booleans and None pass unchanged (a negative number stays a number)."""
    if not isinstance(v, str):
        return v
    raw = v
    v = clean_text(v)
    if raw[:1] in _FORMULA_START or v[:1] in _FORMULA_START:
        return "'" + v
    return v
