"""Speed and memory of the analysis stage against statsmodels (invented data).

Scenario (invented): a log-archiving service times compression jobs over four
settings — codec (3), level (3), block size (4) and worker count (5), a 3×3×4×5
full factorial — with lognormal noise. The same table is analysed by
``benchharness.analysis.analyze`` (everything: Box-Cox choice, model, diagnostics,
effects, comparisons) and by statsmodels formula ``ols`` + ``anova_lm(typ=2)``.

Usage: python experiments/bench/analysis_speed.py [--rows 400000] [--skip-statsmodels]
       [--big 1000000]
Prints timings (warm calls, imports and data generation excluded), the largest
relative difference of the sums of squares, and the extra peak memory.
"""

from __future__ import annotations

import argparse
import sys
import time
import tracemalloc
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402

FACTORS = {"codec": ["zlib", "bz2", "lzma"], "level": ["1", "6", "9"],
           "chunk": ["16k", "64k", "256k", "1m"], "workers": ["1", "2", "4", "8", "16"]}


def make_data(rows: int, seed: int = 1) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    sizes = [len(v) for v in FACTORS.values()]
    codes = [rng.integers(0, k, rows) for k in sizes]
    logy = np.log(0.2) + 0.0
    eff = [rng.normal(0, 0.3, k) for k in sizes]
    inter = rng.normal(0, 0.05, (sizes[0], sizes[1]))
    logy = logy + sum(e[c] for e, c in zip(eff, codes)) + inter[codes[0], codes[1]]
    y = np.exp(logy + rng.normal(0, 0.1, rows))
    df = pd.DataFrame({name: np.array(levels, dtype=object)[c]
                       for (name, levels), c in zip(FACTORS.items(), codes)})
    df["run"] = np.arange(rows)
    df["position"] = np.arange(rows)
    df["status"] = "ok"
    df["wall_s"] = y
    return df


def ours(df):
    from benchharness.analysis import analyze

    return analyze(df, response="wall_s", factors=list(FACTORS), block=False,
                   transform="log", ss_type=2)


def ours_auto(df):
    from benchharness.analysis import analyze

    return analyze(df, response="wall_s", factors=list(FACTORS), block=False)


def theirs(df):
    import statsmodels.api as sm
    import statsmodels.formula.api as smf

    d = pd.DataFrame({f"f{i}": df[f] for i, f in enumerate(FACTORS)})
    d["y"] = np.log(df["wall_s"].to_numpy())
    m = smf.ols("y ~ C(f0) * C(f1) * C(f2) * C(f3)", d).fit()
    return sm.stats.anova_lm(m, typ=2)


def timed(fn, *a, repeat=3):
    best = float("inf")
    out = None
    for _ in range(repeat):
        t = time.perf_counter()
        out = fn(*a)
        best = min(best, time.perf_counter() - t)
    return best, out


def peak_mb(fn, *a):
    tracemalloc.start()
    fn(*a)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    return peak / 2**20


def main(argv=None):
    ap = argparse.ArgumentParser()
    ap.add_argument("--rows", type=int, default=400_000)
    ap.add_argument("--big", type=int, default=1_000_000)
    ap.add_argument("--skip-statsmodels", action="store_true")
    args = ap.parse_args(argv)
    import scipy.stats  # noqa: F401  (imports excluded from timings)
    import statsmodels.formula.api  # noqa: F401

    df = make_data(args.rows)
    ours(df)  # warm
    t_ours, an = timed(ours, df)
    t_auto, an_auto = timed(ours_auto, df)
    print(f"rows={args.rows}: benchharness analyze (log scale, all diagnostics) {t_ours:.3f} s; "
          f"with transform=auto (Box-Cox profile) {t_auto:.3f} s "
          f"[chosen: {an_auto.transform['name']}]")
    mem = peak_mb(ours_auto, df)
    print(f"rows={args.rows}: extra peak memory (tracemalloc, transform=auto) {mem:.0f} MB")
    if not args.skip_statsmodels:
        t_sm, tab = timed(theirs, df, repeat=1)
        ssm = dict(zip(tab.index, tab["sum_sq"]))
        names = list(FACTORS)
        worst = 0.0
        for row in an.anova_rows:
            if row["term"] == "Residual":
                key = "Residual"
            else:
                key = ":".join(f"C(f{names.index(p)})" for p in row["term"].split(":"))
            rel = abs(row["sum_sq"] - ssm[key]) / abs(ssm[key])
            worst = max(worst, rel)
        print(f"rows={args.rows}: statsmodels ols + anova_lm(typ=2) {t_sm:.2f} s; "
              f"speed-up {t_sm / t_ours:.0f}x (log), {t_sm / t_auto:.0f}x (auto); "
              f"largest relative SS difference {worst:.2e}")
    if args.big:
        big = make_data(args.big, seed=2)
        ours_auto(big.iloc[:1000])
        t_big, an_big = timed(ours_auto, big)
        print(f"rows={args.big}: benchharness analyze, transform=auto {t_big:.3f} s")


if __name__ == "__main__":
    main()
