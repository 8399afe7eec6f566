"""Plain tables for the terminal, without rich: for commands that must start fast (limits, sessions).

A table is a title, a bold header row over a rule, the rows and an optional caption, columns two
spaces apart and no frame (the look of the other tables on the terminal). Cells hold text, may
span several lines ("\\n", or a list of lines each with its own style) and may carry a style (bold, a colour), shown with ANSI SGR codes only
when the output is a terminal that takes them (not with NO_COLOR or TERM=dumb); piped output is the
same table in plain text. A table wider than the width given shrinks its wrapping columns, words
kept whole (a word is never cut: a number stays readable even if a line grows past the width).

Cell text is shown as given: callers pass device and database strings through meterlink.safetext
first (no control characters reach the terminal). Pure: builds lines, prints nothing.
"""

from __future__ import annotations

import os
import sys
import textwrap
import unicodedata

#: ANSI SGR parameters of the styles the tables use
SGR = {"bold": "1", "italic": "3", "green": "32", "yellow": "33", "red": "31", "grey": "90",
       "orange": "38;5;208"}
GAP = "  "


def colour_wanted(stream) -> bool:
    """Whether to style text written to stream: a terminal, NO_COLOR unset (no-color.org), TERM not dumb."""
    if os.environ.get("NO_COLOR") or os.environ.get("TERM") == "dumb":
        return False
    try:
        return stream.isatty()
    except (AttributeError, ValueError):
        return False


def terminal_width(fallback: int = 80) -> int:
    """Columns to fill, as shutil.get_terminal_size gives them (without its import): $COLUMNS if set, else
    the width of the terminal on stdout, else fallback (output piped to a file or another program)."""
    try:
        columns = int(os.environ.get("COLUMNS", "0"))
    except ValueError:
        columns = 0
    if columns <= 0:
        try:
            columns = os.get_terminal_size(sys.__stdout__.fileno()).columns
        except (AttributeError, ValueError, OSError):
            columns = 0
    return columns if columns > 0 else fallback


def cell_width(text: str) -> int:
    """Columns a line of text takes on a terminal: wide East Asian characters two, combining marks none."""
    if text.isascii():
        return len(text)
    return sum(0 if unicodedata.combining(c) else 2 if unicodedata.east_asian_width(c) in "WF" else 1
               for c in text)


# plain classes, not dataclasses: a dataclass is built at import time, and these are imported by start-up

class Styled:
    """Cell text with a style (a key of SGR, or several separated by spaces)."""

    __slots__ = ("text", "style")

    def __init__(self, text: str, style: str = ""):
        self.text, self.style = text, style

    def __repr__(self) -> str:
        return f"Styled({self.text!r}, {self.style!r})"


class Column:
    """A column: its header, "left" or "right" justified, whether it may wrap at spaces, a least width."""

    __slots__ = ("header", "justify", "wrap", "min_width")

    def __init__(self, header: str, justify: str = "left", wrap: bool = False, min_width: int = 0):
        self.header, self.justify, self.wrap, self.min_width = header, justify, wrap, min_width


class Table:
    """Columns, rows of cells (text, Styled, or a list of lines), a title and a caption."""

    def __init__(self, columns: list[Column], title: str = "", caption: str = ""):
        self.columns, self.title, self.caption = list(columns), title, caption
        self.rows: list[list] = []
        self.heading_rows: set[int] = set()     # rows whose first cell may run across the others

    def add_row(self, *cells) -> None:
        if len(cells) != len(self.columns):
            raise ValueError(f"{len(cells)} cells for {len(self.columns)} columns")
        self.rows.append(list(cells))

    def add_heading(self, text: str | Styled) -> None:
        """A row holding one heading (e.g. the standard over its levels): not counted in the column widths."""
        self.heading_rows.add(len(self.rows))
        self.rows.append([text] + [""] * (len(self.columns) - 1))

    def lines(self, width: int = 80, colour: bool = False) -> list[str]:
        """The table as lines of at most width columns (unless a word is longer than its column)."""
        widths = self._widths(width)
        paint = _painter(colour)
        out = [paint(line, "italic") for line in _wrap(self.title, width)] if self.title else []
        heads = [_wrap(c.header, w) if c.wrap else [c.header] for c, w in zip(self.columns, widths)]
        for k in range(max(len(h) for h in heads)):     # a wrapped header: its words over several lines
            out.append(GAP.join(_pad(h[k] if k < len(h) else "", w, c.justify, paint, "bold")
                                for c, h, w in zip(self.columns, heads, widths)).rstrip())
        out.append(GAP.join("─" * w for w in widths))
        for i, row in enumerate(self.rows):
            if i in self.heading_rows:
                text, style = _text(row[0])
                out.append(paint(text, style))
                continue
            cells = []
            for cell, col, w in zip(row, self.columns, widths):
                parts = [(ln, style) for part, style in _lines(cell)
                         for ln in (_wrap(part, w) if col.wrap else [part])]
                cells.append(([_pad(p, w, col.justify, paint, style) for p, style in parts], w))
            height = max(len(c) for c, _ in cells)
            for k in range(height):
                out.append(GAP.join(c[k] if k < len(c) else " " * w for c, w in cells).rstrip())
        if self.caption:
            out += [paint(line, "grey") for part in self.caption.split("\n") for line in _wrap(part, width)]
        return out

    def _widths(self, width: int) -> list[int]:
        """Each column's width: its widest line, the wrapping columns narrowed (widest first) to fit width."""
        cols = self.columns
        def texts(j: int) -> list[str]:
            return [ln for i, row in enumerate(self.rows) if not (i in self.heading_rows and j == 0)
                    for ln, _ in _lines(row[j])]

        natural = [max([cell_width(c.header), c.min_width] + [cell_width(ln) for ln in texts(j)])
                   for j, c in enumerate(cols)]
        floor = [max([c.min_width] + [cell_width(w) for ln in [c.header, *texts(j)] for w in ln.split()])
                 if c.wrap else natural[j] for j, c in enumerate(cols)]
        widths = list(natural)
        excess = sum(widths) + len(GAP) * (len(cols) - 1) - width
        while excess > 0:
            j = max(range(len(cols)), key=lambda k: (widths[k] - floor[k] > 0, widths[k]))
            if widths[j] <= floor[j]:
                break             # nothing left to narrow without cutting a word
            widths[j] -= 1
            excess -= 1
        return widths


def _lines(cell) -> list[tuple[str, str]]:
    """A cell's lines with their styles: a list of parts gives a line each (a part may hold several)."""
    parts = cell if isinstance(cell, (list, tuple)) else [cell]
    out = []
    for part in parts:
        text, style = _text(part)
        out += [(ln, style) for ln in text.split("\n")]
    return out


def _text(cell) -> tuple[str, str]:
    if isinstance(cell, Styled):
        return cell.text, cell.style
    return ("" if cell is None else str(cell)), ""


def _pad(text: str, width: int, justify: str, paint=None, style: str = "") -> str:
    """text padded to width (the style's codes around the text only, not the padding)."""
    fill = " " * max(0, width - cell_width(text))
    if paint is not None:
        text = paint(text, style)
    return fill + text if justify == "right" else text + fill


def _wrap(text: str, width: int) -> list[str]:
    if cell_width(text) <= width:
        return [text]
    return textwrap.wrap(text, width, break_long_words=False, break_on_hyphens=False) or [""]


_BREAK_AFTER = "-_./:"


def wrap_words(text: str, width: int, mark: str = "\u2026") -> list[str]:
    """text (a name, a list of rules) in lines of at most width columns, broken at spaces and after
    - _ . / : (so 'roof-east-sector' breaks as 'roof-east-' 'sector'); a piece still wider than width is
    cut with mark at the end of each cut line, so a cut is never silent and the whole text stays."""
    width = max(2, width)
    pieces, cur = [], ""
    for ch in text:                               # pieces: words ending at a space or after a break character
        if ch.isspace():
            if cur:
                pieces.append(cur)
            cur = ""
            pieces.append(" ")
            continue
        cur += ch
        if ch in _BREAK_AFTER:
            pieces.append(cur)
            cur = ""
    if cur:
        pieces.append(cur)
    lines, line = [], ""
    for piece in pieces:
        if piece == " ":
            if line and not line.endswith(" "):
                line += " "
            continue
        if cell_width(line + piece) <= width:
            line += piece
            continue
        if line.strip():
            lines.append(line.rstrip())
        line = piece
        while cell_width(line) > width:           # no break opportunity left: cut, with the mark
            k = width - cell_width(mark)
            while cell_width(line[:k]) > width - cell_width(mark):
                k -= 1
            lines.append(line[:k] + mark)
            line = line[k:]
    if line.strip() or not lines:
        lines.append(line.rstrip())
    return lines


def _painter(colour: bool):
    def paint(text: str, style: str) -> str:
        if not colour or not style or not text.strip():
            return text
        codes = ";".join(SGR[s] for s in style.split())
        return f"\x1b[{codes}m{text}\x1b[0m"
    return paint


def paint_lines(items: list, width: int = 80, colour: bool = False) -> list[str]:
    """Paragraphs (text or Styled) as lines wrapped at width, each styled when colour is on."""
    paint = _painter(colour)
    out = []
    for item in items:
        text, style = _text(item)
        out += [paint(line, style) for part in text.split("\n") for line in _wrap(part, width)]
    return out
