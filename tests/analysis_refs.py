"""Helpers for the analysis tests: reference fits with statsmodels on safely renamed columns."""

from __future__ import annotations

import numpy as np
import pandas as pd

# Montgomery, Design and Analysis of Experiments, battery-life experiment (Example 5.1):
# material type 1-3 x temperature 15/70/125 F, n = 4. Observations typed from memory.
BATTERY = {  # from memory
    ("1", "15"): [130, 155, 74, 180], ("1", "70"): [34, 40, 80, 75],
    ("1", "125"): [20, 70, 82, 58],
    ("2", "15"): [150, 188, 159, 126], ("2", "70"): [136, 122, 106, 115],
    ("2", "125"): [25, 70, 58, 45],
    ("3", "15"): [138, 110, 168, 160], ("3", "70"): [174, 120, 150, 139],
    ("3", "125"): [96, 104, 82, 60],
}
# Published sums of squares of that example (DESIGN.md), from memory.
BATTERY_SS = {"material": 10683.72, "temperature": 39118.72, "material:temperature": 9613.78,
              "Residual": 18230.75}


def battery_frame() -> pd.DataFrame:
    rows = []
    for (m, t), ys in BATTERY.items():
        for y in ys:
            rows.append({"material": m, "temperature": t, "life_h": float(y)})
    return pd.DataFrame(rows)


def sm_anova(df, response, factors, typ=2, sum_coding=False, order=None, block=None,
             transform=None):
    """statsmodels ols + anova_lm on renamed columns f0, f1, ...; rows keyed by our term names."""
    import statsmodels.api as sm
    import statsmodels.formula.api as smf

    d = pd.DataFrame({f"f{i}": df[f].astype(str).to_numpy() for i, f in enumerate(factors)})
    y = df[response].to_numpy(dtype=float)
    d["y"] = transform(y) if transform else y
    enc = (lambda i: f"C(f{i}, Sum)") if sum_coding else (lambda i: f"C(f{i})")
    k = len(factors)
    if order is None or order >= k:
        rhs = "*".join(enc(i) for i in range(k))
    elif order == 1:
        rhs = "+".join(enc(i) for i in range(k))
    else:
        rhs = "(" + "+".join(enc(i) for i in range(k)) + f")**{order}"
    if block is not None:
        d["blk"] = df[block].astype(str).to_numpy()
        rhs = ("C(blk, Sum)" if sum_coding else "C(blk)") + " + " + rhs
    model = smf.ols("y ~ " + rhs, d).fit()
    tab = sm.stats.anova_lm(model, typ=typ)
    out = {}
    for idx, row in tab.iterrows():
        if idx == "Intercept":
            continue
        if idx == "Residual":
            name = "Residual"
        else:
            parts = []
            for p in idx.split(":"):
                if p.startswith("C(blk"):
                    parts.append(block)
                else:
                    parts.append(factors[int(p[3:].split(",")[0].rstrip(")"))])
            name = ":".join(parts)
        out[name] = {"df": float(row["df"]), "sum_sq": float(row["sum_sq"]),
                     "F": None if np.isnan(row["F"]) else float(row["F"]),
                     "p": None if np.isnan(row["PR(>F)"]) else float(row["PR(>F)"])}
    return out, model


def ours_table(an):
    return {r["term"]: r for r in an.anova_rows}


def assert_same_anova(an, ref, rtol=1e-9):
    mine = ours_table(an)
    assert set(mine) == set(ref), (sorted(mine), sorted(ref))
    for term, r in ref.items():
        m = mine[term]
        assert m["df"] == r["df"], (term, m["df"], r["df"])
        np.testing.assert_allclose(m["sum_sq"], r["sum_sq"], rtol=rtol, err_msg=term)
        if r["F"] is not None:
            np.testing.assert_allclose(m["F"], r["F"], rtol=1e-7, err_msg=term)
            np.testing.assert_allclose(m["p"], r["p"], rtol=1e-6, atol=1e-300, err_msg=term)
