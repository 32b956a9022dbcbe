"""The self-contained HTML report.

One file: the CSS is inlined, every figure is a data-URI PNG, and nothing is
fetched from anywhere (no script, font or image references), so the file can be
mailed, attached to a ticket or opened offline. Templates live in
``benchharness/report/templates``; jinja2 autoescaping escapes every string that
came from the user or a command (factor and level names, the question, host
facts, messages), so a level named ``<script>alert(1)</script>`` shows as text.
"""

from __future__ import annotations

import base64
from pathlib import Path

from benchharness.report import context as _context
from benchharness.report.data import ReportData
from benchharness.report.figures import FigureSet

TEMPLATES = Path(__file__).resolve().parent / "templates"


def _env():
    import jinja2

    env = jinja2.Environment(
        loader=jinja2.FileSystemLoader(str(TEMPLATES)),
        autoescape=True,                   # every template here is HTML
        undefined=jinja2.StrictUndefined,
        trim_blocks=False, lstrip_blocks=False,
    )
    env.filters["b64"] = lambda b: base64.b64encode(b).decode("ascii")
    return env


def render_html(data: ReportData, figs: FigureSet) -> str:
    """The report as one HTML document (a string)."""
    import markupsafe

    ctx = _context.build(data, figs)
    ctx["css"] = markupsafe.Markup((TEMPLATES / "report.css").read_text(encoding="utf-8"))
    return _env().get_template("report.html.j2").render(**ctx)


def write_html(data: ReportData, figs: FigureSet, path) -> Path:
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(path.name + ".tmp")
    try:
        tmp.write_text(render_html(data, figs), encoding="utf-8")
        tmp.replace(path)
    except BaseException:
        tmp.unlink(missing_ok=True)  # a full disk leaves no half file behind
        raise
    return path
