"""What the report writers share besides their templates: matplotlib figures as PNG bytes, and CSV files
whose cells a spreadsheet cannot run as a formula. The HTML itself comes from the Jinja2 templates
(meterlink.reports.templating), which escape every value.
"""

from __future__ import annotations

import csv
import io
from pathlib import Path

from meterlink.reports.digits import row as rounded_row
from meterlink.safetext import csv_cell


def figure_png(fig, dpi: int = 110) -> bytes:
    """PNG bytes of a matplotlib Figure drawn on the Agg canvas (no pyplot state)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    FigureCanvasAgg(fig)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi, bbox_inches="tight")
    return buf.getvalue()


def write_csv(path: Path, head, rows) -> None:
    """Write a CSV file with a header row, guarding every cell; numbers rounded by their column's rule
    (meterlink.reports.digits)."""
    with open(path, "w", newline="", encoding="utf-8") as f:
        w = csv.writer(f)
        w.writerow(head)
        for r in rows:
            w.writerow([csv_cell(v) for v in rounded_row(head, r)])
