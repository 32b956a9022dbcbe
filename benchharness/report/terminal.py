"""The analysis in the terminal, as rich tables.

Colour only when stdout is a terminal and ``NO_COLOR`` is unset (or empty), per
the no-color convention; otherwise plain text that reads well in a CI log.
User text (factor and level names) is passed as `rich.text.Text`, never as
markup, so a level called ``[bold]x[/bold]`` prints as written.
"""

from __future__ import annotations

import os
import sys
from typing import Mapping

from benchharness.report import story
from benchharness.report.data import ReportData
from benchharness.report.units import fmt_num, fmt_p, fmt_ratio, fmt_ratio_interval


class PipedText:
    """A text stream for output that is not a terminal: lines are written whole, with
    no trailing spaces (tables pad their last column; a log or a diff should not see it)."""

    def __init__(self, stream):
        self._stream = stream
        self._pending = ""

    def write(self, text: str) -> int:
        self._pending += text
        *lines, self._pending = self._pending.split("\n")
        for line in lines:
            self._stream.write(line.rstrip(" ") + "\n")
        return len(text)

    def flush(self) -> None:
        if self._pending:
            self._stream.write(self._pending.rstrip(" "))
            self._pending = ""
        self._stream.flush()

    def isatty(self) -> bool:
        return False


#: Width given to rich when the output is not a terminal: wide enough that no prose or
#: table is ever hard-wrapped (a log viewer or an editor wraps for its reader).
PIPED_WIDTH = 100_000


def make_console(file=None):
    """A rich console: colour only on a terminal with ``NO_COLOR`` unset; when piped no
    colour, no wrapping and no trailing spaces (docs/cli.md, "What goes where")."""
    from rich.console import Console

    stream = file or sys.stdout
    tty = hasattr(stream, "isatty") and stream.isatty()
    no_color = bool(os.environ.get("NO_COLOR")) or not tty
    if not tty:
        return Console(file=PipedText(stream), no_color=True, highlight=False, emoji=False,
                       force_terminal=False, width=PIPED_WIDTH, color_system=None,
                       soft_wrap=True)
    return Console(file=stream, no_color=no_color, highlight=False, emoji=False,
                   force_terminal=True, color_system=None if no_color else "auto")


def _data_from(analysis) -> ReportData:
    """A `ReportData` from an Analysis / analysis.json dict alone (no runs table)."""
    import pandas as pd

    if isinstance(analysis, ReportData):
        return analysis
    adict = analysis.to_dict() if hasattr(analysis, "to_dict") else dict(analysis)
    factors, levels = [], {}
    for f in adict.get("factors") or []:
        if isinstance(f, Mapping):
            factors.append(str(f.get("name")))
            levels[str(f.get("name"))] = tuple(str(x) for x in f.get("levels") or [])
        else:
            factors.append(str(f))
    for f in factors:
        if not levels.get(f):
            seen = []
            for m in adict.get("means") or []:
                lv = (m.get("levels") or {}).get(f)
                if lv is not None and str(lv) not in seen:
                    seen.append(str(lv))
            levels[f] = tuple(seen)
    runs = pd.DataFrame({**{f: pd.Series(dtype=str) for f in factors},
                         "status": pd.Series(dtype=str)})
    return ReportData(name="", about="", response=adict.get("response", "wall_s"),
                      factors=tuple(factors), levels=levels, analysis=adict, runs=runs,
                      block=adict.get("block"))


def _print_verdict(con, v) -> None:
    """The verdict in plain words: headline, findings, recommendation, cautions, how sure."""
    from rich.text import Text

    con.print(Text(v["headline"], style="bold"))
    for s in v.get("surface") or []:
        con.print(Text("  • " + s))
    for i in v["interactions"]:
        con.print(Text("  • " + i))
    for f in v["factors"]:
        con.print(Text("  • " + f["summary"]))
    for t in v.get("trends") or []:
        con.print(Text("  • " + t))
    if v["recommendation"]:
        con.print(Text("  " + v["recommendation"], style="bold green"))
    if v["best"]:
        con.print(Text("  " + v["best"], style="green"))
    for c in v["cautions"]:
        con.print(Text("  ! " + c, style="yellow"))
    for s in v["sure"]:        # how far to trust the verdict: a caution, never dim
        con.print(Text("  " + s))
    con.print()


def _print_anova(con, data, v) -> None:
    """The ANOVA table, then the scale it was computed on."""
    from rich import box
    from rich.table import Table
    from rich.text import Text

    t = Table(title="Analysis of variance", box=box.SIMPLE_HEAD, title_justify="left",
              title_style="bold")
    t.add_column("Source", no_wrap=True)
    for col in ("df", "Sum of squares", "Mean square", "F", "p", "partial η²", "ω²"):
        t.add_column(col, justify="right", no_wrap=True)
    for r in story.anova_rows(data):
        style = "bold" if r["significant"] else ("dim" if r.get("term") == "Residual" else None)
        from benchharness.report.context import fmt_df

        t.add_row(Text(str(r.get("chain") or r.get("term"))), fmt_df(r.get("df")), fmt_num(r.get("sum_sq")),
                  fmt_num(r.get("mean_sq")), fmt_num(r.get("F")),
                  fmt_p(r.get("p")),
                  fmt_num(r.get("partial_eta_sq"), 2), fmt_num(r.get("omega_sq"), 2),
                  style=style)
    con.print(t)
    if v["transform"]:     # the scale and the Box-Cox evidence belong with the table
        con.print(Text("  Scale: " + v["transform"]))
        con.print()


def _print_effects(con, data, conf) -> None:
    """Each level as a ratio to its reference level with its interval."""
    from rich import box
    from rich.table import Table
    from rich.text import Text

    effects = data.analysis.get("effects") or []
    if effects:
        t = Table(title=f"Effects as ratios to the reference level ({conf} intervals, "
                  "each unadjusted)",
                  box=box.SIMPLE_HEAD, title_justify="left", title_style="bold")
        for col, just in (("factor", "left"), ("level", "left"), ("against", "left"),
                          ("ratio", "right"), ("interval", "right")):
            t.add_column(col, justify=just, overflow="fold")
        for e in effects:
            lo, hi = e.get("lower"), e.get("upper")
            sig = lo is not None and hi is not None and (float(lo) > 1 or float(hi) < 1)
            t.add_row(Text(str(e.get("factor"))), Text(str(e.get("level"))),
                      Text(str(e.get("reference"))), fmt_ratio(e.get("ratio")),
                      (fmt_ratio_interval(lo, hi) if lo is not None and hi is not None
                       else "not estimable (empty cells)" if e.get("estimable") is False
                       else "–"), style="bold" if sig else None)
        con.print(t)


def _print_diagnostics(con, data) -> None:
    """One line per diagnostic, marked ok or with a concern."""
    from rich import box
    from rich.table import Table
    from rich.text import Text

    diags = story.diagnostic_items(data)
    if diags:
        t = Table(title="Diagnostics", box=box.SIMPLE_HEAD, title_justify="left",
                  title_style="bold")
        t.add_column("check")
        t.add_column("p", justify="right")
        t.add_column("verdict")
        for d in diags:
            t.add_row(Text(("! " if d["concern"] else "ok ") + d["name"],
                           style="yellow" if d["concern"] else "green"),
                      fmt_p(d["p"]) if d["p"] is not None else "", Text(d["verdict"]))
        con.print(t)


def _print_comparisons(con, data, comparisons) -> None:
    """The comparisons that matter most, and how many more there are."""
    from rich import box
    from rich.table import Table
    from rich.text import Text

    all_comps = story.comparisons(data)
    comps = story.top_comparisons(data, comparisons)
    if comps:
        n_sig = sum(1 for c in all_comps if c["significant"])
        t = Table(title=f"Comparisons that matter most ({len(comps)} of {len(all_comps)}; "
                        f"{n_sig} with adjusted p < {data.alpha:g}; ratio of a over b, "
                        "> 1 = larger)",
                  box=box.SIMPLE_HEAD, title_justify="left", title_style="bold")
        for col, just in (("method", "left"), ("comparison", "left"), ("ratio a/b", "right"),
                          ("interval", "right"), ("p adj", "right")):
            t.add_column(col, justify=just, overflow="fold")
        words = {"tukey": "Tukey HSD", "simple": "simple effect", "pairwise": "pairwise",
                 "declared": "declared"}
        for c in comps:
            within = f" when {c['within_text']}" if c["within_text"] else ""
            method = words.get(c.get("method"), str(c.get("method")))
            if c.get("adjust") in ("bonferroni", "holm") and c.get("method") != "tukey":
                method += f" ({c['adjust']})"
            t.add_row(method,
                      Text(f"{c.get('factor')}: {c.get('a')} over {c.get('b')}{within}"),
                      fmt_ratio(c.get("ratio")),
                      fmt_ratio_interval(c.get("lower"), c.get("upper")),
                      fmt_p(c.get("p_adj")), style="bold" if c["significant"] else None)
        con.print(t)
        if len(all_comps) > len(comps):
            con.print(Text(f"  … {len(all_comps) - len(comps)} more in analysis.json",
                           style="dim"))


def _print_warnings(con, data) -> None:
    """Data-quality warnings and the analysis notes."""
    from rich.text import Text

    warns = story.warnings(data, list(data.extra_notes))
    notes = story.printed_notes(data)
    if warns or notes:
        con.print(Text("Warnings and notes", style="bold"))
        for w in warns:
            con.print(Text(f"  ! {w['kind']}: {w['text']}", style="yellow"))
        for n in notes:
            con.print(Text(f"  - {n}"))


def print_analysis(analysis, console=None, comparisons: int = 10) -> None:
    """Print verdict, ANOVA, effects, diagnostics, comparisons and warnings."""
    con = console or make_console()
    data = _data_from(analysis)
    v = story.verdict(data)
    conf = story.confidence_pct(data)

    _print_verdict(con, v)
    _print_anova(con, data, v)
    _print_effects(con, data, conf)
    _print_diagnostics(con, data)
    _print_comparisons(con, data, comparisons)
    _print_warnings(con, data)
