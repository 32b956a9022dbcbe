"""Reports of an analysed experiment: terminal, Markdown, self-contained HTML, figures.

Pipeline of this package (plain data between steps)::

    results folder / CSV --data.collect--> ReportData --figures.make_figures--> FigureSet
        --> html.render_html / markdown.render_markdown / terminal.print_analysis

`write_reports(folder, analysis=...)` is what `benchharness run` calls at the end,
with the folder it has read and the analysis it has made: it writes
``report.html``, ``report.md`` and ``figures/*.png|svg`` into the results folder.
Nothing in this package fits a model: it renders the `Analysis`.
Heavy libraries (pandas, matplotlib, jinja2) are imported inside the functions.
"""

from __future__ import annotations

from pathlib import Path

__all__ = ["write_reports", "build_report", "print_analysis"]


def build_report(source, *, analysis=None, response=None, factors=None, **kwargs):
    """(ReportData, FigureSet) for a results folder, CSV path or DataFrame."""
    from benchharness.report.data import collect
    from benchharness.report.figures import make_figures

    data = collect(source, analysis=analysis, response=response, factors=factors, **kwargs)
    return data, make_figures(data)


def write_reports(folder, *, html=None, markdown=None, analysis=None, response=None,
                  factors=None, compact: bool = False, figures_dir=None, **kwargs):
    """Write the HTML and Markdown reports (and figures) of a results folder (a path, or
    one already read: `benchharness.results.journal.Results`), CSV or DataFrame.

    Defaults: ``<folder>/report.html``, ``<folder>/report.md`` and
    ``<folder>/figures/``. For a CSV source pass ``html``/``markdown`` paths; the
    figures then go beside the Markdown file. Returns ``(html_path, md_path)``.
    """
    from benchharness.report.html import write_html
    from benchharness.report.markdown import write_markdown

    base = _folder_of(folder)
    if html is None:
        html = (base or Path(".")) / "report.html"
    if markdown is None:
        markdown = (base or Path(".")) / "report.md"
    data, figs = build_report(folder, analysis=analysis, response=response, factors=factors,
                              **kwargs)
    fig_root = Path(figures_dir) if figures_dir else Path(markdown).parent
    figs.save(fig_root)
    html_path = write_html(data, figs, html)
    md_path = write_markdown(data, figs, markdown, compact=compact,
                             figures_rel=_relative(fig_root / "figures", Path(markdown).parent))
    return html_path, md_path


def _folder_of(source) -> Path | None:
    """The results folder of a source (a path, or one already read), else None."""
    from benchharness.results.journal import Results

    if isinstance(source, Results):
        return Path(source.path)
    if hasattr(source, "columns"):   # a DataFrame
        return None
    path = Path(source)
    return path if path.is_dir() else None


def _relative(target: Path, start: Path) -> str:
    import os

    try:
        return os.path.relpath(target, start)
    except ValueError:  # different drives
        return str(target)


def print_analysis(analysis, console=None, **kwargs):
    """Print an analysis (Analysis, analysis.json dict or ReportData) with rich tables."""
    from benchharness.report.terminal import print_analysis as _print

    return _print(analysis, console=console, **kwargs)
