"""Reports from Jinja2 templates (autoescaped), and the same HTML rendered to PDF with WeasyPrint.

Templates live in meterlink/reports/templates/: base.html carries the cautions every report shows,
report.css the look on screen and paper, print.css the page rules (A4, running footer, tables that
fit the page). A lab or authority restyles by putting a file of the same name in its own folder
(``--template-dir``): that folder is searched first, the packaged templates fill in the rest.
Every value from a device, plan or database is text: autoescaping turns markup into characters and
``finalize`` shows control and bidi-override characters as visible escapes (meterlink.safetext).
"""

from __future__ import annotations

import base64
import datetime as _dt
import functools
import math
from html import escape
from pathlib import Path

from markupsafe import Markup

from meterlink.cautions import SAFETY_LINE
from meterlink.errors import MeterlinkError
from meterlink.safetext import clean_text

PDF_HINT = 'PDF output needs WeasyPrint: pip install "meterlink[pdf]"'


def num(v, fmt: str = "{:.3f}") -> str:
    """A formatted number, or a dash for None/NaN."""
    return "–" if v is None or (isinstance(v, float) and not math.isfinite(v)) else fmt.format(v)


def utc(t) -> str:
    """UTC date-time of a POSIX timestamp, or a dash."""
    return "–" if t is None else _dt.datetime.fromtimestamp(t, _dt.timezone.utc).strftime("%Y-%m-%d %H:%M:%S UTC")


def png_uri(png: bytes) -> str:
    """A PNG as a data: URI, so that a report is one self-contained file."""
    return "data:image/png;base64," + base64.b64encode(png).decode()


def outcome_class(v) -> str:
    """CSS class of an outcome word: compliant / not compliant / anything else (undecided)."""
    return {"compliant": "ok", "not compliant": "bad"}.get(str(v), "und")


def _finalize(v):
    """Every value printed by a template: None as empty, text with control characters escaped."""
    if v is None:
        return ""
    if isinstance(v, Markup):
        return v
    return clean_text(v, keep="\t\n")


def template_dir(path) -> Path | None:
    """The --template-dir folder checked (a clear error if it is not a folder), or None."""
    if path in (None, ""):
        return None
    p = Path(path)
    if not p.is_dir():
        raise MeterlinkError(f"template folder {str(p)!r} does not exist or is not a folder")
    return p


def environment(override_dir=None):
    """The Jinja2 environment: override folder first (templates or stylesheets by file name),
    then the packaged templates; autoescaping for .html, StrictUndefined so a missing value fails.
    One environment per folder is kept, so templates compile once (Jinja reloads a changed file)."""
    over = template_dir(override_dir)
    return _environment(None if over is None else str(over.resolve()))


@functools.lru_cache(maxsize=16)
def _environment(over: str | None):
    import jinja2

    loaders = [jinja2.PackageLoader("meterlink.reports", "templates")]
    if over is not None:
        loaders.insert(0, jinja2.FileSystemLoader(over))
    env = jinja2.Environment(loader=jinja2.ChoiceLoader(loaders),
                             autoescape=jinja2.select_autoescape(["html", "htm", "xml"], default_for_string=True),
                             undefined=jinja2.StrictUndefined, finalize=_finalize, extensions=["jinja2.ext.do"],
                             trim_blocks=True,
                             lstrip_blocks=True, keep_trailing_newline=True)
    env.filters.update(num=num, utc=utc, png_uri=png_uri, outcome_class=outcome_class)
    env.globals.update(safety_line=SAFETY_LINE)
    return env


def render(name: str, override_dir=None, *, required: str = SAFETY_LINE, **context) -> str:
    """Render one report template to an HTML string.

    The `required` statement is checked in the result, by default the safety cautions: a restyled
    template that drops it is refused. A lab certificate requires the lab's own statement instead."""
    import jinja2

    try:
        html = environment(override_dir).get_template(name).render(**context)
    except jinja2.TemplateNotFound as exc:
        raise MeterlinkError(f"template {exc.name!r} not found (packaged or in the template folder)") from None
    except jinja2.TemplateSyntaxError as exc:
        raise MeterlinkError(f"template {exc.filename or exc.name}: line {exc.lineno}: {exc.message}") from None
    except jinja2.UndefinedError as exc:
        raise MeterlinkError(f"template {name}: {exc.message}") from None
    if escape(required, quote=True) not in html:
        what = "the safety cautions" if required == SAFETY_LINE else f"the statement {required!r}"
        raise MeterlinkError(f"template {name}: the rendered report lacks {what} "
                             f"(a restyled template must keep the 'cautions' block)")
    return html


def pdf_available() -> bool:
    """True when WeasyPrint (the pdf extra) can be imported."""
    try:
        import weasyprint  # noqa: F401
    except (ImportError, OSError):      # OSError: the library is there but Pango is missing
        return False
    return True


def html_document(html: str, base_url=None):
    """WeasyPrint's HTML document of a rendered report (a clear error without the pdf extra)."""
    try:
        import weasyprint
    except (ImportError, OSError):
        raise MeterlinkError(PDF_HINT) from None
    return weasyprint.HTML(string=html, base_url=str(base_url) if base_url else None)


def write_pdf(html: str, path, base_url=None) -> Path:
    """Render an HTML report to a PDF file (print.css applies: A4, footer, fitted tables)."""
    doc = html_document(html, base_url).render()
    path = Path(path)
    try:
        doc.write_pdf(str(path))
    except OSError as exc:
        raise MeterlinkError(f"cannot write {str(path)!r}: {exc.strerror}") from None
    return path


def write_outputs(html: str, html_path, pdf: bool = False) -> list[Path]:
    """Write report HTML and, when asked, the PDF beside it (same name, .pdf); returns the paths."""
    html_path = Path(html_path)
    if pdf and not pdf_available():
        raise MeterlinkError(PDF_HINT)
    try:
        html_path.write_text(html, encoding="utf-8")
    except OSError as exc:
        raise MeterlinkError(f"cannot write {str(html_path)!r}: {exc.strerror}") from None
    paths = [html_path]
    if pdf:
        paths.append(write_pdf(html, html_path.with_suffix(".pdf"), html_path.parent))
    return paths
