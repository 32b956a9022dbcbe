"""The report's figures, drawn with matplotlib's Agg and SVG canvases (no pyplot).

Figures: per-cell distributions (box plus every run, faceted by factors); one
interaction plot per pair of factors (level means with intervals, one line per
level of the other factor; highlighted when the interaction is significant); the
main-effect ratio plot with intervals; a normal Q-Q plot of the residuals
(plotting positions of Blom 1958); residuals against fitted values; residuals
against run position (drift); the Box-Cox profile log-likelihood (Box & Cox 1964)
with the chosen λ marked; for a two-level fraction, the half-normal plot of its
alias chains (Daniel 1959) with Lenth's (1989) margins.

Cost does not grow with the number of runs beyond what the point layers need:
point layers are subsampled past `MAX_POINTS_PER_CELL` runs per cell (and
`MAX_SCATTER` in the residual plots), the report says so, and point layers are
rasterised inside SVG files.

The palette is our own choice of eight hues that stay apart under the common
forms of colour-vision deficiency (chosen along the lines of Okabe & Ito 2008:
vary lightness as well as hue, avoid pairing red with green).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from itertools import combinations
from pathlib import Path

from benchharness.report.data import ReportData, finite
from benchharness.report.drawing import (ACCENT, INK, MUTED, PALETTE, Figure, log_ticks,
                                         new_figure, render_figure)
from benchharness.report.units import axis_label, describe, display_scale, fmt_p, plural, unit_of

MAX_POINTS_PER_CELL = 2000
MAX_POINTS_DISTRIBUTIONS = 40000   # over all cells of the distribution plot
MAX_SCATTER = 20000


@dataclass
class FigureSet:
    figures: list[Figure] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)

    def by_section(self, section: str) -> list[Figure]:
        return [f for f in self.figures if f.section == section]

    def save(self, folder: Path, subdir: str = "figures") -> list[Path]:
        """Write <subdir>/<name>.png and .svg under ``folder``; returns the paths."""
        out = Path(folder) / subdir
        out.mkdir(parents=True, exist_ok=True)
        paths = []
        for f in self.figures:
            p = out / f"{f.name}.png"
            p.write_bytes(f.png)
            s = out / f"{f.name}.svg"
            s.write_text(f.svg, encoding="utf-8")
            paths += [p, s]
        return paths


def _rc():
    return {
        "font.size": 9.5,
        "axes.titlesize": 10.5,
        "axes.labelsize": 9.5,
        "axes.edgecolor": "#555555",
        "axes.linewidth": 0.8,
        "axes.spines.top": False,
        "axes.spines.right": False,
        "axes.grid": True,
        "grid.color": "#e4e4e4",
        "grid.linewidth": 0.6,
        "axes.axisbelow": True,
        "xtick.color": "#333333",
        "ytick.color": "#333333",
        "legend.frameon": False,
        "svg.hashsalt": "benchharness",
        "svg.fonttype": "none",
        "path.simplify": True,
        "figure.dpi": 100,
    }


def _wrap(label: str, width: int = 14) -> str:
    import textwrap

    label = str(label)
    if len(label) <= width:
        return label
    return "\n".join(textwrap.wrap(label, width, break_long_words=True,
                                    break_on_hyphens=False)[:4])


def _colors(n: int) -> list[str]:
    return [PALETTE[i % len(PALETTE)] for i in range(n)]


def _ok_values(data: ReportData):
    import numpy as np
    import pandas as pd

    ok = data.ok_runs
    y = pd.to_numeric(ok[data.response], errors="coerce")
    keep = y.notna() & np.isfinite(y)
    return ok[keep.to_numpy()], y[keep].to_numpy(dtype=float)


def _use_log_axis(data: ReportData, y) -> bool:
    name = (data.analysis.get("transform") or {}).get("name")
    return bool(len(y) and (y > 0).all() and (name == "log"
                                               or (y.max() / max(y.min(), 1e-300)) > 30))


def _scale_text(data: ReportData) -> str:
    tr = data.analysis.get("transform") or {}
    name = tr.get("name", "none")
    unit = unit_of(data.response)
    if name == "log":
        return "log scale"
    if name == "boxcox":
        return f"Box-Cox scale, λ = {tr.get('lambda')}"
    return unit or "as measured"


@dataclass(frozen=True)
class _Panels:
    """The distribution figure's layout: a panel per level of the second factor (columns)
    and the third (rows); inside a panel, x runs over the first factor and the rest."""

    factors: list
    f1: str
    col_f: str | None
    row_f: str | None
    inner: list          # the factors along x (the first one told by colour)
    cols: list
    rows: list
    combos: list         # level combinations of ``inner``, one x position each


def _panels(data: ReportData) -> _Panels:
    import itertools

    factors = list(data.factors)
    col_f = factors[1] if len(factors) > 1 else None
    row_f = factors[2] if len(factors) > 2 else None
    inner = [factors[0]] + factors[3:]
    return _Panels(factors=factors, f1=factors[0], col_f=col_f, row_f=row_f, inner=inner,
                   cols=list(data.levels[col_f]) if col_f else [None],
                   rows=list(data.levels[row_f]) if row_f else [None],
                   combos=list(itertools.product(*[data.levels[f] for f in inner])))


def distributions(data: ReportData, rng, max_points: int = MAX_POINTS_PER_CELL):
    """Box plot per cell with every run (or a stated subsample) drawn over it."""
    import numpy as np

    ok, y = _ok_values(data)
    p = _panels(data)
    typical = float(np.median(y)) if len(y) else None
    mult, unit = display_scale(data.response, typical)
    yv = y * mult
    frame = ok[p.factors].astype(str).reset_index(drop=True)
    codes = {(k if isinstance(k, tuple) else (k,)): v
             for k, v in frame.groupby(p.factors, observed=True, sort=False).indices.items()}
    color_of = dict(zip(data.levels[p.f1], _colors(len(data.levels[p.f1]))))
    n_in = len(p.combos)
    width = min(13.0, max(5.0, 1.4 + len(p.cols) * (0.6 + 0.42 * n_in)))
    height = min(3.2 * len(p.rows) + 0.9, 30.0)
    fig = new_figure(width, height)
    axes = fig.subplots(len(p.rows), len(p.cols), squeeze=False, sharey=True)
    logax = _use_log_axis(data, y)
    max_points = min(max_points, max(200, MAX_POINTS_DISTRIBUTIONS // max(1, len(codes))))
    per_cell = len(yv) / max(1, len(codes))
    dot = 16 if per_cell <= 20 else 9 if per_cell <= 200 else 5
    ticks = _tick_labels(p)
    ylabel = axis_label(data.response, unit) + (" — log axis" if logax else "")
    subsampled = 0
    for ri, rv in enumerate(p.rows):
        for ci, cv in enumerate(p.cols):
            ax = axes[ri][ci]
            subsampled += _panel_points(ax, p, rv, cv, codes, yv, color_of, rng, max_points,
                                        dot)
            _panel_axes(ax, data, p, ticks, (ri, rv), (ci, cv), yv if logax else None, ylabel)
    if len(p.inner) > 1:
        from matplotlib.patches import Patch

        handles = [Patch(facecolor=color_of[lv], alpha=0.6, edgecolor="#555555", label=_wrap(lv))
                   for lv in data.levels[p.f1]]
        fig.legend(handles=handles, title=p.f1, loc="outside upper center",
                   ncols=min(6, len(handles)), fontsize=8.5, title_fontsize=9)
    note = None
    if subsampled:
        note = (f"The distribution plot draws a random {max_points:,} of the runs in each of "
                f"{plural(subsampled, 'cell')} that had more; the boxes use every run.")
    cap = ("Each box spans the middle half of the runs of one cell (line: median; whiskers: "
           "1.5 × IQR); dots are individual runs, spread sideways so they do not overlap.")
    if note:
        cap += " " + note
    return render_figure(fig, "distributions", f"Runs per cell: {describe(data.response)}", cap,
                   "effects"), note


def _tick_labels(p: _Panels):
    """(tick texts, rotation): ticks name the inner factors after the first; the first is
    told by colour (legend)."""
    if len(p.inner) == 1:
        raw = [c[0] for c in p.combos]
    else:
        raw = [" · ".join(c[1:]) for c in p.combos]
    longest = max((len(t) for t in raw), default=1)
    rot = 30 if len(p.combos) * min(longest, 14) > 40 else 0
    return [_wrap(t) for t in raw], rot


def _panel_points(ax, p: _Panels, rv, cv, codes, yv, color_of, rng, max_points, dot) -> int:
    """One panel's boxes and points; returns how many of its cells were subsampled."""
    import numpy as np

    boxes, positions, colors = [], [], []
    px, py, pc = [], [], []
    subsampled = 0
    for xi, combo in enumerate(p.combos):
        lv = dict(zip(p.inner, combo))
        if p.col_f:
            lv[p.col_f] = cv
        if p.row_f:
            lv[p.row_f] = rv
        idx = codes.get(tuple(lv[f] for f in p.factors))
        if idx is None or len(idx) == 0:
            continue
        vals = yv[idx]
        boxes.append(vals)
        positions.append(xi)
        colors.append(color_of[lv[p.f1]])
        pts = vals
        if len(pts) > max_points:
            pts = rng.choice(pts, size=max_points, replace=False)
            subsampled += 1
        px.append(xi + rng.uniform(-0.18, 0.18, size=len(pts)))
        py.append(pts)
        pc += [color_of[lv[p.f1]]] * len(pts)
    if boxes:
        _boxes(ax, boxes, positions, colors)
        ax.scatter(np.concatenate(px), np.concatenate(py), s=dot, c=pc, alpha=0.6,
                   linewidths=0, rasterized=True, zorder=3)
    return subsampled


def _panel_axes(ax, data: ReportData, p: _Panels, ticks, row, col, log_values, ylabel) -> None:
    """A panel's ticks, separators, log axis, title and the labels on the figure's edges."""
    (ri, rv), (ci, cv) = row, col
    tick_text, rot = ticks
    n_in = len(p.combos)
    ax.set_xticks(range(n_in))
    ax.set_xticklabels(tick_text, rotation=rot, ha="right" if rot else "center", fontsize=8.5)
    ax.set_xlim(-0.6, n_in - 0.4)
    if len(p.inner) > 1:
        group = n_in // max(1, len(data.levels[p.f1]))
        for g in range(1, len(data.levels[p.f1])):
            ax.axvline(g * group - 0.5, color="#cccccc", lw=0.8, zorder=1)
    if log_values is not None:
        ax.set_yscale("log")
        log_ticks(ax.yaxis, float(log_values.min()), float(log_values.max()))
    title = [f"{p.col_f} = {cv}"] if p.col_f else []
    if p.row_f:
        title.append(f"{p.row_f} = {rv}")
    if title:
        ax.set_title(" · ".join(title), fontsize=9.5)
    if ci == 0:
        ax.set_ylabel(ylabel)
    if ri == len(p.rows) - 1:
        ax.set_xlabel(" · ".join(p.inner[1:]) if len(p.inner) > 1 else p.f1)
    ax.grid(axis="x", visible=False)


def _boxes(ax, groups, positions, colors, width: float = 0.62) -> None:
    """Box plots drawn as three collections per panel (cheap for hundreds of cells).

    Box: first to third quartile; line: median; whiskers: the furthest runs within
    1.5 × IQR of the box (Tukey 1977).
    """
    import numpy as np
    from matplotlib.collections import LineCollection, PolyCollection

    rects, segs, meds = [], [], []
    half = width / 2
    for vals, x in zip(groups, positions):
        q1, med, q3 = np.percentile(vals, [25, 50, 75])
        iqr = q3 - q1
        lo = vals[vals >= q1 - 1.5 * iqr].min()
        hi = vals[vals <= q3 + 1.5 * iqr].max()
        rects.append([(x - half, q1), (x + half, q1), (x + half, q3), (x - half, q3)])
        segs += [[(x, q3), (x, hi)], [(x, q1), (x, lo)],
                 [(x - half / 2, hi), (x + half / 2, hi)], [(x - half / 2, lo), (x + half / 2, lo)]]
        meds.append([(x - half, med), (x + half, med)])
    from matplotlib.colors import to_rgba

    ax.add_collection(PolyCollection(rects, facecolors=[to_rgba(c, 0.28) for c in colors],
                                     edgecolors="#555555", linewidths=0.8, zorder=2))
    ax.add_collection(LineCollection(segs, colors="#555555", linewidths=0.9, zorder=2))
    ax.add_collection(LineCollection(meds, colors=INK, linewidths=1.4, zorder=4))
    ax.update_datalim([(min(positions) - half, min(r[0][1] for r in rects)),
                       (max(positions) + half, max(r[2][1] for r in rects))])
    ax.autoscale_view()


def _pair_means(data: ReportData, a: str, b: str):
    """{(la, lb): (mean, lower, upper)} from the analysis, else from the runs."""
    import numpy as np

    term_ab, term_ba = f"{a}:{b}", f"{b}:{a}"
    got = {}
    for m in data.analysis.get("means") or []:
        if m.get("term") in (term_ab, term_ba):
            lv = m.get("levels") or {}
            if a in lv and b in lv and finite(m.get("mean")):
                got[(str(lv[a]), str(lv[b]))] = (m.get("mean"), m.get("lower"), m.get("upper"))
    if got:
        return got, True
    ok, y = _ok_values(data)
    log = bool(len(y) and (y > 0).all())
    from benchharness.analysis import dist as stats

    frame = ok[[a, b]].astype(str).assign(_z=np.log(y) if log else y)
    for (la, lb), g in frame.groupby([a, b], observed=True)["_z"]:
        n = len(g)
        mean = float(g.mean())
        if n > 1:
            half = float(stats.t.ppf(1 - data.alpha / 2, n - 1) * g.std(ddof=1) / math.sqrt(n))
        else:
            half = float("nan")
        lo, hi = mean - half, mean + half
        if log:
            mean, lo, hi = math.exp(mean), math.exp(lo), math.exp(hi)
        got[(la, lb)] = (mean, lo, hi)
    return got, False


def _interaction_lines(ax, means, la, lb, mult) -> None:
    """One line of means with interval bars per level of the second factor, dodged sideways."""
    import numpy as np

    colors = _colors(len(lb))
    dodge = 0.06 if len(lb) > 1 else 0.0
    for j, (lvb, c) in enumerate(zip(lb, colors)):
        xs, ms, los, his = [], [], [], []
        for i, lva in enumerate(la):
            v = means.get((lva, lvb))
            if v is None or not finite(v[0]):
                continue
            xs.append(i + (j - (len(lb) - 1) / 2) * dodge)
            ms.append(float(v[0]) * mult)
            los.append(float(v[1]) * mult if finite(v[1]) else np.nan)
            his.append(float(v[2]) * mult if finite(v[2]) else np.nan)
        if not xs:
            continue
        ms_a, lo_a, hi_a = np.array(ms), np.array(los), np.array(his)
        err = np.vstack([np.where(np.isnan(lo_a), 0, ms_a - lo_a),
                         np.where(np.isnan(hi_a), 0, hi_a - ms_a)])
        ax.errorbar(xs, ms_a, yerr=err, color=c, marker="o", ms=5, lw=1.8, capsize=3,
                    label=_wrap(lvb, 24))


def _interaction_title(ax, a: str, b: str, row, p, significant: bool) -> None:
    """The verdict as the title; a significant interaction is drawn in the accent colour."""
    if significant:
        status = f"interaction significant, p {_pw(p)}"
        ax.set_title(f"{a} × {b}: {status}", color=ACCENT, fontweight="bold")
        for s in ax.spines.values():
            s.set_edgecolor(ACCENT)
            s.set_linewidth(1.6)
    else:
        status = (f"no interaction detected, p {_pw(p)}" if row
                  else "interaction not in the model")
        ax.set_title(f"{a} × {b}: {status}")


def _interaction_caption(data: ReportData, a: str, b: str, p, significant: bool, logscale,
                         from_model: bool) -> str:
    """How to read the interaction figure."""
    conf = f"{round((1 - data.alpha) * 100):g}%"
    cap = f"Significant interaction (p {_pw(p)}). " if significant else ""
    cap += (f"Estimated mean of each {a} × {b} combination with its {conf} interval; one line "
           f"per level of {b}. Parallel lines mean the effect of {a} is the same at every "
           f"level of {b}; crossing or diverging lines mean it is not.")
    if logscale:
        cap += " The axis is logarithmic, so parallel means the same ratio."
    if not from_model:
        cap += " (The model has no such term: means and intervals come from the runs directly.)"
    return cap


def interaction(data: ReportData, a: str, b: str) -> Figure:
    import numpy as np

    means, from_model = _pair_means(data, a, b)
    term = f"{a}:{b}"
    row = next((r for r in data.analysis.get("anova") or [] if r.get("term") == term), None)
    p = row.get("p") if row else None
    significant = bool(finite(p) and float(p) < data.alpha)
    la, lb = list(data.levels[a]), list(data.levels[b])
    vals = [v[0] for v in means.values() if finite(v[0])]
    mult, unit = display_scale(data.response, float(np.median(vals)) if vals else None)
    fig = new_figure(min(9.5, 4.6 + 0.55 * len(la)), 3.5)
    ax = fig.subplots()
    _interaction_lines(ax, means, la, lb, mult)
    ax.set_xticks(range(len(la)))
    ax.set_xticklabels([_wrap(x) for x in la])
    ax.set_xlabel(a)
    logscale = (data.analysis.get("transform") or {}).get("name") == "log" and vals \
        and min(vals) > 0
    if logscale:
        ax.set_yscale("log")
        lo_y, hi_y = ax.get_ylim()
        log_ticks(ax.yaxis, lo_y, hi_y)
    ax.set_ylabel(("mean " if from_model else "geometric mean ")
                  + axis_label(data.response, unit))
    ax.legend(title=b, fontsize=8.5, title_fontsize=9, loc="center left",
              bbox_to_anchor=(1.01, 0.5))
    _interaction_title(ax, a, b, row, p, significant)
    if logscale:
        ax.set_ylabel(ax.get_ylabel() + " — log axis")
    cap = _interaction_caption(data, a, b, p, significant, logscale, from_model)
    return render_figure(fig, f"interaction-{_slug(a)}-{_slug(b)}", f"Interaction of {a} and {b}",
                   cap, "effects", highlight=significant)


def _pw(p) -> str:
    s = fmt_p(p)
    return s if s.startswith("<") else f"= {s}"


def _slug(text: str) -> str:
    import re

    s = re.sub(r"[^A-Za-z0-9]+", "-", str(text)).strip("-").lower()
    return s or "factor"


def _effect_rows(ax, factors, effects):
    """One row per level against its reference, grouped by factor with a line between groups:
    the interval as a bar, the ratio as a dot, accented when the interval excludes 1×.
    Returns (last y, tick positions, tick labels)."""
    y = 0
    ticks, labels = [], []
    seps = []
    for f in factors:
        effs = [e for e in effects if e.get("factor") == f]
        if not effs:
            continue
        for e in effs:
            r, lo, hi = float(e["ratio"]), e.get("lower"), e.get("upper")
            sig = finite(lo) and finite(hi) and (float(lo) > 1 or float(hi) < 1)
            c = ACCENT if sig else MUTED
            if finite(lo) and finite(hi):
                ax.plot([float(lo), float(hi)], [y, y], color=c, lw=2.2, solid_capstyle="butt")
            ax.plot([r], [y], "o", color=c, ms=6.5, mec="white", mew=0.8, zorder=3)
            ticks.append(y)
            labels.append(f"{f}: {_wrap(e['level'], 28)} vs {_wrap(e['reference'], 28)}")
            y -= 1
        seps.append(y + 0.2)
        y -= 0.4
    for s in seps[:-1]:
        ax.axhline(s, color="#cccccc", lw=0.8)
    return y, ticks, labels


def _ratio_axis(ax, effects) -> None:
    """A log ratio axis around 1× that holds every ratio and interval, ticked as ratios."""
    ax.axvline(1.0, color=INK, lw=1, ls="--")
    ax.set_xscale("log")
    vals = [float(e["ratio"]) for e in effects]
    vals += [float(e[k]) for e in effects for k in ("lower", "upper") if finite(e.get(k))]
    vals = [v for v in vals if v > 0]
    if vals:
        lo, hi = min(vals + [1.0]), max(vals + [1.0])
        span = math.log(hi / lo) if hi > lo else 0.2
        ax.set_xlim(lo * math.exp(-0.08 * span - 0.02), hi * math.exp(0.08 * span + 0.02))
    from matplotlib.ticker import FuncFormatter

    lo_x, hi_x = ax.get_xlim()
    log_ticks(ax.xaxis, lo_x, hi_x)
    ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _p: f"{v:g}×"))


def effects_plot(data: ReportData) -> Figure | None:
    effects = [e for e in data.analysis.get("effects") or [] if finite(e.get("ratio"))]
    if not effects:
        return None

    fig = new_figure(7.2, min(1.2 + 0.34 * (len(effects) + len(data.factors)), 24))
    ax = fig.subplots()
    y, ticks, labels = _effect_rows(ax, data.factors, effects)
    ax.set_ylim(y + 0.6, 0.7)
    _ratio_axis(ax, effects)
    ax.set_yticks(ticks)
    ax.set_yticklabels(labels)
    ax.grid(axis="y", visible=False)
    name = (data.analysis.get("transform") or {}).get("name")
    ax.set_xlabel(f"ratio of {describe(data.response)} to the reference level (×, log axis)")
    conf = f"{round((1 - data.alpha) * 100):g}%"
    ax.set_title(f"Main effects as ratios with {conf} intervals")
    cap = ("Each row compares one level with its factor's reference level: 1× means no "
           "change, 2× twice as much, 0.5× half. Highlighted rows have intervals that exclude 1×.")
    if name not in ("log", None):
        cap += " The analysis did not use the log scale, so these ratios are approximate."
    return render_figure(fig, "effects", "Main effects as ratios", cap, "effects")


def half_normal_plot(data: ReportData) -> Figure | None:
    """Half-normal plot of a two-level fraction's chain effects (Daniel 1959), with the
    margins that judge them: Lenth's (1989) ME and SME without replicates, else the
    smallest effect significant at alpha."""
    fr = data.analysis.get("fraction") or {}
    pts = [p for p in fr.get("half_normal") or [] if finite(p.get("abs_effect"))]
    if len(pts) < 2:
        return None
    by_label = {e.get("label"): e for e in fr.get("effects") or []}
    fig = new_figure(6.4, 4.4)
    ax = fig.subplots()
    xs = [float(p["abs_effect"]) for p in pts]
    ys = [float(p["quantile"]) for p in pts]
    hot = [_stands_out(by_label.get(p["label"])) for p in pts]
    _chain_points(ax, xs, ys, hot)
    _label_largest(ax, pts, xs, ys, hot, by_label)
    lines = _margins(fr, data.alpha)
    for x, style, label in lines:
        if finite(x):
            ax.axvline(float(x), color=ACCENT, ls=style, lw=1, label=label)
    if lines:
        ax.legend(fontsize=8, loc="lower right")
    ax.set_xlim(0, max(xs + [float(x) for x, _s, _l in lines if finite(x)]) * 1.08)
    ax.set_ylim(0, max(ys) * 1.08)
    scale = fr.get("scale")
    what = "ln " + describe(data.response) if scale == "log" else describe(data.response)
    ax.set_xlabel(f"|effect| on {what} (mean at the second level minus the first)")
    ax.set_ylabel("half-normal quantile")
    ax.set_title("Half-normal plot of the alias chains")
    cap = ("Each point is one alias chain's effect, smallest to largest. Chains that do nothing "
           "fall on a straight line through the origin; chains that stand out to the right "
           "of it, past the dashed margin, are the active ones (highlighted).")
    return render_figure(fig, "half-normal", "Half-normal plot of the alias chains", cap, "fraction",
                   highlight=any(hot))


def _stands_out(effect) -> bool:
    """Whether a chain is active (or likely active, by Lenth's ME)."""
    effect = effect or {}
    return bool(effect.get("active") or effect.get("likely"))


def _chain_points(ax, xs, ys, hot) -> None:
    """The chains, those that stand out in the accent colour."""
    ax.scatter([x for x, h in zip(xs, hot) if not h], [y for y, h in zip(ys, hot) if not h],
               s=22, color=MUTED, zorder=3)
    ax.scatter([x for x, h in zip(xs, hot) if h], [y for y, h in zip(ys, hot) if h],
               s=30, color=ACCENT, zorder=3)


def _label_largest(ax, pts, xs, ys, hot, by_label) -> None:
    """Name the five largest chains, each on the side of its point with room."""
    right_edge = max(xs)
    for p, x, y, h in list(zip(pts, xs, ys, hot))[-min(5, len(pts)):]:
        e = by_label.get(p["label"]) or {}
        left = x > 0.5 * right_edge  # label on the side with room
        ax.annotate(str(e.get("chain") or p["label"]), (x, y), fontsize=8,
                    xytext=(-6 if left else 6, 0), textcoords="offset points", va="center",
                    ha="right" if left else "left", color=ACCENT if h else INK)


def _margins(fr: dict, alpha: float) -> list:
    """(x, line style, label) of the margins that judge a chain: Lenth's ME and SME, else
    the smallest effect significant at alpha; none when neither is known."""
    ln = fr.get("lenth")
    if ln:
        return [(ln.get("me"), "--", "margin of error (Lenth)"),
                (ln.get("sme"), ":", "simultaneous margin (Lenth)")]
    ses = [e.get("se") for e in fr.get("effects") or [] if finite(e.get("se"))]
    df = fr.get("residual_df")
    if not (ses and df):
        return []
    from benchharness.analysis import dist as stats

    cut = float(stats.t.ppf(1 - float(fr.get("alpha") or alpha) / 2, df)) * max(ses)
    return [(cut, "--", f"smallest effect with p < {fr.get('alpha') or alpha:g}")]


def _scatter_subsample(n: int, rng, cap: int = MAX_SCATTER):
    import numpy as np

    if n <= cap:
        return np.arange(n), None
    idx = np.sort(rng.choice(n, size=cap, replace=False))
    return idx, f"Residual scatter plots draw a random {cap:,} of the {n:,} runs."


def residual_label(data: ReportData) -> str:
    tr = data.analysis.get("transform") or {}
    name = tr.get("name", "none")
    if name == "log":
        return f"residual of ln({data.response}) (≈ relative deviation)"
    if name == "boxcox":
        return f"residual on the Box-Cox scale (λ = {tr.get('lambda')})"
    unit = unit_of(data.response)
    return f"residual ({unit})" if unit else "residual"


def qq_plot(data: ReportData) -> Figure | None:
    import numpy as np
    from benchharness.analysis import dist as stats

    res = data.residuals
    if res is None or len(res) < 3:
        return None
    r = np.sort(res["residual"].to_numpy(dtype=float))
    n = len(r)
    q = stats.norm.ppf((np.arange(1, n + 1) - 0.375) / (n + 0.25))  # Blom (1958)
    if n > MAX_SCATTER:
        keep = np.unique(np.concatenate([np.linspace(0, n - 1, MAX_SCATTER).astype(int),
                                         np.arange(min(50, n)), np.arange(max(0, n - 50), n)]))
        r_, q_ = r[keep], q[keep]
    else:
        r_, q_ = r, q
    fig = new_figure(4.8, 4.0)
    ax = fig.subplots()
    ax.scatter(q_, r_, s=9, color=PALETTE[0], alpha=0.6, linewidths=0, rasterized=True)
    q1, q3 = np.percentile(r, [25, 75])
    z1, z3 = stats.norm.ppf([0.25, 0.75])
    slope = (q3 - q1) / (z3 - z1) if z3 != z1 else 1.0
    inter = q1 - slope * z1
    xs = np.array([q.min(), q.max()])
    ax.plot(xs, inter + slope * xs, color=ACCENT, lw=1.3, label="line through the quartiles")
    ax.set_xlabel("normal quantile (standard deviations)")
    ax.set_ylabel(residual_label(data))
    ax.set_title("Normal Q-Q plot of residuals")
    ax.legend(loc="upper left", fontsize=8.5)
    cap = ("Residuals sorted against the quantiles a normal distribution would give. Points "
           "on the line: normal residuals. A curve bending up at the right: a long right tail "
           "(common for timings).")
    if n > MAX_SCATTER:
        cap += f" {MAX_SCATTER:,} evenly spaced order statistics of {n:,} are drawn."
    return render_figure(fig, "qq", "Q-Q plot of residuals", cap, "diagnostics")


def resid_fitted(data: ReportData, rng) -> tuple[Figure | None, str | None]:
    import numpy as np

    res = data.residuals
    if res is None or len(res) < 3:
        return None, None
    idx, note = _scatter_subsample(len(res), rng)
    sub = res.iloc[idx]
    f1 = data.factors[0]
    fig = new_figure(7.2, 3.8)
    ax = fig.subplots()
    for lv, c in zip(data.levels[f1], _colors(len(data.levels[f1]))):
        part = sub[sub[f1] == lv]
        if len(part):
            ax.scatter(part["fitted"], part["residual"], s=9, color=c, alpha=0.55,
                       linewidths=0, rasterized=True, label=str(lv))
    ax.axhline(0, color=INK, lw=1)
    fitted = res["fitted"].to_numpy(dtype=float)
    resid = res["residual"].to_numpy(dtype=float)
    # Spread per fitted-value group: a funnel shows unequal variances.
    order = np.argsort(fitted)
    bins = np.array_split(order, min(12, max(1, len(order) // 20)))
    if len(bins) > 2:
        cx = [float(np.median(fitted[b])) for b in bins]
        sd = [float(np.std(resid[b])) for b in bins]
        ax.plot(cx, sd, color="#555555", lw=1, ls=":", label="± spread")
        ax.plot(cx, [-s for s in sd], color="#555555", lw=1, ls=":")
    tr = (data.analysis.get("transform") or {}).get("name", "none")
    ax.set_xlabel("fitted value, " + ("ln scale" if tr == "log" else _scale_text(data)))
    ax.set_ylabel(residual_label(data))
    ax.set_title("Residuals against fitted values")
    ax.legend(title=f1, fontsize=8, title_fontsize=8.5, loc="center left",
              bbox_to_anchor=(1.01, 0.5), markerscale=1.5)
    cap = ("Each dot is one run: its deviation from its cell's fitted value. An even band "
           "around zero is what the model assumes; a funnel means the spread grows with the "
           "value (a transform helps).")
    if note:
        cap += " " + note
    return render_figure(fig, "residuals-fitted", "Residuals against fitted values", cap,
                   "diagnostics"), note


def resid_position(data: ReportData, rng) -> Figure | None:
    import numpy as np

    res = data.residuals
    if res is None or len(res) < 3 or "position" not in data.runs.columns:
        return None  # run order unknown (e.g. a CSV without a position column)
    pos = res["position"].to_numpy(dtype=float)
    r = res["residual"].to_numpy(dtype=float)
    idx, _ = _scatter_subsample(len(res), rng)
    fig = new_figure(8.6, 3.4)
    ax = fig.subplots()
    ax.scatter(pos[idx], r[idx], s=8, color=PALETTE[0], alpha=0.5, linewidths=0,
               rasterized=True, label="run")
    ax.axhline(0, color=INK, lw=1)
    order = np.argsort(pos)
    nb = min(40, max(1, len(order) // 10))
    if nb >= 3:
        bins = np.array_split(order, nb)
        ax.plot([float(np.mean(pos[b])) for b in bins], [float(np.mean(r[b])) for b in bins],
                color=PALETTE[1], lw=1.8, label="mean of neighbouring runs")
    drift = (data.analysis.get("diagnostics") or {}).get("drift") or {}
    p = drift.get("p")
    concern = bool(finite(p) and float(p) < data.alpha)
    if len(pos) > 2 and np.ptp(pos) > 0:
        slope, inter = np.polyfit(pos, r, 1)
        xs = np.array([pos.min(), pos.max()])
        ax.plot(xs, inter + slope * xs, color=ACCENT if concern else MUTED, lw=1.4, ls="--",
                label="straight-line trend")
    ax.set_xlabel("run position in the execution order (warm-up runs count)")
    ax.set_ylabel(residual_label(data))
    title = "Residuals in run order"
    if finite(p):
        title += f": trend p {_pw(p)}"
    ax.set_title(title, color=ACCENT if concern else INK,
                 fontweight="bold" if concern else "normal")
    ax.legend(fontsize=8, loc="upper left", bbox_to_anchor=(1.01, 1.0))
    cap = ("Residuals in the order the runs were executed. A slope or a step means the "
           "machine changed during the experiment (warming up, throttling, other load); "
           "randomised order keeps that from biasing the effects but it still widens intervals.")
    return render_figure(fig, "residuals-position", "Residuals in run order (drift)", cap,
                   "diagnostics", highlight=concern)


def boxcox_plot(data: ReportData) -> Figure | None:
    import numpy as np

    prof = data.profile
    if prof is None or len(prof) < 3:
        return None
    lam = prof["lambda"].to_numpy(dtype=float)
    ll = prof["loglik"].to_numpy(dtype=float)
    good = np.isfinite(ll)
    lam, ll = lam[good], ll[good]
    if len(lam) < 3:
        return None
    tr = data.analysis.get("transform") or {}
    fig = new_figure(7.6, 3.6)
    ax = fig.subplots()
    ax.plot(lam, ll, color=PALETTE[0], lw=1.8, label="profile log-likelihood")
    top = float(ll.max())
    cut = top - 0.5 * 3.841458820694124  # χ²₁ 95% quantile / 2 (Box & Cox 1964)
    ax.axhline(cut, color=MUTED, lw=0.9, ls=":", label="95% interval cut-off")
    cut99 = top - 0.5 * 6.6348966010212145  # χ²₁ 99% quantile / 2: the scale rule's strong evidence
    ax.axhline(cut99, color=MUTED, lw=0.9, ls="--", label="99% interval cut-off")
    ci = tr.get("lambda_ci")
    if isinstance(ci, (list, tuple)) and len(ci) == 2 and all(finite(v) for v in ci):
        ax.axvspan(float(ci[0]), float(ci[1]), color=PALETTE[4], alpha=0.18,
                   label="95% interval for λ")
    lhat = tr.get("lambda_hat")
    if finite(lhat):
        ax.axvline(float(lhat), color=PALETTE[0], lw=1, ls="--", label=f"λ̂ = {float(lhat):.2f}")
    chosen = tr.get("lambda")
    name = tr.get("name", "none")
    if finite(chosen):
        word = {"log": "log", "none": "no transform", "boxcox": "Box-Cox"}.get(name, name)
        ax.axvline(float(chosen), color=ACCENT, lw=2, label=f"chosen λ = {float(chosen):g} "
                                                             f"({word})")
    lo = min(cut99 - 0.6 * (top - cut99) - 1, float(np.percentile(ll, 20)))
    ax.set_ylim(lo, top + 0.25 * (top - lo))
    ax.set_xlabel("λ (Box-Cox power: 1 = as measured, 0 = log, −1 = reciprocal)")
    ax.set_ylabel("log-likelihood")
    ax.set_title("Box-Cox profile likelihood")
    ax.legend(fontsize=7.5, loc="upper left", bbox_to_anchor=(1.01, 1.0))
    cap = ("How well each power transform of the response fits the model (residual degrees "
           "of freedom in place of the number of runs). The peak is the best-fitting λ; every "
           "λ above the dotted line is consistent with the data at 95%. The analysis leaves "
           "the log scale (λ = 0) only when λ = 0 falls below the dashed 99% line and the "
           "checks on the log scale fail. The thick line is the transform the analysis used.")
    return render_figure(fig, "boxcox", "Box-Cox profile likelihood", cap, "diagnostics")


def interaction_pairs(data: ReportData) -> list[tuple[str, str]]:
    """Every pair of factors, in the experiment's factor order."""
    return list(combinations(data.factors, 2))


#: from this many analysed runs on, the figures are drawn by two processes at once
PARALLEL_MIN_RUNS = 2000


def make_figures(data: ReportData, seed: int = 0,
                 max_points: int = MAX_POINTS_PER_CELL, workers: int | None = None) -> FigureSet:
    """Render every figure of the report.

    Each figure is one job with its own random stream (``seed`` and its place in the
    list), so the figures are the same whether the jobs run one after another or,
    with ``workers`` > 1, in that many forked processes (default: two on a machine
    with two or more cores when the report has `PARALLEL_MIN_RUNS` runs or more).
    """
    out = FigureSet()
    if data.analysis.get("unanalysed"):
        return out  # no run finished: no figure would show anything
    jobs = _figure_jobs(data, seed, max_points)
    if workers is None:
        workers = _default_workers(data)
    seen: dict[str, int] = {}
    for fig, note in _run_jobs(jobs, workers):
        if fig is not None:
            # two factor names may share a slug ("a b", "a-b"): keep every file
            n = seen.get(fig.name, 0)
            seen[fig.name] = n + 1
            if n:
                from dataclasses import replace

                fig = replace(fig, name=f"{fig.name}-{n + 1}")
            out.figures.append(fig)
        if note:
            out.notes.append(note)
    return out


def _figure_jobs(data: ReportData, seed: int, max_points: int) -> list:
    """The report's figures in order, each a call returning (Figure or None, note or None)."""
    import numpy as np

    from benchharness.report.surface import surface_figure
    from benchharness.report.tradeoff import tradeoff_figure

    def rng(k):
        return np.random.default_rng([seed, k])

    def alone(fig):
        return fig, None

    jobs = [lambda: distributions(data, rng(0), max_points=max_points),
            lambda: alone(effects_plot(data))]
    jobs += [lambda a=a, b=b: alone(interaction(data, a, b)) for a, b in interaction_pairs(data)]
    jobs += [lambda: alone(surface_figure(data))]     # a response surface's contours
    jobs += [lambda: alone(half_normal_plot(data)), lambda: alone(qq_plot(data)),
             lambda: resid_fitted(data, rng(1)), lambda: alone(resid_position(data, rng(2))),
             lambda: alone(boxcox_plot(data))]
    jobs += trend_figure_jobs(data)     # numeric factors: log-log trends (report/trends.py)
    # a choice with --also: its trade-off figure
    jobs += [lambda sec=sec: alone(tradeoff_figure(sec, str(sec.get("id") or "extra")))
             for sec in data.extra]
    return jobs


def trend_figure_jobs(data: ReportData) -> list:
    from benchharness.report.trends import figure_jobs

    return figure_jobs(data)


def _default_workers(data: ReportData) -> int:
    """Two processes for a large report on a machine with two or more cores, else one."""
    import multiprocessing
    import os

    if len(data.ok_runs) < PARALLEL_MIN_RUNS or multiprocessing.current_process().daemon:
        return 1   # (a daemonic process may not start processes of its own)
    try:
        cores = len(os.sched_getaffinity(0))
    except AttributeError:  # not Linux
        return 1
    return min(2, cores)


#: the jobs of the drawing in progress, read by forked workers (`_run_pending`)
_PENDING: list = []


def _run_pending(k: int):
    return _draw(_PENDING[k])


def _draw(job):
    import matplotlib

    with matplotlib.rc_context(_rc()):
        return job()


def _run_jobs(jobs: list, workers: int) -> list:
    """Results of ``jobs`` in order: here, or in ``workers`` forked processes that share
    the report's data with this one (nothing is copied in; each figure comes back)."""
    global _PENDING

    if workers <= 1 or len(jobs) < 2:
        return [_draw(job) for job in jobs]
    import multiprocessing

    _PENDING = jobs
    pool = multiprocessing.get_context("fork").Pool(min(workers, len(jobs)))
    try:
        # in order, one at a time: the largest figure (the distributions) starts first
        return pool.map(_run_pending, range(len(jobs)), chunksize=1)
    finally:
        pool.close()
        pool.join()
        _PENDING = []
