"""Numeric factors: log-log trends, their differences, lack of fit, polynomial contrasts.

Checked against statsmodels (ordinary least squares on the same rows, and
``anova_lm`` for the nested-model F tests) and patsy's ``Poly`` contrasts;
and against planted truths, asserting what the analysis says.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from benchharness.analysis import analyze


def _frame(seed=3, exps=None, threads=(1, 2, 4), sizes=(1000, 4000, 16000), reps=4, sd=0.05,
           curve=0.0):
    """wall_s = 1 ms · (n/1000)^b(threads) · threads^-0.5 · e^(curve·log²(n/1000)) · noise."""
    rng = np.random.default_rng(seed)
    exps = exps or {t: 1.0 for t in threads}
    rows = []
    for t in threads:
        for n in sizes:
            x = np.log(n / 1000)
            for _ in range(reps):
                y = 1e-3 * np.exp(exps[t] * x + curve * x * x) * t ** -0.5
                rows.append({"threads": str(t), "n": str(n),
                             "wall_s": y * np.exp(rng.normal(0, sd))})
    return pd.DataFrame(rows)


def _trend(an, factor):
    return next(t for t in an.to_dict()["trends"] if t["factor"] == factor)


def test_common_slope_matches_a_direct_log_log_regression_in_statsmodels():
    import statsmodels.formula.api as smf

    df = _frame()
    an = analyze(df, factors=["threads", "n"])
    tr = _trend(an, "n")
    d = df.assign(x=df["n"].astype(float))
    # reference: statsmodels OLS of log y on log n with one intercept per threads level
    ref = smf.ols("np.log(wall_s) ~ np.log(x) + C(threads)", d).fit()
    lo, hi = ref.conf_int(0.05).loc["np.log(x)"]
    assert tr["slope"]["estimate"] == pytest.approx(ref.params["np.log(x)"], rel=1e-9)
    assert tr["slope"]["lower"] == pytest.approx(lo, rel=1e-9)
    assert tr["slope"]["upper"] == pytest.approx(hi, rel=1e-9)
    assert tr["slope"]["df"] == ref.df_resid
    # and the planted exponent 1 is inside, stated in words
    assert tr["slope"]["lower"] < 1.0 < tr["slope"]["upper"]
    said = [f for f in an.findings if f["kind"] == "trend" and f["factors"] == ["n"]][0]
    assert said["statement"].startswith("wall_s grows as n^1.0") or \
        said["statement"].startswith("wall_s grows as n^0.9")
    assert said["significant"] and not said["differs_with"] and not said["lack_of_fit"]


def test_slopes_per_level_and_their_difference_match_statsmodels():
    import statsmodels.formula.api as smf
    from statsmodels.stats.anova import anova_lm

    df = _frame(exps={1: 1.0, 2: 1.0, 4: 1.3}, seed=5)       # planted: threads=4 grows faster
    an = analyze(df, factors=["threads", "n"])
    tr = _trend(an, "n")
    by = tr["by"][0]
    d = df.assign(x=np.log(df["n"].astype(float)))
    # reference: statsmodels, separate slopes per threads level vs one common slope
    common = smf.ols("np.log(wall_s) ~ C(threads) + x", d).fit()
    sep = smf.ols("np.log(wall_s) ~ C(threads) + C(threads):x", d).fit()
    for s in by["slopes"]:
        name = f"C(threads)[{s['level']}]:x"
        assert s["estimate"] == pytest.approx(sep.params[name], rel=1e-9)
        assert s["lower"] == pytest.approx(sep.conf_int().loc[name, 0], rel=1e-9)
    ref = anova_lm(common, sep)
    assert by["test"]["F"] == pytest.approx(ref["F"].iloc[1], rel=1e-9)
    assert by["test"]["p"] == pytest.approx(ref["Pr(>F)"].iloc[1], rel=1e-6)
    assert by["differ"] is True
    said = [f for f in an.findings if f["kind"] == "trend" and f["factors"] == ["n"]][0]
    assert said["differs_with"] == ["threads"]
    assert "the exponent differs with threads" in said["statement"]
    assert "at threads=4" in said["statement"]


def test_lack_of_fit_is_the_pure_error_test_of_statsmodels_and_is_said():
    import statsmodels.formula.api as smf
    from statsmodels.stats.anova import anova_lm

    df = _frame(curve=0.15, seed=7, sizes=(1000, 4000, 16000, 64000))   # planted: bends
    an = analyze(df, factors=["threads", "n"])
    tr = _trend(an, "n")
    d = df.assign(x=np.log(df["n"].astype(float)))
    # reference: a line per threads level against the cell means (pure error), statsmodels
    lines = smf.ols("np.log(wall_s) ~ C(threads) + C(threads):x", d).fit()
    cells = smf.ols("np.log(wall_s) ~ C(threads):C(n)", d).fit()
    ref = anova_lm(lines, cells)
    assert tr["lack_of_fit"]["F"] == pytest.approx(ref["F"].iloc[1], rel=1e-9)
    assert tr["lack_of_fit"]["df1"] == 6 and tr["lack_of_fit"]["df2"] == cells.df_resid
    assert tr["lack_of_fit"]["p"] < 0.001
    said = [f for f in an.findings if f["kind"] == "trend" and f["factors"] == ["n"]][0]
    assert said["lack_of_fit"] is True
    assert "not a law to extrapolate" in said["statement"]
    # the quadratic contrast carries the bend; the straight data's does not
    quad = tr["contrasts"][1]
    assert quad["name"] == "quadratic" and quad["p"] < 0.001
    flat = _trend(analyze(_frame(seed=7, sizes=(1000, 4000, 16000, 64000)),
                          factors=["threads", "n"]), "n")
    assert flat["lack_of_fit"]["p"] > 0.01


def test_polynomial_contrasts_match_patsy_poly_for_unequal_spacing():
    import statsmodels.formula.api as smf
    from patsy.contrasts import Poly
    from statsmodels.stats.anova import anova_lm

    sizes = (1000, 3000, 4000, 20000)                        # unequally spaced, also in logs
    df = _frame(seed=11, sizes=sizes, curve=0.05)
    an = analyze(df, factors=["threads", "n"])
    tr = _trend(an, "n")
    scores = np.log(np.array(sizes, float))
    # reference: patsy's orthogonal polynomial coding for the same scores
    P = Poly(scores=scores).code_without_intercept(list(range(len(sizes)))).matrix
    for k, c in enumerate(tr["contrasts"]):
        ref = P[:, k] * np.sign(P[-1, k])
        assert c["coefficients"] == pytest.approx(ref.tolist(), abs=1e-9)
    # reference: statsmodels, the full factorial with that coding (threads sum-coded):
    # each coefficient is the contrast of the marginal means, with the same t
    d = df.assign(nn=pd.Categorical(df["n"], categories=[str(s) for s in sizes]))
    fit = smf.ols(f"np.log(wall_s) ~ C(nn, Poly(scores={list(scores)})) * C(threads, Sum)",
                  d).fit()
    for k, c in enumerate(tr["contrasts"]):
        name = [p for p in fit.params.index if p.startswith("C(nn") and ":" not in p][k]
        sign = np.sign(P[-1, k])
        assert c["estimate"] == pytest.approx(sign * fit.params[name], rel=1e-8)
        assert c["F"] == pytest.approx(fit.tvalues[name] ** 2, rel=1e-8)
    # in a balanced experiment the contrasts' sums of squares add up to n's (statsmodels)
    ss_n = anova_lm(smf.ols("np.log(wall_s) ~ C(n) * C(threads)", df).fit(), typ=2)
    assert sum(c["sum_sq"] for c in tr["contrasts"]) == pytest.approx(
        ss_n.loc["C(n)", "sum_sq"], rel=1e-9)


def test_equally_spaced_contrasts_are_the_tabulated_ones():
    from benchharness.analysis.trend import orthogonal_polynomials

    P = orthogonal_polynomials([1, 2, 3, 4])
    # the tabulated integer coefficients for four equally spaced levels (Fisher & Yates
    # tables; from memory): linear -3 -1 1 3, quadratic 1 -1 -1 1, cubic -1 3 -3 1
    for k, ints in enumerate(([-3, -1, 1, 3], [1, -1, -1, 1], [-1, 3, -3, 1])):
        v = np.array(ints, float)
        assert P[:, k] == pytest.approx(v / np.linalg.norm(v), abs=1e-12)


def test_no_trend_is_never_called_growth():
    rng = np.random.default_rng(2)
    rows = [{"n": str(n), "wall_s": 0.01 * np.exp(rng.normal(0, 0.05))}
            for n in (10, 100, 1000) for _ in range(5)]
    an = analyze(pd.DataFrame(rows), factors=["n"])
    f = [f for f in an.findings if f["kind"] == "trend"][0]
    assert f["significant"] is False
    assert f["statement"].startswith("wall_s shows no detectable trend over n")
    assert "grows" not in f["statement"]


def test_repeats_without_any_variation_give_exponents_as_measured_and_no_test():
    # planted: every run of a cell gives the same time, pool^0.5 at cache=on and pool^1 at
    # cache=off, with a bump at pool=4 (so a line leaves residuals that are lack of fit, not
    # noise). Nothing can be tested: no interval, no "differs with cache (p < 0.001)".
    rows = [{"cache": c, "pool": str(p),
             "wall_s": 0.02 * (p / 2) ** (0.5 if c == "on" else 1.0) * (1.3 if p == 4 else 1)}
            for c in ("on", "off") for p in (2, 4, 8) for _ in range(3)]
    an = analyze(pd.DataFrame(rows), factors=["cache", "pool"])
    f = [f for f in an.findings if f["kind"] == "trend"][0]
    assert f["untested"] and not f["significant"] and f["differs_with"] == []
    assert f["lower"] is None and f["p"] is None
    assert "differs" not in f["statement"] and "p <" not in f["statement"]
    assert "untested: every run in a cell gave the same value" in f["statement"]
    t = an.to_dict()["trends"][0]
    assert all(b["test"] is None and not b["differ"] for b in t["by"])
    by = {s["level"]: s["estimate"] for s in t["by"][0]["slopes"]}
    assert sorted(round(v, 9) for v in by.values()) == [0.5, 1.0]


def test_a_factor_with_one_level_left_is_not_said_to_be_averaged_over():
    # planted: n^0.9 with codec at one level only (a filtered table): the slope is not an
    # average over codec, so the words do not say so
    rng = np.random.default_rng(2)
    rows = [{"codec": "zlib", "n": str(n), "wall_s": 0.001 * n ** 0.9
             * np.exp(rng.normal(0, 0.03))} for n in (10, 100, 1000) for _ in range(4)]
    an = analyze(pd.DataFrame(rows), factors=["codec", "n"])
    (f,) = [f for f in an.findings if f["kind"] == "trend"]
    assert f["statement"].startswith("wall_s grows as n^0.9")
    assert "averaged over" not in f["statement"]


def test_labels_that_are_not_all_numbers_get_no_trend():
    df = _frame().assign(n=lambda d: d["n"].replace({"1000": "small"}))
    an = analyze(df, factors=["threads", "n"])
    assert [t["factor"] for t in an.to_dict()["trends"]] == ["threads"]


def test_trend_section_round_trips_through_json():
    an = analyze(_frame(), factors=["threads", "n"])
    d = json.loads(an.to_json())
    assert {t["factor"] for t in d["trends"]} == {"threads", "n"}
    n = _trend(an, "n")
    assert n["axis"] == "log n" and n["line_by"] == "threads"
    assert len(n["points"]) == 9 and {p["by"] for p in n["points"]} == {"1", "2", "4"}


def test_the_headline_qualifies_an_exponent_that_differs_or_is_no_power_law(tmp_path, capsys):
    """Planted: n^0.8 for png, n^1.1 for webp (a common exponent near 0.95 describes
    neither); then a bend on log-log axes (no power law). The headline must not state one
    exponent as the law: it says the per-level exponents, or that the exponent is an average. (``n`` reads as an input, so its trend leads the headline.)"""
    from benchharness.cli import main

    rng = np.random.default_rng(8)
    exps = {"png": 0.8, "webp": 1.1}
    rows = [{"fmt": f, "n": str(n),
             "wall_s": 0.05 * (n / 16) ** exps[f] * np.exp(rng.normal(0, .02))}
            for f in exps for n in (16, 64, 256) for _ in range(3)]
    src = tmp_path / "runs.csv"
    pd.DataFrame(rows).to_csv(src, index=False)
    assert main(["analyze", str(src), "--factors", "fmt,n"]) == 0
    head = capsys.readouterr().out.splitlines()[0]
    assert "the exponent differing with fmt: n^0.8" in head, head
    assert "at fmt=png to n^1.1" in head and "at fmt=webp" in head, head
    # a bend: ln y = ln x + 0.4·(ln x)², far from a straight line on log-log axes
    df = _frame(curve=0.4, sd=0.02, seed=4)
    df.to_csv(src, index=False)
    assert main(["analyze", str(src), "--factors", "threads,n"]) == 0
    head = capsys.readouterr().out.splitlines()[0]
    assert "on average over the levels tested (not a power law: lack of fit p < 0.001)" in head


def test_the_figure_draws_lines_by_the_factor_the_exponent_differs_with():
    """Planted: workers has by far the largest effect but leaves the exponent alone
    (time ∝ workers^-0.7), while fmt barely moves the mean yet changes the exponent over
    tiles (0.8 against 1.1). The figure's lines follow fmt, so it shows what is said."""
    rng = np.random.default_rng(12)
    exps = {"png": 0.8, "webp": 1.1}
    rows = [{"workers": str(w), "fmt": f, "tiles": str(n),
             "wall_s": (n / 64) ** exps[f] * w ** -0.7 * np.exp(rng.normal(0, .02))}
            for w in (1, 4, 16) for f in exps for n in (16, 64, 256) for _ in range(2)]
    an = analyze(pd.DataFrame(rows), factors=["workers", "fmt", "tiles"])
    t = _trend(an, "tiles")
    assert [b["factor"] for b in t["by"] if b["differ"]] == ["fmt"]
    assert t["line_by"] == "fmt" and t["line_by_reason"] == "exponent differs"
    assert {p["by"] for p in t["points"]} == {"png", "webp"}
    # without a difference in exponents: the most important other factor (threads)
    w = _trend(analyze(_frame(), factors=["threads", "n"]), "n")
    assert w["line_by"] == "threads" and w["line_by_reason"] == "largest effect"
