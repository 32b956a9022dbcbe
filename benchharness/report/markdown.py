"""The Markdown report: the same story as the HTML, figures linked from ``figures/``.

``compact=True`` gives a short version (verdict, effects, warnings) for a CI job
summary page. Text that came from the user or a command is escaped for Markdown
(``<``, ``>``, ``&`` as entities; ``\\ ` * _ [ ] |`` with a backslash), so a level
name can neither inject HTML nor break a table.
"""

from __future__ import annotations

import re
from pathlib import Path

from benchharness.report import context as _context
from benchharness.report.data import ReportData
from benchharness.report.figures import FigureSet
from benchharness.report.html import TEMPLATES

_MD_SPECIAL = re.compile(r"([\\`*_\[\]|#])")


def md_escape(text) -> str:
    """Escape a string for Markdown body text or a table cell (one line)."""
    s = "" if text is None else str(text)
    s = s.replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;")
    s = _MD_SPECIAL.sub(r"\\\1", s)
    return " ".join(s.splitlines())


def md_code(text) -> str:
    """Inline code that survives backticks in the text."""
    s = " ".join(("" if text is None else str(text)).splitlines())
    ticks = "`"
    while ticks in s:
        ticks += "`"
    pad = " " if s.startswith("`") or s.endswith("`") else ""
    return f"{ticks}{pad}{s}{pad}{ticks}"


def _env():
    import jinja2

    env = jinja2.Environment(
        loader=jinja2.FileSystemLoader(str(TEMPLATES)),
        autoescape=False,            # Markdown: escaping is done by the `md` filter
        undefined=jinja2.StrictUndefined,
        trim_blocks=True, lstrip_blocks=True, keep_trailing_newline=True,
    )
    env.filters["md"] = md_escape
    env.filters["code"] = md_code
    return env


def render_markdown(data: ReportData, figs: FigureSet, compact: bool = False,
                    figures_rel: str = "figures") -> str:
    ctx = _context.build(data, figs, compact=compact)
    ctx["figures_rel"] = figures_rel.replace("\\", "/").rstrip("/")
    text = _env().get_template("report.md.j2").render(**ctx)
    return re.sub(r"\n{3,}", "\n\n", text)


def write_markdown(data: ReportData, figs: FigureSet, path, compact: bool = False,
                   figures_rel: str = "figures") -> Path:
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(path.name + ".tmp")
    try:
        tmp.write_text(render_markdown(data, figs, compact=compact, figures_rel=figures_rel),
                       encoding="utf-8")
        tmp.replace(path)
    except BaseException:
        tmp.unlink(missing_ok=True)  # a full disk leaves no half file behind
        raise
    return path
