"""The trade-off figure of a choice: two responses, one point per setting, the front joined.

Drawn from the "Choosing a default" section's ``choice`` dict alone (never
re-fitting): x is the chosen response, y the first ``also`` response; each
setting is a point with its own interval on both axes (the ``half_width`` of
``responses``, at the choice's confidence, back-transformed to the response's
unit); settings on the trade-off front are filled and joined in order of x,
the others hollow and muted; the recommended setting is ringed. Log axes when
a response was analysed on the log scale, so equal distances are equal ratios.
"""

from __future__ import annotations

import math

__all__ = ["tradeoff_figure"]


def _label(setting: dict) -> str:
    return ", ".join(f"{k}={v}" for k, v in setting.items()) or "(all runs)"


def _bounds(info: dict, i: int) -> tuple[float, float, float]:
    """(mean, low, high) of setting i in the response's unit."""
    m = float(info["means"][i])
    hw = float((info.get("half_width") or [0.0] * (i + 1))[i])
    if info.get("scale") == "log":
        return m, m * math.exp(-hw), m * math.exp(hw)
    return m, m - hw, m + hw


def tradeoff_figure(section: dict, section_id: str = "choose"):
    """A `benchharness.report.figures.Figure`, or None when the choice has no ``also``."""
    import numpy as np

    from benchharness.report.drawing import (ACCENT, INK, MUTED, PALETTE, log_ticks,
                                             new_figure, render_figure)
    from benchharness.report.units import axis_label, display_scale, unit_of

    d = section.get("choice") or {}
    also = d.get("also") or []
    resp = d.get("response")
    responses = d.get("responses") or {}
    if not also or resp not in responses or also[0] not in responses:
        return None
    other = also[0]
    rx, ry = responses[resp], responses[other]
    cands = d.get("candidates") or []
    n = len(cands)
    if n == 0 or len(rx.get("means") or []) != n or len(ry.get("means") or []) != n:
        return None
    xs = [_bounds(rx, i) for i in range(n)]
    ys = [_bounds(ry, i) for i in range(n)]
    mx, ux = display_scale(resp, float(np.median([x[0] for x in xs])))
    my, uy = display_scale(other, float(np.median([y[0] for y in ys])))
    xs = [tuple(v * mx for v in x) for x in xs]
    ys = [tuple(v * my for v in y) for y in ys]
    on = [bool(c.get("on_front")) for c in cands]
    fig = new_figure(7.2, 4.6)
    ax = fig.subplots()
    ax.margins(x=0.14, y=0.1)  # room for the labels at the edges
    for i, c in enumerate(cands):
        x, xl, xh = xs[i]
        y, yl, yh = ys[i]
        color = PALETTE[0] if on[i] else MUTED
        ax.errorbar([x], [y], xerr=[[x - xl], [xh - x]], yerr=[[y - yl], [yh - y]],
                    fmt="o", ms=6, color=color, mfc=color if on[i] else "white",
                    mec=color, lw=1.1, capsize=2.5, zorder=3)
        if c.get("recommended"):
            ax.plot([x], [y], "o", ms=13, mfc="none", mec=ACCENT, mew=1.8, zorder=4)
        ax.annotate(_label(c["setting"]), (x, y), xytext=(5, 4), textcoords="offset points",
                    fontsize=7.5, color=INK if on[i] else MUTED, zorder=5)
    front = sorted((xs[i][0], ys[i][0]) for i in range(n) if on[i])
    if len(front) > 1:
        ax.plot([p[0] for p in front], [p[1] for p in front], "-", color=PALETTE[0], lw=1.4,
                alpha=0.7, zorder=2, label="trade-off front")
        ax.legend(fontsize=8, loc="best")
    for axis, info, vals in ((ax.xaxis, rx, xs), (ax.yaxis, ry, ys)):
        if info.get("scale") == "log" and min(v[1] for v in vals) > 0:
            lo = min(v[1] for v in vals)
            hi = max(v[2] for v in vals)
            (ax.set_xscale if axis is ax.xaxis else ax.set_yscale)("log")
            log_ticks(axis, lo, hi)
    ax.set_xlabel(axis_label(resp, ux or unit_of(resp)) + f" ({rx.get('better', 'lower')} is "
                  "better)")
    ax.set_ylabel(axis_label(other, uy or unit_of(other)) + f" ({ry.get('better', 'lower')} is "
                  "better)")
    conf = f"{float(d.get('confidence', 0.95)) * 100:g}%"
    within = d.get("within")
    n_front = sum(on)
    ax.set_title(f"Trading {resp} against {other}: {n_front} of {n} settings on the front")
    cap = (f"One point per setting: its {'geometric ' if rx.get('scale') == 'log' else ''}mean "
           f"{resp} across and its {other} up, each with its own {conf} interval. Filled points "
           f"joined by the line are on the trade-off front; a hollow point is beaten: another "
           f"setting is better on at least one response"
           + (f" by more than {within * 100:g}%" if within else "")
           + " and not worse on any" + (f" beyond {within * 100:g}%" if within else "")
           + f" ({conf} confidence, all pairs at once). The ringed point is the recommendation.")
    if len(also) > 1:
        cap += (f" The front was decided on {', '.join([resp] + list(also))}; only the first "
                "two are drawn.")
    return render_figure(fig, "choose-tradeoff", f"Trade-off between {resp} and {other}", cap,
                   section_id)
