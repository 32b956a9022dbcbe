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
    from benchharness.report.drawing import new_figure, render_figure
    from benchharness.report.units import axis_label, unit_of

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
    xs, ux = _points(rx, resp, n)
    ys, uy = _points(ry, other, n)
    on = [bool(c.get("on_front")) for c in cands]
    fig = new_figure(7.2, 4.6)
    ax = fig.subplots()
    ax.margins(x=0.14, y=0.1)  # room for the labels at the edges
    _draw_settings(ax, cands, xs, ys, on)
    for axis, info, vals in ((ax.xaxis, rx, xs), (ax.yaxis, ry, ys)):
        _log_axis(ax, axis, info, vals)
    ax.set_xlabel(axis_label(resp, ux or unit_of(resp)) + f" ({rx.get('better', 'lower')} is "
                  "better)")
    ax.set_ylabel(axis_label(other, uy or unit_of(other)) + f" ({ry.get('better', 'lower')} is "
                  "better)")
    n_front = sum(on)
    ax.set_title(f"Trading {resp} against {other}: {n_front} of {n} settings on the front")
    return render_figure(fig, "choose-tradeoff", f"Trade-off between {resp} and {other}",
                         _caption(d, resp, other, rx, also), section_id)


def _points(info: dict, name: str, n: int) -> tuple[list[tuple[float, float, float]], str]:
    """(mean, low, high) of each setting in the display unit of response ``name``, and
    that unit."""
    import numpy as np

    from benchharness.report.units import display_scale

    vals = [_bounds(info, i) for i in range(n)]
    mult, unit = display_scale(name, float(np.median([v[0] for v in vals])))
    return [tuple(v * mult for v in val) for val in vals], unit


def _draw_settings(ax, cands: list[dict], xs, ys, on: list[bool]) -> None:
    """One point per setting with its intervals on both axes: filled on the front, hollow and
    muted off it, the recommendation ringed; the front joined in order of x."""
    from benchharness.report.drawing import ACCENT, INK, MUTED, PALETTE

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
    front = sorted((xs[i][0], ys[i][0]) for i in range(len(cands)) if on[i])
    if len(front) > 1:
        ax.plot([p[0] for p in front], [p[1] for p in front], "-", color=PALETTE[0], lw=1.4,
                alpha=0.7, zorder=2, label="trade-off front")
        ax.legend(fontsize=8, loc="best")


def _log_axis(ax, axis, info: dict, vals) -> None:
    """A log axis, ticked over the intervals' range, for a response analysed on the log
    scale whose lower bounds are all positive."""
    from benchharness.report.drawing import log_ticks

    if info.get("scale") == "log" and min(v[1] for v in vals) > 0:
        lo = min(v[1] for v in vals)
        hi = max(v[2] for v in vals)
        (ax.set_xscale if axis is ax.xaxis else ax.set_yscale)("log")
        log_ticks(axis, lo, hi)


def _caption(d: dict, resp: str, other: str, rx: dict, also: list) -> str:
    """What the figure shows: points, intervals, the front and its margin, the ring."""
    conf = f"{float(d.get('confidence', 0.95)) * 100:g}%"
    within = d.get("within")
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
    return cap
