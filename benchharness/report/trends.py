"""The report's section on numeric factors: trends, scaling, and their log-log figures.

Rendered from ``analysis["trends"]`` (`benchharness.analysis.numeric`) and the
findings drawn from it (`benchharness.analysis.trend_words`), never re-fitted:

* ``sections(analysis)`` — one report section per numeric factor, in the
  shape of the report's extra sections (id, title, summary lines, a table):
  the findings in words, then a table of the polynomial contrasts, or for a
  parallel factor the speed-up and efficiency of every level;
* ``trend_figure(data, trend)`` — the geometric mean of the response against
  the factor on log-log axes, with its interval, one line per level of the
  factor the exponent differs with, else of the most important other factor
  (the trend's ``line_by``), the fitted common
  power law dashed beside the points.
"""

from __future__ import annotations

import math

from benchharness.numbers import fmt_p, fmt_ratio, fmt_ratio_interval


def _slug(text: str) -> str:
    import re

    return re.sub(r"[^A-Za-z0-9]+", "-", str(text)).strip("-").lower() or "factor"


def section_id(trend: dict) -> str:
    return f"trend-{_slug(trend['factor'])}"


def sections(analysis: dict) -> list[dict]:
    """The report sections of every trend (empty when the analysis has none)."""
    from benchharness.analysis.trend_words import findings

    out = []
    found = findings(analysis)
    for t in analysis.get("trends") or []:
        if t.get("skipped"):
            continue
        said = [f["statement"] + "." for f in found
                if f["kind"] in ("trend", "scaling") and f["factors"] == [t["factor"]]]
        sec = {"id": section_id(t), "title": f"Trend over {t['factor']}", "summary": said,
               "notes": [_method_note(t)]}
        sec.update(_speedup_table(t) if t.get("scaling") else _contrast_table(t))
        out.append(sec)
    return out


def _method_note(t: dict) -> str:
    axis = "log-log axes" if t.get("log_log") else f"axes of log y against {t['factor']}"
    text = (f"The exponent is the slope of a straight line on {axis}, one intercept per "
            "combination of the other factors; lack of fit compares a line per combination "
            "with the cell means (pure error).")
    if t.get("scaling"):
        text += (" Speed-ups are ratios of geometric means against the smallest level; the "
                 "serial fraction is Amdahl's (1967), fitted by least squares on the log "
                 "scale with a profile interval.")
    return text


def _contrast_table(t: dict) -> dict:
    rows = []
    for c in t.get("contrasts") or []:
        rows.append([c["name"], ", ".join(f"{x:+.3f}" for x in c["coefficients"]),
                     f"{c['estimate']:+.4g}", f"{c['F']:.4g}" if _ok(c.get("F")) else "–",
                     fmt_p(c.get("p")) if c.get("p") is not None else "–"])
    if not rows:
        return {}
    return {"columns": ["contrast (on " + t["axis"] + ")", "coefficients", "estimate", "F",
                        "p"], "rows": rows}


def _speedup_table(t: dict) -> dict:
    rows = []
    for s in t["scaling"].get("speedups") or []:
        rows.append([s["level"], fmt_ratio(s["speedup"]),
                     fmt_ratio_interval(s["lower"], s["upper"]), f"{s['ideal']:g}×",
                     f"{100 * s['efficiency']:.0f}% ({100 * s['efficiency_lower']:.0f}% to "
                     f"{100 * s['efficiency_upper']:.0f}%)"])
    if not rows:
        return {}
    return {"columns": [t["factor"], "speed-up", "interval", "ideal", "efficiency"],
            "rows": rows}


def _ok(x) -> bool:
    return x is not None and isinstance(x, (int, float)) and math.isfinite(x)


def trend_figure(data, trend: dict):
    """Log-log figure of one trend (a `report.drawing.Figure`), or None without points."""
    import numpy as np

    from benchharness.report.drawing import new_figure, render_figure
    from benchharness.report.units import display_scale

    pts = [p for p in trend.get("points") or [] if _ok(p.get("mean")) and p["mean"] > 0]
    if len(pts) < 2 or not trend.get("log_log"):
        return None
    value = dict(zip(trend["levels"], trend["values"]))
    mult, unit = display_scale(data.response, float(np.median([p["mean"] for p in pts])))
    fig = new_figure(6.4, 4.2)
    ax = fig.subplots()
    groups = _draw_lines(ax, trend, pts, value, mult)
    _log_axes(ax, data, trend, value, unit)
    if len(groups) > 1:
        ax.legend(fontsize=8.5, loc="best")
    ax.set_title(_trend_title(data, trend), fontsize=10)
    return render_figure(fig, section_id(trend), f"Trend over {trend['factor']}",
                         _trend_caption(data, trend), section_id(trend))


def _draw_lines(ax, trend: dict, pts: list[dict], value: dict, mult: float) -> list:
    """One line of geometric means with interval bars per level of ``line_by`` (its fitted
    law dashed beside it); returns the levels drawn, in order."""
    import numpy as np

    from benchharness.report.drawing import PALETTE

    groups = list(dict.fromkeys(p["by"] for p in pts))
    for k, g in enumerate(groups):
        mine = sorted((p for p in pts if p["by"] == g), key=lambda p: value[p["level"]])
        xs = np.array([value[p["level"]] for p in mine])
        ms = np.array([p["mean"] for p in mine]) * mult
        lo = np.array([p["lower"] if _ok(p.get("lower")) else p["mean"] for p in mine]) * mult
        hi = np.array([p["upper"] if _ok(p.get("upper")) else p["mean"] for p in mine]) * mult
        label = f"{trend['line_by']}={g}" if g is not None else "all runs"
        ax.errorbar(xs, ms, yerr=np.vstack([ms - lo, hi - ms]), color=PALETTE[k % 8],
                    marker="o", ms=5, lw=1.6, capsize=3, label=label)
        _fitted_line(ax, trend, xs, ms)
    return groups


def _log_axes(ax, data, trend: dict, value: dict, unit) -> None:
    """Log-log axes: the factor's levels as the x ticks, decades on y, both labelled."""
    from matplotlib.ticker import NullLocator

    from benchharness.report.drawing import log_ticks
    from benchharness.report.units import axis_label

    ax.set_xscale("log")
    ax.set_yscale("log")
    xs_all = sorted(value.values())
    ax.set_xticks(xs_all)
    ax.set_xticklabels([f"{v:g}" for v in xs_all])
    ax.xaxis.set_minor_locator(NullLocator())
    lo_y, hi_y = ax.get_ylim()
    log_ticks(ax.yaxis, lo_y, hi_y)
    ax.set_xlabel(f"{trend['factor']} (log axis)")
    ax.set_ylabel("geometric mean " + axis_label(data.response, unit) + " — log axis")


def _trend_title(data, trend: dict) -> str:
    """The figure's title with the exponent: the range of slopes when it differs with the
    lines' factor, else the common slope."""
    slope = trend.get("slope") or {}
    title = f"{data.response} against {trend['factor']}"
    per = [b for b in trend.get("by") or [] if b.get("factor") == trend.get("line_by")]
    if trend.get("line_by_reason") == "exponent differs" and per:
        ests = [s["estimate"] for s in per[0]["slopes"] if _ok(s.get("estimate"))]
        title += (f": slopes {min(ests):.2f} to {max(ests):.2f} by {trend['line_by']}"
                  if ests else "")
    elif _ok(slope.get("estimate")):
        title += f": slope {slope['estimate']:.2f}"
    return title


def _trend_caption(data, trend: dict) -> str:
    """The figure's caption: what is drawn, why the lines are split as they are, and what
    the dashed line is."""
    return (f"Geometric mean of {data.response} at each {trend['factor']} with its "
            f"{_conf(data)} interval, on log-log axes"
            + (f", one line per level of {trend['line_by']} ("
               + ("the factor the exponent differs with"
                  if trend.get("line_by_reason") == "exponent differs" else
                  "the factor with the largest effect besides it") + ")"
               if trend.get("line_by") else "")
            + ". A straight line is a power law; its slope is the exponent. Dashed: "
            + ("Amdahl's law with the fitted serial fraction, through each line's points."
               if (trend.get("scaling") or {}).get("serial_fraction") else
               "the fitted common slope through each line's points."))


def _fitted_line(ax, trend: dict, xs, ms) -> None:
    """The fitted law through the geometric centre of one line's points: Amdahl's curve
    with the common serial fraction for a parallel factor, else the common power law."""
    import numpy as np

    from benchharness.analysis.scaling import amdahl_shape

    lx, ly = np.log(xs), np.log(ms)
    grid = np.linspace(lx.min(), lx.max(), 40)
    s = ((trend.get("scaling") or {}).get("serial_fraction") or {}).get("estimate")
    sign = -1.0 if (trend.get("scaling") or {}).get("better") == "higher" else 1.0
    if _ok(s):
        fit = ((ly - sign * amdahl_shape(s, np.exp(lx))).mean()
               + sign * amdahl_shape(s, np.exp(grid)))
    else:
        b = (trend.get("slope") or {}).get("estimate")
        if not _ok(b) or len(xs) < 2:
            return
        fit = ly.mean() + b * (grid - lx.mean())
    ax.plot(np.exp(grid), np.exp(fit), color="#8a8a8a", lw=1, ls="--", zorder=1)


def _conf(data) -> str:
    return f"{round((1 - data.alpha) * 100):g}%"


def figure_jobs(data) -> list:
    """One drawing job per trend for the report's figure list."""
    return [lambda t=t: (trend_figure(data, t), None)
            for t in (data.analysis.get("trends") or []) if not t.get("skipped")]
