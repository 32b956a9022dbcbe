"""Analysis details checked against outside references and planted truths.

Written to kill mutants that survived the rest of the suite (DEVELOPERS.md, "Mutation
testing"): the size of each comparison family, the number of sign runs a clustered
residual sequence is compared with, and the derivative of the inverse Box-Cox transform
used by delta-method intervals.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from benchharness.analysis import analyze


def _levels_frame(k, reps, seed, step=0.04):
    rng = np.random.default_rng(seed)
    lv = [f"L{i}" for i in range(k)]
    d = pd.DataFrame({"f": np.repeat(lv, reps)})
    d["wall_s"] = np.exp(step * np.repeat(np.arange(k), reps) + rng.normal(0, 0.03, k * reps))
    return d


def test_tukey_family_is_every_pair_of_levels():
    # Planted: five levels, a clear trend. Tukey HSD compares all k(k-1)/2 = 10 pairs as
    # one family (Tukey 1953); statsmodels' pairwise_tukeyhsd lists the same 10 pairs.
    from statsmodels.stats.multicomp import pairwise_tukeyhsd

    d = _levels_frame(5, 6, seed=3)
    an = analyze(d, factors=["f"], transform="log", comparisons=["tukey"], art=False)
    rows = [c for c in an.comparisons if c["method"] == "tukey" and c["factor"] == "f"]
    ref = pairwise_tukeyhsd(np.log(d["wall_s"]), d["f"])
    assert len(rows) == len(ref.reject) == 10
    assert {c["family_size"] for c in rows} == {10}
    assert {c["interval_level"] for c in rows} == {0.95}


@pytest.mark.parametrize("k", [3, 6])
def test_bonferroni_family_size_and_adjusted_p(k):
    # Pairwise comparisons with Bonferroni: m = k(k-1)/2 tests, p_adj = min(1, m p);
    # reference statsmodels.stats.multitest.multipletests(method="bonferroni").
    from statsmodels.stats.multitest import multipletests

    d = _levels_frame(k, 5, seed=11)
    an = analyze(d, factors=["f"], transform="log", comparisons=["pairwise"],
                 adjust="bonferroni", art=False)
    pw = [c for c in an.comparisons if c["method"] == "pairwise" and c["factor"] == "f"]
    m = k * (k - 1) // 2
    assert len(pw) == m and {c["family_size"] for c in pw} == {m}
    ref = multipletests([c["p"] for c in pw], method="bonferroni")[1]
    np.testing.assert_allclose([c["p_adj"] for c in pw], ref, rtol=1e-12)
    assert all(c["interval_level"] == pytest.approx(1 - 0.05 / m) for c in pw)


def test_clustered_signs_are_compared_with_the_expected_number_of_runs():
    # Planted: residuals in alternating stretches of 25 runs (no linear trend). The
    # verdict names the runs of signs seen and the number expected for independent
    # signs, 2 n1 n2 / n + 1 (Wald & Wolfowitz 1940; common practice).
    rng = np.random.default_rng(12)
    n = 200
    d = pd.DataFrame({"a": np.tile(["x", "y"], n // 2), "position": np.arange(n)})
    signs = np.array([1, -1, -1, 1, -1, 1, 1, -1])
    d["wall_s"] = np.exp(0.2 * (d.a == "y") + 0.05 * signs[np.arange(n) // 25]
                         + rng.normal(0, 0.01, n))
    an = analyze(d, factors=["a"], transform="log", comparisons=False, art=False)
    dr = an.diagnostics["drift"]
    r = np.asarray(an.residuals)
    nz = r[r != 0]
    n1 = int((nz > 0).sum())
    expected = 2.0 * n1 * (len(nz) - n1) / len(nz) + 1.0
    runs = 1 + int(np.count_nonzero(np.sign(nz[1:]) != np.sign(nz[:-1])))
    assert dr["runs_test"]["runs"] == runs
    assert f"({runs} runs of signs where about {expected:.0f} are expected" in dr["verdict"]
    assert runs < expected / 3


@pytest.mark.parametrize("lam", [0.5, -0.5, 2.0])
def test_derivative_of_the_inverse_box_cox(lam):
    # Reference: central differences of scipy.special.inv_boxcox. Outside the range the
    # inverse exists (1 + lam z <= 0) the derivative is not a number.
    from scipy.special import inv_boxcox

    from benchharness.analysis.transform import Choice, derivative_inverse

    ch = Choice("boxcox", lam, "planted")
    z = np.array([-0.5, 0.0, 0.3, 0.9]) / abs(lam)
    z = z[1.0 + lam * z > 0]
    h = 1e-6
    ref = (inv_boxcox(z + h, lam) - inv_boxcox(z - h, lam)) / (2 * h)
    np.testing.assert_allclose(derivative_inverse(z, ch), ref, rtol=1e-6)
    outside = np.array([(-1.0 - 0.5) / lam, (-1.0 - 1.5) / lam])   # 1 + lam z = -0.5, -1.5
    assert np.isnan(derivative_inverse(outside, ch)).all()
    np.testing.assert_allclose(derivative_inverse(np.array([0.2]), Choice("log", 0.0, "")),
                               np.exp([0.2]))
    np.testing.assert_allclose(derivative_inverse(np.array([0.2]), Choice("none", 1.0, "")),
                               [1.0])


def test_one_residual_degree_of_freedom_still_gets_its_f_test():
    # Planted: two levels, three runs (x twice, y once): one residual degree of freedom.
    # Reference: statsmodels anova_lm (type 2) on the same log response.
    import statsmodels.api as sm
    import statsmodels.formula.api as smf

    d = pd.DataFrame({"a": ["x", "x", "y"], "wall_s": [1.00, 1.04, 1.50]})
    an = analyze(d, factors=["a"], transform="log", comparisons=False, art=False)
    row = next(r for r in an.anova_rows if r["term"] == "a")
    d["ly"] = np.log(d["wall_s"])
    ref = sm.stats.anova_lm(smf.ols("ly ~ C(a)", data=d).fit(), typ=2)
    assert ref["df"].iloc[-1] == 1
    assert row["F"] == pytest.approx(ref["F"].iloc[0], rel=1e-9)
    assert row["p"] == pytest.approx(ref["PR(>F)"].iloc[0], rel=1e-9)


def test_ratio_interval_when_the_reference_mean_is_negative():
    # On the original scale a response may be negative (a difference, a balance). The
    # ratio of level means then gets the plain delta-method interval ratio +- q s with
    # s^2 = ratio^2 (var_a / a^2 + var_b / b^2) (independent level means; common
    # practice), var from statsmodels OLS cov_params, q the t quantile from scipy.
    import statsmodels.formula.api as smf
    from scipy import stats

    rng = np.random.default_rng(7)
    d = pd.DataFrame({"f": np.repeat(["r", "x"], 6)})
    d["delta"] = np.where(d.f == "r", -2.0, 1.0) + rng.normal(0, 0.1, 12)
    an = analyze(d, response="delta", factors=["f"], transform="none", comparisons=False,
                 art=False)
    e = next(x for x in an.effects if x["factor"] == "f" and x["level"] == "x")
    assert e["reference"] == "r"
    fit = smf.ols("delta ~ C(f, Treatment('r')) - 1", data=d.assign(f=d.f)).fit()
    ma, mb = d.delta[d.f == "x"].mean(), d.delta[d.f == "r"].mean()
    cov = fit.cov_params().to_numpy()
    va, vb = cov[1, 1], cov[0, 0]
    ratio = ma / mb
    s = abs(ratio) * np.sqrt(va / ma**2 + vb / mb**2)
    q = stats.t.ppf(0.975, fit.df_resid)
    assert ratio < 0 and e["ratio"] == pytest.approx(ratio, rel=1e-9)
    assert e["lower"] == pytest.approx(ratio - q * s, rel=1e-7)
    assert e["upper"] == pytest.approx(ratio + q * s, rel=1e-7)


def test_a_level_whose_count_is_always_zero_is_analysed_not_a_crash():
    # Planted: an error count that is 0 in every run of level x (the original scale, as a
    # count must be). Its mean is zero up to rounding; the ratio to the reference is ~0
    # with an interval that cannot bound it from above. It used to overflow (a traceback)
    # when rounding left the mean a hair above zero.
    rng = np.random.default_rng(3)
    d = pd.DataFrame({"f": np.repeat(["r", "x", "y"], 6)})
    d["errors"] = np.where(d.f == "r", 5.0, np.where(d.f == "x", 0.0, 2.0)) + np.where(
        d.f == "x", 0.0, rng.normal(0, 0.5, 18))
    an = analyze(d, response="errors", factors=["f"], transform="none", art=False)
    x = next(e for e in an.effects if e["factor"] == "f" and e["level"] == "x")
    assert abs(x["ratio"]) < 1e-9
    assert x["upper"] is None or x["upper"] > 0.1
    y = next(e for e in an.effects if e["factor"] == "f" and e["level"] == "y")
    assert 0.3 < y["ratio"] < 0.5 and y["lower"] < y["ratio"] < y["upper"]
    assert next(r for r in an.anova_rows if r["term"] == "f")["p"] < 1e-6
    assert "errors" in an.to_json()          # analysis.json can be written (no inf, no NaN)


def test_runs_of_other_statuses_are_counted_per_cell():
    # Planted: in cell x, 6 ok, 1 failed, 1 timeout and 2 runs with a status of their own
    # ("crashed"); cell y all 10 ok. Every run that is not ok counts against the cell.
    rng = np.random.default_rng(8)
    d = pd.DataFrame({"a": np.repeat(["x", "y"], 10), "wall_s": rng.lognormal(0, 0.1, 20),
                      "status": ["ok"] * 20})
    d.loc[[0], "status"] = "failed"
    d.loc[[1], "status"] = "timeout"
    d.loc[[2, 3], "status"] = "crashed"
    an = analyze(d, factors=["a"], transform="log", comparisons=False, art=False)
    cells = {c["levels"]["a"]: c for c in an.failures["cells"]}
    assert {k: cells["x"][k] for k in ("runs", "ok", "failed", "timeout", "other")} == {
        "runs": 10, "ok": 6, "failed": 1, "timeout": 1, "other": 2}
    assert cells["x"]["failure_rate"] == pytest.approx(0.4)
    assert "y" not in cells or cells["y"]["other"] == 0
    assert an.failures["not_ok"] == 4


@pytest.mark.parametrize("seed", [1, 2])
def test_normal_residuals_are_called_consistent_with_normal(seed):
    # Planted: normal residuals. Reference: scipy.stats.shapiro (Shapiro & Wilk 1965).
    from scipy import stats

    from benchharness.analysis.diagnostics import normality

    r = np.random.default_rng(seed).normal(0, 1, 60)
    res = normality(r, 0.05)
    ref = stats.shapiro(r).pvalue
    assert res["test"] == "shapiro-wilk" and res["p"] == pytest.approx(ref, rel=1e-6)
    assert ref > 0.05
    assert res["ok"] is True and res["verdict"].startswith("consistent with a normal")
    # and clearly skewed residuals are not
    skewed = np.random.default_rng(seed).exponential(1.0, 60)
    bad = normality(skewed, 0.05)
    assert stats.shapiro(skewed).pvalue < 0.05
    assert bad["ok"] is False and bad["verdict"].startswith("residuals are clearly not normal")


def test_inverse_box_cox_matches_scipy():
    # Reference: scipy.special.inv_boxcox, for values on both sides of the transform's
    # zero (1 + lam z between 0 and 1 as well as above 1).
    from scipy.special import inv_boxcox

    from benchharness.analysis.transform import Choice, inverse

    for lam in (0.5, -0.5, 2.0):
        z = np.array([-0.9, -0.4, 0.0, 0.3, 0.9]) / abs(lam)
        z = z[1.0 + lam * z > 0]
        np.testing.assert_allclose(inverse(z, Choice("boxcox", lam, "")), inv_boxcox(z, lam),
                                   rtol=1e-12)


def test_hosts_tested_against_the_residual_when_each_host_is_one_block():
    # Planted: two hosts, host B 10% slower; factor a with two levels; every run of a host
    # in one block (the host), so there are no blocks within hosts to test against.
    # Reference: statsmodels anova_lm (type 2) of ln(wall_s) ~ C(a) + C(host).
    import statsmodels.api as sm
    import statsmodels.formula.api as smf

    rng = np.random.default_rng(21)
    d = pd.DataFrame({"a": np.tile(np.repeat(["x", "y"], 6), 2),
                      "host": np.repeat(["hostA", "hostB"], 12)})
    d["block"] = np.where(d.host == "hostA", 1, 2)
    d["wall_s"] = np.exp(0.2 * (d.a == "y") + 0.1 * (d.host == "hostB")
                         + rng.normal(0, 0.03, 24))
    an = analyze(d, factors=["a"], block="block", transform="log", comparisons=False,
                 art=False)
    h = an.diagnostics["hosts"]
    d["ly"] = np.log(d["wall_s"])
    ref = sm.stats.anova_lm(smf.ols("ly ~ C(a) + C(host)", data=d).fit(), typ=2)
    assert h["between_hosts"]["tested_against"] == "residual"
    assert h["between_hosts"]["F"] == pytest.approx(ref.loc["C(host)", "F"], rel=1e-9)
    assert h["p"] == pytest.approx(ref.loc["C(host)", "PR(>F)"], rel=1e-6)
    assert h["differ"] is True and h["verdict"].startswith("hosts differ significantly")


def test_ratio_interval_uses_the_covariance_of_the_two_level_means():
    # Planted: an unbalanced 2 x 3 layout analysed with the additive model on the original
    # scale: the two marginal means of a share the b coefficients, so they are correlated.
    # The ratio's interval is ratio * exp(+-q s), s^2 = c_aa/a^2 + c_bb/b^2 - 2 c_ab/(a b)
    # (delta method on the log ratio; common practice), c from statsmodels OLS cov_params
    # of the marginal means (each the average of the fitted cell values over b).
    import statsmodels.formula.api as smf
    from scipy import stats

    rng = np.random.default_rng(13)
    rows = []
    for a, nb in (("r", (2, 5, 3)), ("x", (6, 2, 4))):
        for b, n in zip("pqs", nb):
            for _ in range(n):
                rows.append({"a": a, "b": b,
                             "v": 10 + 3 * (a == "x") + 4 * "pqs".index(b) + rng.normal(0, 1)})
    d = pd.DataFrame(rows)
    an = analyze(d, response="v", factors=["a", "b"], transform="none", model="main",
                 comparisons=False, art=False)
    e = next(x for x in an.effects if x["factor"] == "a" and x["level"] == "x")
    fit = smf.ols("v ~ C(a) + C(b)", data=d).fit()
    names = list(fit.params.index)       # Intercept, C(a)[T.x], C(b)[T.q], C(b)[T.s]
    X = np.array([[1.0 if n == "Intercept" or n == f"C(a)[T.{a}]" or n == f"C(b)[T.{b}]"
                   else 0.0 for n in names] for a in "rx" for b in "pqs"])
    L = np.vstack([X[3:].mean(axis=0), X[:3].mean(axis=0)])      # x, then r
    m = L @ fit.params.to_numpy()
    c = L @ fit.cov_params().to_numpy() @ L.T
    ratio = m[0] / m[1]
    s = np.sqrt(c[0, 0] / m[0] ** 2 + c[1, 1] / m[1] ** 2 - 2 * c[0, 1] / (m[0] * m[1]))
    q = stats.t.ppf(0.975, fit.df_resid)
    assert abs(c[0, 1]) > 1e-3                     # the situation planted: correlated means
    assert e["ratio"] == pytest.approx(ratio, rel=1e-9)
    assert e["lower"] == pytest.approx(ratio * np.exp(-q * s), rel=1e-7)
    assert e["upper"] == pytest.approx(ratio * np.exp(q * s), rel=1e-7)


def test_a_level_the_experiment_does_not_list_is_named_in_the_error(tmp_path):
    # Planted: the runs table holds a level ('buddy') that the experiment file does not
    # list; the error names that level (not some listed one) and the listed ones.
    import pandas as pd

    from benchharness.analysis.prepare import prepare
    from benchharness.errors import DataError
    from benchharness.experiment.file import Experiment
    from benchharness.results.journal import Results

    exp = Experiment.from_text("experiment: e\ncommand: [echo, '{alloc}']\n"
                               "factors:\n  alloc: [arena, pool, slab]\n")
    runs = pd.DataFrame({"run": range(6), "status": ["ok"] * 6,
                         "alloc": ["arena", "pool", "slab", "pool", "buddy", "arena"],
                         "wall_s": [1.0, 2.0, 3.0, 2.0, 1.0, 1.0]})
    res = Results(path=tmp_path, experiment=exp, runs=runs, host={}, plan=None, session={})
    with pytest.raises(DataError) as e:
        prepare(res, factors=["alloc"])
    assert str(e.value) == ("factor 'alloc': level 'buddy' in the data is not one of the "
                            "levels listed in the experiment ('arena', 'pool', 'slab')")


def test_one_run_per_cell_fits_main_effects_and_says_so():
    # Planted: a 2 x 3 layout, one run per cell (no replicates). The a:b interaction is
    # the error term, so the model fitted is order 1 (main effects) and analysis.json's
    # model says so; the ANOVA is statsmodels' additive OLS fit (anova_lm, type 2).
    import statsmodels.formula.api as smf
    from statsmodels.stats.anova import anova_lm

    rng = np.random.default_rng(1)
    d = pd.DataFrame([{"a": a, "b": b, "wall_s": 1.0 + 0.5 * (a == "y") + 0.1 * i
                       + rng.normal(0, 0.01)}
                      for a in ("x", "y") for i, b in enumerate("pqr")])
    an = analyze(d, factors=["a", "b"], transform="none", art=False)
    assert an.model["spec"] == "1" and an.model["terms"] == ["a", "b"]
    assert any("one run per cell" in n for n in an.notes)
    ref = anova_lm(smf.ols("wall_s ~ C(a) + C(b)", data=d).fit(), typ=2)
    rows = {r["term"]: r for r in an.anova_rows}
    assert rows["Residual"]["df"] == ref.loc["Residual", "df"] == 2
    for t in ("a", "b"):
        assert rows[t]["F"] == pytest.approx(ref.loc[f"C({t})", "F"], rel=1e-6)
    # asked for the full model, the same runs leave no residual degree of freedom: nothing
    # is tested and no error mean square is reported (there is none to estimate)
    full = analyze(d, factors=["a", "b"], model="full", transform="none", art=False)
    assert full.model["spec"] == "full" and full.model["mse"] is None
    assert [(r["term"], r["df"], r["F"]) for r in full.anova_rows] == [
        ("a", 1, None), ("b", 2, None), ("a:b", 2, None), ("Residual", 0, None)]


def test_a_finding_gives_the_holm_p_and_the_terms_own_p_when_they_read_differently():
    # Planted (as tests/test_findings.py's brew scenario, in process): brew=press 1.15x
    # the time, size=large 1.5x, noise CV 10%, four runs a cell (seed 36). At 99%
    # confidence brew's own p (0.006) and its Holm-adjusted p over the terms (0.011, as
    # statsmodels' multipletests gives it) read differently: the finding states both.
    import math

    from statsmodels.stats.multitest import multipletests

    rng = np.random.default_rng(36)
    rows = []
    for brew in ("drip", "press"):
        for size in ("small", "large"):
            for _ in range(4):
                m = (1.15 if brew == "press" else 1.0) * (1.5 if size == "large" else 1.0)
                rows.append({"brew": brew, "size": size,
                             "wall_s": 0.04 * m * math.exp(rng.normal(0, 0.1))})
    an = analyze(pd.DataFrame(rows), factors=["brew", "size"], alpha=0.01, art=False)
    terms = [r for r in an.anova_rows if r["kind"] == "effect"]
    holm = multipletests([r["p"] for r in terms], method="holm")[1]
    assert [r["p_holm"] for r in terms] == pytest.approx(list(holm))
    f = next(x for x in an.findings if x["kind"] == "main" and x["factors"] == ["brew"])
    assert "(p = 0.011 after Holm over the terms, 0.006 alone)" in f["statement"]


@pytest.mark.slow
def test_at_most_two_thousand_cells_are_listed_best_first():
    # docs/analysis.md: at most 2,000 cells listed, best first. Planted: 29 x 69 = 2,001
    # cells, one run each, each factor's levels slower in the order listed: the list
    # holds 2,000 cells, starts at (a0, b0), and the total says 2,001. (About 30 s.)
    rng = np.random.default_rng(3)
    d = pd.DataFrame([{"a": f"a{i}", "b": f"b{j}",
                       "wall_s": float(np.exp(0.01 * i + 0.02 * j + rng.normal(0, 0.05)))}
                      for i in range(29) for j in range(69)])
    an = analyze(d, factors=["a", "b"], transform="log", art=False)
    assert an.best["cells_total"] == 2001
    assert len(an.best["cells"]) == 2000
    assert an.best["cells"][0]["levels"] == {"a": "a0", "b": "b0"}


def test_with_no_error_estimate_the_best_cell_names_the_cells_exactly_equal_to_it():
    # Planted: a 3 x 2 layout, one run per cell, full model (no residual degree of
    # freedom, not a two-level design: nothing can be tested). Three cells took exactly
    # 1.0 s: the best-cell finding says no test of ties was possible and names the other
    # two as exactly equal.
    d = pd.DataFrame({"a": ["x", "x", "y", "y", "z", "z"], "b": ["p", "q"] * 3,
                      "wall_s": [1.0, 1.0, 2.0, 3.0, 1.0, 4.0]})
    an = analyze(d, factors=["a", "b"], model="full", transform="none", art=False)
    best = next(f for f in an.findings if f["kind"] == "best")["statement"]
    assert "no test of ties was possible (no error estimate); exactly equal to it: " in best
    ones = {"a=x, b=p", "a=x, b=q", "a=z, b=p"}
    first = best.split("Best measured: ")[1].split(" (")[0]
    equal = best.split("exactly equal to it: ")[1].split("; runner-up")[0].split("; ")
    assert first in ones and set(equal) == ones - {first}


def test_the_same_data_give_an_equal_analysis():
    # the analysis is plain data and deterministic: two analyses of one table compare
    # equal (the arrays kept for figures are left out of the comparison)
    d = _levels_frame(3, 4, seed=2)
    assert analyze(d, factors=["f"], art=False) == analyze(d, factors=["f"], art=False)


def test_differences_on_the_original_scale_carry_the_unit_of_the_response():
    # Planted: three levels 10, 12 and 15 ms apart by design (wall_s, seconds), analysed
    # without a transform: the text states each difference in ms, as statsmodels' OLS
    # contrast b - a gives it
    import statsmodels.formula.api as smf

    from benchharness.analysis import format_analysis

    rng = np.random.default_rng(4)
    d = pd.DataFrame({"f": np.repeat(["a", "b", "c"], 5),
                      "wall_s": np.repeat([0.010, 0.012, 0.015], 5) + rng.normal(0, 2e-4, 15)})
    an = analyze(d, factors=["f"], transform="none", comparisons=["pairwise"], art=False)
    diff_ms = smf.ols("wall_s ~ C(f)", data=d).fit().params["C(f)[T.b]"] * 1000
    line = next(ln for ln in format_analysis(an).splitlines() if "f: b over a" in ln)
    assert f"{diff_ms:.3f} ms" in line, line
