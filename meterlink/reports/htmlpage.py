"""Building blocks of meterlink's self-contained HTML reports and their CSV files.

Every value passed in as text is escaped here, control characters included (meterlink.safetext);
figures are embedded as base64 PNG so a report is one file. CSV cells that a spreadsheet would run
as a formula are prefixed with a quote.
"""

from __future__ import annotations

import base64
import csv
import datetime as _dt
import io
import math
from html import escape
from pathlib import Path

from meterlink.safetext import clean_text, csv_cell  # noqa: F401 - csv_cell is part of this module's API

CSS = """
body{font-family:system-ui,sans-serif;margin:2rem auto;max-width:64rem;color:#1d2a2e;line-height:1.4}
h1{font-weight:600;border-bottom:3px solid #2b6f77;padding-bottom:.3rem}
h2{color:#2b6f77;margin-top:2rem;font-weight:600}
table{border-collapse:collapse;width:100%;font-size:.88rem;margin:.5rem 0}
th,td{border-bottom:1px solid #d5dcde;padding:.25rem .45rem;text-align:left;vertical-align:top}
th{background:#eef3f4;font-weight:600}
td.n{text-align:right;font-variant-numeric:tabular-nums}
.ok{color:#1e6b34;font-weight:600}.bad{color:#b3261e;font-weight:700}.und{color:#8a5a00;font-weight:600}
.caution{border-left:5px solid #b3261e;background:#fbf1f0;padding:.6rem 1rem}
.notice{border:2px solid #b3261e;padding:.5rem 1rem;color:#b3261e;font-weight:600}
.note{color:#55666b;font-size:.85rem}
img{max-width:100%}
"""


def e(v) -> str:
    """HTML-escaped text of any value ('' for None); control characters other than tab and newline
    (ESC, NUL, ...) and bidi overrides are shown as visible escapes."""
    return escape(clean_text(v, keep="\t\n"), quote=True)


def num(v, fmt: str = "{:.3f}") -> str:
    """A formatted number, or a dash for None/NaN."""
    return "–" if v is None or (isinstance(v, float) and not math.isfinite(v)) else fmt.format(v)


def utc(t) -> str:
    """UTC date-time of a POSIX timestamp, or a dash."""
    return "–" if t is None else _dt.datetime.fromtimestamp(t, _dt.timezone.utc).strftime("%Y-%m-%d %H:%M:%S UTC")


def verdict(v: str) -> str:
    """An outcome word with its class (compliant / not compliant / undecided)."""
    cls = {"compliant": "ok", "not compliant": "bad"}.get(v, "und")
    return f'<span class="{cls}">{e(v)}</span>'


def table(head, rows, numeric=()) -> str:
    """A table; head is escaped, cells are HTML already (escape them with e() first)."""
    out = ["<table><tr>" + "".join(f"<th>{e(h)}</th>" for h in head) + "</tr>"]
    for r in rows:
        out.append("<tr>" + "".join(f'<td class="n">{c}</td>' if i in numeric else f"<td>{c}</td>"
                                    for i, c in enumerate(r)) + "</tr>")
    return "\n".join(out) + "</table>"


def img(png: bytes, alt: str) -> str:
    """An embedded PNG."""
    return f'<img alt="{e(alt)}" src="data:image/png;base64,{base64.b64encode(png).decode()}">'


def figure_png(fig, dpi: int = 110) -> bytes:
    """PNG bytes of a matplotlib Figure drawn on the Agg canvas (no pyplot state)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    FigureCanvasAgg(fig)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi, bbox_inches="tight")
    return buf.getvalue()


def page(title: str, body: str) -> str:
    """A whole HTML document with the shared style."""
    return (f'<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8"><title>{e(title)}</title>'
            f"<style>{CSS}</style></head><body>\n{body}\n</body></html>\n")


def write_csv(path: Path, head, rows) -> None:
    """Write a CSV file with a header row, guarding every cell."""
    with open(path, "w", newline="", encoding="utf-8") as f:
        w = csv.writer(f)
        w.writerow(head)
        for r in rows:
            w.writerow([csv_cell(v) for v in r])
