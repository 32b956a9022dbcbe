"""The report's section on a response surface: the fitted second-order surface in words,
its coefficients and curvatures, and a contour figure.

Rendered from ``analysis["surface"]`` (`benchharness.analysis.surface`), never
re-fitted: the figure evaluates the stored quadratic (coefficients and their
covariance) on a grid. Two settings give one panel; three or four give one
panel per pair, the other settings held at the proposal (or the centre). Each
panel shows the predicted response inside the explored region, the tested
points, the region's edge, the stationary point with its joint confidence
region (Box & Hunter 1954: where the fitted gradient is consistent with zero)
and the proposed setting.
"""

from __future__ import annotations

import itertools
import math

from benchharness.report.data import ReportData, finite
from benchharness.report.units import fmt_num, fmt_p

COLUMNS = ("term", "coefficient", "standard error", "p")


def _quadratic(sf: dict):
    from benchharness.analysis.surface import Quadratic

    beta = [t["coef"] for t in sf["terms"]]
    return Quadratic(beta, sf["covariance"], len(sf["settings"]), sf["df_resid"])


def _settings(sf: dict):
    from benchharness.design.surface import Setting

    return [Setting(c["name"], c["low"], c["high"], log=c["scale"] == "log",
                    whole=c["whole_numbers"]) for c in sf["coding"]]


def section(data: ReportData) -> dict | None:
    """``summary`` (the findings), ``columns``/``rows`` (the coefficients on the coded
    settings), ``canonical`` (curvature along each principal direction) and ``notes``."""
    sf = data.analysis.get("surface")
    if not sf or not sf.get("fitted"):
        return None
    scale = "ln " if sf.get("scale") == "log" else ""
    rows = [[t["term"], fmt_num(t["coef"], 4), fmt_num(t["se"], 3), fmt_p(t["p"])]
            for t in sf["terms"]]
    canonical = []
    for c in sf.get("canonical") or []:
        direction = ", ".join(f"{n} {v:+.2f}" for n, v in c["direction"].items())
        sign = ("curves up" if c["ci_low"] > 0 else "curves down" if c["ci_high"] < 0
                else "not distinguishable from flat")
        canonical.append(f"Along ({direction}): curvature {fmt_num(c['eigenvalue'], 3)} "
                         f"[{fmt_num(c['ci_low'], 3)} to {fmt_num(c['ci_high'], 3)}], {sign}.")
    from benchharness.analysis.surface import p_words
    from benchharness.design.surface import number_label

    coding = []
    for c in sf["coding"]:
        how = "in its logarithm" if c["scale"] == "log" else "linearly"
        whole = bool(c.get("whole_numbers"))
        coding.append(f"{c['name']}: {number_label(c['low'], whole)} is -1 and "
                      f"{number_label(c['high'], whole)} is +1, coded {how}")
    lof = sf["lack_of_fit"]
    notes = [
        f"The fit: {scale}{sf['response']} = a full quadratic in the coded settings ("
        + "; ".join(coding) + f"), least squares on {sf['df_resid'] + len(sf['terms'])} runs; "
        f"R² = {fmt_num(sf.get('r_squared'), 3)}, residual SD {fmt_num(sf['residual_sd'], 3)} "
        f"on {sf['df_resid']} degrees of freedom; the surface against a flat one: "
        f"{p_words(sf['model_p'])}.",
        f"Lack of fit: {lof['df_lack_of_fit']} degrees of freedom against "
        f"{lof['df_pure_error']} of pure error from {lof['points']} distinct settings"
        + (f", F = {fmt_num(lof['F'], 3)}, {p_words(lof['p'])}." if finite(lof.get("F"))
           else ", not tested."),
        "Stationary point: where the fitted gradient is zero; its kind (minimum, maximum or "
        "saddle) from the signs of the curvatures along the principal directions (canonical "
        "analysis); intervals by the delta method; the joint confidence region of Box & "
        "Hunter (1954) is drawn in the figure.",
    ]
    return {"summary": [f["statement"] + "." for f in sf.get("findings") or []],
            "columns": list(COLUMNS), "rows": rows, "canonical": canonical, "notes": notes}


def surface_figure(data: ReportData):
    """The contour figure of the fitted surface (None without a fitted surface)."""
    sf = data.analysis.get("surface")
    if not sf or not sf.get("fitted"):
        return None
    from benchharness.report.drawing import new_figure, render_figure

    settings = _settings(sf)
    k = len(settings)
    pairs = list(itertools.combinations(range(k), 2))
    cols = min(3, len(pairs))
    nrows = math.ceil(len(pairs) / cols)
    fig = new_figure(5.6 * cols if cols > 1 else 6.6, 4.8 * nrows)
    axes = fig.subplots(nrows, cols, squeeze=False).ravel()
    fixed = _held(sf, k)
    for ax, (i, j) in zip(axes, pairs):
        _panel(fig, ax, sf, settings, i, j, fixed)
    for ax in axes[len(pairs):]:
        ax.set_visible(False)
    title = "Fitted response surface"
    held = ""
    if k > 2:
        held = (" Settings not on a panel's axes are held at the proposal (or the centre), "
                "so each panel is a slice of the surface and of the confidence region ("
                + ", ".join(f"{s.name}={fmt_num(s.exact(fixed[n]), 4)}"
                            for n, s in enumerate(settings)) + ").")
    cap = (f"Predicted {sf['response']} from the second-order fit, inside the explored region "
           "only (darker is better). Dots: tested settings. Cross: the stationary point, "
           "with the dashed line around it its joint confidence region (Box & Hunter 1954; "
           "not drawn when the settings make no detectable difference). "
           "Star: the proposed setting." + held)
    return render_figure(fig, "surface", title, cap, "surface",
                         highlight=bool((sf.get("proposal") or {}).get("supported")))


def _held(sf: dict, k: int) -> list[float]:
    pr = sf.get("proposal") or {}
    if pr.get("supported"):
        return list(pr["coded"])
    return [0.0] * k


def _panel(fig, ax, sf: dict, settings, i: int, j: int, fixed) -> None:
    import numpy as np

    from benchharness.analysis.surface import inside
    from benchharness.analysis.transform import Choice, inverse
    from benchharness.report.drawing import ACCENT, INK

    q = _quadratic(sf)
    region = sf["region"]
    reach = region["reach"]
    n = 101
    g = np.linspace(-reach, reach, n)
    gi, gj = np.meshgrid(g, g)
    pts = np.tile(np.asarray(fixed, dtype=float), (n * n, 1))
    pts[:, i], pts[:, j] = gi.ravel(), gj.ravel()
    zhat, _se = q.predict(pts)
    scale = sf.get("scale", "log")
    yhat = inverse(zhat, Choice(scale, 0.0 if scale == "log" else 1.0, ""))
    # drawn a little past the edge, then clipped to it (a smooth edge, not grid steps)
    wider = {"reach": region["reach"] * 1.04, "radius": region["radius"] * 1.04}
    mask = np.array([not inside(p, wider) for p in pts])
    yhat = np.where(mask, np.nan, yhat).reshape(n, n)
    si, sj = settings[i], settings[j]
    ax_i = np.vectorize(si.exact)(gi)
    ax_j = np.vectorize(sj.exact)(gj)
    better_low = sf.get("better", "lower") == "lower"
    cmap = "viridis" if better_low else "viridis_r"
    cs = ax.contourf(ax_i, ax_j, yhat, levels=14, cmap=cmap)
    lines = ax.contour(ax_i, ax_j, yhat, levels=cs.levels, colors="white", linewidths=0.4,
                       alpha=0.6)
    cb = fig.colorbar(cs, ax=ax, shrink=0.9)
    cb.set_label(sf["response"])
    edge = _edge(ax, region, si, sj, fixed, i, j)
    cs.set_clip_path(edge)
    lines.set_clip_path(edge)
    _tested(ax, sf, settings, i, j, INK)
    st = sf.get("stationary_point")
    if st and sf.get("model_p", 1.0) < sf.get("alpha", 0.05):   # a flat surface: noise
        crit = st["confidence_region"]["critical_F"]
        bh = q.box_hunter_many(pts).reshape(n, n)
        if np.isfinite(bh).any() and np.nanmin(bh) <= crit:
            ax.contour(ax_i, ax_j, bh, levels=[crit], colors=[ACCENT], linestyles="dashed",
                       linewidths=1.2)
        xs = st["coded"]
        if abs(xs[i]) <= reach * 1.05 and abs(xs[j]) <= reach * 1.05:
            ax.plot([si.exact(xs[i])], [sj.exact(xs[j])], marker="x", color=ACCENT, ms=9,
                    mew=2, ls="none")
    pr = sf.get("proposal") or {}
    if pr.get("supported"):
        ax.plot([si.exact(pr["coded"][i])], [sj.exact(pr["coded"][j])], marker="*",
                color="white", mec=INK, ms=16, ls="none")
    for setter, s in ((ax.set_xscale, si), (ax.set_yscale, sj)):
        if s.log:
            setter("log")
    _log_ticks(ax, si, sj, ax_i, ax_j)
    ax.set_xlabel(si.name + (" (log scale)" if si.log else ""))
    ax.set_ylabel(sj.name + (" (log scale)" if sj.log else ""))


def _log_ticks(ax, si, sj, ax_i, ax_j) -> None:
    """Readable ticks: plain numbers on log axes, at most five or so on linear ones."""
    from matplotlib.ticker import MaxNLocator

    from benchharness.report.drawing import log_ticks

    for s, axis, vals in ((si, ax.xaxis, ax_i), (sj, ax.yaxis, ax_j)):
        if s.log:
            log_ticks(axis, float(vals.min()), float(vals.max()))
        else:
            axis.set_major_locator(MaxNLocator(nbins=5, steps=[1, 2, 2.5, 5, 10]))


def _edge(ax, region, si, sj, fixed, i, j):
    """The explored region's edge in this panel's plane, drawn; returns it as a patch
    (invisible) to clip the contours with."""
    import numpy as np
    from matplotlib.patches import PathPatch
    from matplotlib.path import Path

    from benchharness.report.drawing import MUTED

    others = sum(v * v for n, v in enumerate(fixed) if n not in (i, j))
    r = math.sqrt(max(region["radius"] ** 2 - others, 0.0))
    t = np.linspace(0, 2 * math.pi, 361)
    ci = np.clip(r * np.cos(t), -region["reach"], region["reach"])
    cj = np.clip(r * np.sin(t), -region["reach"], region["reach"])
    xy = np.column_stack([[si.exact(v) for v in ci], [sj.exact(v) for v in cj]])
    ax.plot(xy[:, 0], xy[:, 1], color=MUTED, lw=1)
    patch = PathPatch(Path(xy), transform=ax.transData, facecolor="none", edgecolor="none")
    ax.add_patch(patch)
    return patch


def _tested(ax, sf: dict, settings, i: int, j: int, colour) -> None:
    """The distinct tested settings (values as run) of this panel's pair."""
    pts = {(round(p[i], 9), round(p[j], 9)) for p in sf.get("tested_points") or []}
    if not pts:
        return
    xi = [settings[i].exact(a) for a, _b in pts]
    xj = [settings[j].exact(b) for _a, b in pts]
    ax.plot(xi, xj, "o", color="white", mec=colour, ms=6, ls="none")
