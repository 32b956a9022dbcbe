"""The reference of report_speed.py: a plain pandas + matplotlib script, no benchharness.

It draws what a careful analyst would write by hand for the same table: the runs
of every cell (box plot with the runs jittered over it, faceted by two factors),
the main effects as ratios of geometric means with 95% t intervals, one
interaction plot per pair of factors, and for the residuals of ln(response)
about the cell means a normal Q-Q plot, residuals against fitted values and
against run position, and the Box-Cox profile log-likelihood — the same figures,
sizes and point counts as the report, each saved as PNG and SVG, plus a short
Markdown page listing them. It imports nothing from this project and runs in
its own process.

Usage: python experiments/bench/report_reference.py RUNS.csv OUT_DIR --factors A,B,C,D [--once]
Prints one JSON line: {"wall_s": ..., "cpu_s": ..., "figures": N} for the drawing
and writing (imports and reading the CSV excluded; one untimed warm-up first, as
for the report).
"""

from __future__ import annotations

import argparse
import itertools
import json
import sys
import time
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
from scipy import stats  # noqa: E402

MAX_SCATTER = 20000


def save(fig, out: Path, name: str, names: list) -> None:
    fig.savefig(out / f"{name}.png", dpi=100)
    fig.savefig(out / f"{name}.svg")
    plt.close(fig)
    names.append(name)


def distributions(ok, factors, out, names, rng):
    f1, col_f, row_f = factors[0], factors[1], factors[2]
    inner = [f1] + factors[3:]
    combos = list(itertools.product(*[ok[f].cat.categories for f in inner]))
    cols, rows = list(ok[col_f].cat.categories), list(ok[row_f].cat.categories)
    groups = ok.groupby(factors, observed=True)["wall_s"]
    fig, axes = plt.subplots(len(rows), len(cols), figsize=(13, min(3.2 * len(rows) + 0.9, 30)),
                             sharey=True, squeeze=False, layout="constrained")
    colors = dict(zip(ok[f1].cat.categories, plt.rcParams["axes.prop_cycle"].by_key()["color"]))
    for (ri, rv), (ci, cv) in itertools.product(enumerate(rows), enumerate(cols)):
        ax = axes[ri][ci]
        data, pos, px, pc = [], [], [], []
        for xi, combo in enumerate(combos):
            key = dict(zip(inner, combo), **{col_f: cv, row_f: rv})
            try:
                vals = groups.get_group(tuple(key[f] for f in factors)).to_numpy()
            except KeyError:
                continue
            data.append(vals)
            pos.append(xi)
            px.append(xi + rng.uniform(-0.18, 0.18, len(vals)))
            pc += [colors[combo[0]]] * len(vals)
        ax.scatter(np.concatenate(px), np.concatenate(data), s=5, c=pc, alpha=0.6,
                   linewidths=0, rasterized=True)   # one point layer per panel
        ax.boxplot(data, positions=pos, widths=0.62, showfliers=False)
        ax.set_yscale("log")
        ax.set_xticks(range(len(combos)), [" · ".join(c[1:]) for c in combos], rotation=30,
                      ha="right", fontsize=8.5)
        ax.set_title(f"{col_f} = {cv} · {row_f} = {rv}", fontsize=9.5)
    fig.legend(handles=[plt.Rectangle((0, 0), 1, 1, color=c, alpha=0.6, label=str(k))
                        for k, c in colors.items()], title=f1, loc="outside upper center",
               ncols=len(colors))
    save(fig, out, "distributions", names)


def main_effects(ok, factors, out, names):
    labels, est, lo, hi = [], [], [], []
    logy = np.log(ok["wall_s"])
    for f in factors:
        levels = list(ok[f].cat.categories)
        ref = logy[ok[f] == levels[0]]
        for lv in levels[1:]:
            g = logy[ok[f] == lv]
            d = g.mean() - ref.mean()
            se = np.sqrt(g.var() / len(g) + ref.var() / len(ref))
            t = stats.t.ppf(0.975, len(g) + len(ref) - 2)
            labels.append(f"{f} = {lv}")
            est.append(np.exp(d))
            lo.append(np.exp(d - t * se))
            hi.append(np.exp(d + t * se))
    fig, ax = plt.subplots(figsize=(7.6, 0.42 * len(labels) + 1.4), layout="constrained")
    y = np.arange(len(labels))
    ax.errorbar(est, y, xerr=[np.subtract(est, lo), np.subtract(hi, est)], fmt="o")
    ax.axvline(1, color="grey")
    ax.set_xscale("log")
    ax.set_yticks(y, labels)
    ax.set_title("Main effects as ratios with 95% intervals")
    save(fig, out, "effects", names)


def interactions(ok, factors, out, names):
    ok = ok.assign(ly=np.log(ok["wall_s"]))
    for a, b in itertools.combinations(factors, 2):
        g = ok.groupby([a, b], observed=True)["ly"].agg(["mean", "std", "count"]).reset_index()
        half = stats.t.ppf(0.975, g["count"] - 1) * g["std"] / np.sqrt(g["count"])
        fig, ax = plt.subplots(figsize=(6.4, 4.2), layout="constrained")
        for lv, part in g.assign(half=half).groupby(b, observed=True):
            x = part[a].cat.codes
            ax.errorbar(x, np.exp(part["mean"]), yerr=[np.exp(part["mean"]) - np.exp(
                part["mean"] - part["half"]), np.exp(part["mean"] + part["half"])
                - np.exp(part["mean"])], marker="o", capsize=3, label=str(lv))
        ax.set_xticks(range(len(ok[a].cat.categories)), ok[a].cat.categories)
        ax.set_yscale("log")
        ax.set_xlabel(a)
        ax.legend(title=b, fontsize=8)
        ax.set_title(f"{a} × {b}: means with 95% intervals")
        save(fig, out, f"interaction-{a}-{b}", names)


def residual_figures(ok, factors, out, names, rng):
    ly = np.log(ok["wall_s"])
    fitted = ly.groupby([ok[f] for f in factors], observed=True).transform("mean")
    resid = (ly - fitted).to_numpy()
    fitted = fitted.to_numpy()
    n = len(resid)
    r = np.sort(resid)
    q = stats.norm.ppf((np.arange(1, n + 1) - 0.375) / (n + 0.25))
    fig, ax = plt.subplots(figsize=(4.8, 4.0), layout="constrained")
    ax.scatter(q, r, s=9, alpha=0.6, linewidths=0, rasterized=True)
    ax.plot(q[[0, -1]], np.polyfit(q, r, 1)[0] * q[[0, -1]], color="C3")
    ax.set_title("Normal Q-Q plot of residuals")
    save(fig, out, "qq", names)
    idx = np.sort(rng.choice(n, size=min(n, MAX_SCATTER), replace=False))
    fig, ax = plt.subplots(figsize=(7.2, 3.8), layout="constrained")
    for lv in ok[factors[0]].cat.categories:
        m = (ok[factors[0]] == lv).to_numpy()[idx]
        ax.scatter(fitted[idx][m], resid[idx][m], s=9, alpha=0.55, linewidths=0,
                   rasterized=True, label=str(lv))
    ax.axhline(0, color="k")
    ax.legend(title=factors[0], loc="center left", bbox_to_anchor=(1.01, 0.5))
    ax.set_title("Residuals against fitted values")
    save(fig, out, "residuals-fitted", names)
    pos = ok["position"].to_numpy(float)
    fig, ax = plt.subplots(figsize=(8.6, 3.4), layout="constrained")
    ax.scatter(pos[idx], resid[idx], s=8, alpha=0.5, linewidths=0, rasterized=True)
    order = np.argsort(pos)
    bins = np.array_split(order, 40)
    ax.plot([pos[b].mean() for b in bins], [resid[b].mean() for b in bins], color="C1")
    slope, inter = np.polyfit(pos, resid, 1)
    ax.plot(pos[[0, -1]], inter + slope * pos[[0, -1]], ls="--")
    ax.set_title("Residuals in run order")
    save(fig, out, "residuals-position", names)


def boxcox(ok, out, names):
    y = ok["wall_s"].to_numpy(float)
    grid = np.linspace(-2, 2, 81)
    ll = [stats.boxcox_llf(lam, y) for lam in grid]
    fig, ax = plt.subplots(figsize=(7.6, 3.6), layout="constrained")
    ax.plot(grid, ll)
    ax.axhline(max(ll) - 0.5 * stats.chi2.ppf(0.95, 1), ls=":")
    ax.set_title("Box-Cox profile likelihood")
    save(fig, out, "boxcox", names)


def draw(df, factors, out: Path) -> int:
    rng = np.random.default_rng(0)
    ok = df[df["status"] == "ok"]
    names: list = []
    distributions(ok, factors, out, names, rng)
    main_effects(ok, factors, out, names)
    interactions(ok, factors, out, names)
    residual_figures(ok, factors, out, names, rng)
    boxcox(ok, out, names)
    (out / "report.md").write_text("\n".join(f"![{n}]({n}.png)" for n in names) + "\n")
    return len(names)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("csv", type=Path)
    ap.add_argument("out", type=Path)
    ap.add_argument("--factors", required=True)
    ap.add_argument("--once", action="store_true",
                    help="draw once, without the untimed warm-up (startup.py times the "
                         "whole process: the floor of `benchharness report`)")
    args = ap.parse_args(argv)
    factors = args.factors.split(",")
    df = pd.read_csv(args.csv, dtype={f: str for f in factors})
    for f in factors:   # levels in order of first appearance in the table
        df[f] = pd.Categorical(df[f], categories=list(dict.fromkeys(df[f])))
    args.out.mkdir(parents=True, exist_ok=True)
    if not args.once:
        draw(df, factors, args.out)   # warm-up: font cache, first-use costs
    c0, t0 = time.process_time(), time.perf_counter()
    n = draw(df, factors, args.out)
    print(json.dumps({"wall_s": time.perf_counter() - t0, "cpu_s": time.process_time() - c0,
                      "figures": n}))
    return 0


if __name__ == "__main__":
    sys.exit(main())
