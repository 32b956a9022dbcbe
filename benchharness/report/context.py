"""The template context shared by the HTML and Markdown reports.

One function turns a `ReportData` and its rendered figures into plain dicts and
lists the templates lay out; both reports therefore tell the same story in the
same order (question and verdict, design, effects, ANOVA, the alias chains of a
two-level fraction, comparisons, diagnostics, data-quality warnings, appendix).
"""

from __future__ import annotations

import datetime as _dt
from typing import TYPE_CHECKING

from benchharness.report import story
from benchharness.report.data import ReportData, finite
from benchharness.report.units import (
    column_scale, describe, fmt_num, fmt_p, fmt_ratio, fmt_ratio_interval,
)

if TYPE_CHECKING:   # the figures' module is imported by what draws them, not by the terminal
    from benchharness.report.figures import FigureSet

#: Most comparison rows listed in a report (the rest are in analysis.json).
MAX_COMPARISONS = 200
#: Most cells listed in the appendix table.
MAX_CELLS = 500

SECTIONS = (
    ("question", "Question and answer"),
    ("design", "Design"),
    ("effects", "Effects and interactions"),
    ("anova", "Analysis of variance"),
    ("comparisons", "Comparisons"),
    ("diagnostics", "Diagnostics"),
    ("warnings", "Data-quality warnings"),
    ("appendix", "Appendix: reproduce and per-cell summary"),
)

_METHOD_WORDS = {
    "pairwise": "pairwise",
    "tukey": "Tukey HSD",
    "simple": "simple effect",
    "declared": "declared",
}

#: Above this many comparisons the main table lists the significant ones only.
MANY_COMPARISONS = 30


def build(data: ReportData, figs: FigureSet, compact: bool = False) -> dict:
    """Everything the templates need, as plain data (strings still unescaped)."""
    resp = data.response
    conf = story.confidence_pct(data)
    verdict = story.verdict(data)
    ss_type = data.analysis.get("ss_type") or (data.analysis.get("model") or {}).get("ss_type")
    anova = _anova_rows(data)
    effects, has_diff = _effect_rows(data, verdict)
    level_means = _level_mean_rows(data)
    comps_all = story.comparisons(data)
    comps = [_comparison_row(c) for c in comps_all[:MAX_COMPARISONS]]
    diags = [{**d, "p": fmt_p(d["p"]) if d["p"] is not None else ""}
             for d in story.diagnostic_items(data)]
    art = _rank_check(data)
    cells, n_cells_total = _cell_rows(data)
    from benchharness.report import fraction as _fraction

    frac = _fraction.section(data)
    sections = _sections(frac)
    surface = surface_section(data, sections)
    tr = data.analysis.get("transform") or {}
    mean_word = "geometric mean" if tr.get("name") == "log" else "estimated mean"
    return {
        "title": data.name,
        "about": data.about,
        "response": resp,
        "response_words": describe(resp),
        "conf": conf,
        "alpha": f"{data.alpha:g}",
        "verdict": verdict,
        "design": story.design_rows(data),
        "levels": [(f, list(data.levels[f])) for f in data.factors],
        "host": story.host_summary(dict(data.host or {})),
        "anova": anova,
        "ss_type": ss_type,
        "transform": story.transform_sentence(data),
        "unanalysed": bool(data.analysis.get("unanalysed")),
        "effects": effects,
        "has_difference": has_diff,
        "level_means": level_means,
        "comparisons": comps,
        "comparisons_main": ([c for c in comps if c["significant"]]
                             if len(comps) > MANY_COMPARISONS else comps),
        "comparisons_split": len(comps) > MANY_COMPARISONS,
        "adjust": (data.analysis.get("model") or {}).get("adjust"),
        "comparisons_total": len(comps_all),
        "comparisons_intro": _comparisons_intro(comps_all),
        "comparisons_shown": len(comps),
        "diagnostics": diags,
        "rank_check": art,
        "notes": [str(n) for n in story.printed_notes(data)],
        "report_command": report_command(data),
        "warnings": story.warnings(data, list(figs.notes) + list(data.extra_notes)),
        "cells": cells,
        "cells_total": n_cells_total,
        "factors": list(data.factors),
        "mean_word": mean_word,
        "reproduce": data.reproduce,
        "run_from": data.design.get("run_from"),
        "source": data.source,
        "folder": str(data.folder) if data.folder else None,
        "figures_effects": figs.by_section("effects"),
        "figures_diagnostics": figs.by_section("diagnostics"),
        "figures": figs.figures,
        "sections": sections,
        "fraction": frac,
        "figures_fraction": figs.by_section("fraction"),
        "surface": surface,
        "figures_surface": figs.by_section("surface"),
        "extra": [_extra_section(x) for x in data.extra],
        "generated": _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC"),
        "version": _version(),
        "compact": compact,
    }


def _anova_rows(data: ReportData) -> list[dict]:
    """The ANOVA table's rows, formatted (alias chains in place of terms for a fraction)."""
    anova = []
    for r in story.anova_rows(data):
        anova.append({
            "term": r.get("chain") or r.get("term"), "df": fmt_df(r.get("df")),
            "sum_sq": fmt_num(r.get("sum_sq"), 4), "mean_sq": fmt_num(r.get("mean_sq"), 4),
            "F": fmt_num(r.get("F"), 4), "p": fmt_p(r.get("p")),
            "eta": fmt_num(r.get("partial_eta_sq"), 2), "omega": fmt_num(r.get("omega_sq"), 2),
            "significant": r["significant"], "residual": r.get("term") == "Residual",
        })
    return anova


def _interaction_partners(verdict: dict) -> dict[str, list[str]]:
    """Factor -> the factors it interacts with (from the verdict's findings)."""
    depends: dict[str, list[str]] = {}
    for f in verdict["findings"]:
        if f["kind"] == "interaction":
            for x in f["factors"]:
                depends.setdefault(x, []).extend(y for y in f["factors"] if y != x)
    return depends


def _effect_rows(data: ReportData, verdict: dict) -> tuple[list[dict], bool]:
    """The effects table (ratio, interval, difference in one unit for the column, and
    the factors each effect depends on) and whether any difference is shown."""
    resp = data.response
    effects = []
    has_diff = False
    depends = _interaction_partners(verdict)
    dscale = column_scale(resp, [e.get("difference") for e in data.analysis.get("effects") or []])
    for e in data.analysis.get("effects") or []:
        lo, hi = e.get("lower"), e.get("upper")
        sig = finite(lo) and finite(hi) and (float(lo) > 1 or float(hi) < 1)
        row = {"factor": e.get("factor"), "level": e.get("level"),
               "reference": e.get("reference"), "ratio": fmt_ratio(e.get("ratio")),
               "interval": (fmt_ratio_interval(lo, hi) if finite(lo) and finite(hi)
                            else "not estimable (empty cells)" if e.get("estimable") is False
                            else "–"),
               "significant": sig, "difference": "",
               "depends": ", ".join(dict.fromkeys(depends.get(e.get("factor"), [])))}
        if finite(e.get("difference")):
            has_diff = True
            row["difference"] = dscale.fmt(e.get("difference"))
        effects.append(row)
    return effects, has_diff


def _level_mean_rows(data: ReportData) -> list[dict]:
    """Each factor level's estimated mean with its interval, in one unit for the table."""
    level_means = []
    shown_means = [m for m in data.analysis.get("means") or [] if m.get("term") in data.factors]
    scale = column_scale(data.response,
                         [m.get(k) for m in shown_means for k in ("mean", "lower", "upper")])
    for m in shown_means:
        term = m.get("term")
        if term in data.factors:
            level_means.append({
                "factor": term, "level": (m.get("levels") or {}).get(term, ""),
                "mean": scale.fmt(m.get("mean")),
                "interval": (scale.interval(m.get("lower"), m.get("upper"))
                             if finite(m.get("lower")) and finite(m.get("upper")) else "–"),
                "n": m.get("n", ""),
            })
    return level_means


def _comparison_row(c: dict) -> dict:
    """One comparison, formatted, its method in words with the adjustment named."""
    method = _METHOD_WORDS.get(c.get("method"), str(c.get("method")))
    if c.get("adjust") in ("bonferroni", "holm") and c.get("method") != "tukey":
        method += f" ({c['adjust'].capitalize()})"
    return {
        "method": method,
        "factor": c.get("factor"), "within": c["within_text"],
        "a": c.get("a"), "b": c.get("b"), "ratio": fmt_ratio(c.get("ratio")),
        "interval": (fmt_ratio_interval(c.get("lower"), c.get("upper"))
                     if finite(c.get("lower")) and finite(c.get("upper"))
                     else "not estimable"),
        "p": fmt_p(c.get("p_adj")), "significant": c["significant"],
    }


def _rank_check(data: ReportData) -> dict | None:
    """The aligned-rank check of the ANOVA's terms with its p-values formatted; None
    when the analysis made none."""
    art = data.analysis.get("art") or (data.analysis.get("diagnostics") or {}).get("art")
    if isinstance(art, dict) and art.get("terms"):
        return {**art, "terms": [{**t, "p_text": fmt_p(t.get("p")),
                                  "anova_p_text": fmt_p(t.get("anova_p"))} for t in art["terms"]]}
    return None


def _cell_rows(data: ReportData) -> tuple[list[dict], int]:
    """The appendix's per-cell rows (at most `MAX_CELLS`) and how many cells there are."""
    cells = []
    summary = story.cell_summary(data)[:MAX_CELLS]
    # one unit per column, chosen from the column's values (docs/cli.md)
    sc = {k: column_scale(data.response, [c[k] for c in summary])
          for k in ("median", "iqr", "min", "max", "mean")}
    for c in summary:
        cells.append({
            "levels": [c["levels"][f] for f in data.factors],
            "ok": c["ok"], "failed": c["failed"], "timeout": c["timeout"],
            **{k: sc[k].fmt(c[k]) for k in ("median", "iqr", "min", "max", "mean")},
            "interval": (sc["mean"].interval(c["lower"], c["upper"])
                         if finite(c.get("lower")) and finite(c.get("upper")) else ""),
            "flag": c["timeout"] > 0 or c["failed"] > 0,
        })
    n_cells_total = len(story.cell_summary(data)) if len(cells) == MAX_CELLS else len(cells)
    return cells, n_cells_total


def _sections(frac) -> list[tuple[str, str]]:
    """The report's sections in order; the alias chains follow the ANOVA for a fraction."""
    sections = list(SECTIONS)
    if frac is not None:
        at = [i for i, (sid, _t) in enumerate(sections) if sid == "anova"][0] + 1
        sections.insert(at, ("fraction", "Alias chains of the fraction"))
    return sections


def surface_section(data, sections: list) -> dict | None:
    """A response surface's section (report/surface.py), listed before the effects."""
    from benchharness.report import surface as _surface

    sec = _surface.section(data)
    if sec is not None:
        at = [i for i, (sid, _t) in enumerate(sections) if sid == "effects"][0]
        sections.insert(at, ("surface", "Response surface"))
    return sec


def _comparisons_intro(comps) -> str:
    """One sentence on which families were compared and why."""
    kinds = {c.get("method") for c in comps}
    parts = []
    if "tukey" in kinds:
        parts.append("Tukey HSD between all levels of each significant main effect that is "
                     "in no significant interaction")
    if "simple" in kinds:
        parts.append("simple effects (the levels of one factor within each level of its "
                     "partner) inside each significant interaction")
    if "declared" in kinds:
        parts.append("the comparisons declared in the experiment file, adjusted among "
                     "themselves")
    if "pairwise" in kinds:
        parts.append("pairwise t-tests between the levels of every factor (on request)")
    if not parts:
        return ""
    text = "; ".join(parts)
    return text[0].upper() + text[1:] + "."


def _extra_section(sec) -> dict:
    rec = sec.get("recommendation") or {}
    return {
        "id": str(sec.get("id") or "extra"),
        "title": str(sec.get("title") or "More"),
        "recommendation": ", ".join(f"{k}={v}" for k, v in dict(rec).items()),
        "summary": [str(x) for x in sec.get("summary") or []],
        "columns": [str(c) for c in sec.get("columns") or []],
        "rows": [[str(x) for x in r] for r in sec.get("rows") or []],
        "notes": [str(x) for x in sec.get("notes") or []],
    }


def fmt_df(df) -> str:
    if finite(df) and float(df) == int(float(df)):
        return str(int(float(df)))
    return fmt_num(df, 4)


def report_command(data: ReportData) -> str:
    import shlex

    parts = ["benchharness", "report", data.source]
    if data.folder is None:
        parts += ["--factors", ",".join(data.factors)]
    if data.response != "wall_s":
        parts += ["--response", data.response]
    return " ".join(shlex.quote(p) for p in parts)


def _version() -> str:
    from benchharness import __version__

    return __version__
