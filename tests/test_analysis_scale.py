"""One scale per response, the rank-based cross-check on it, and verdicts that weigh size.

Planted truths (simulated with fixed seeds), asserting what the analysis *says*
(analysis.json fields and wording); the simulations behind the figures in
docs/analysis.md are the ``slow`` tests here:

    python -m pytest tests/test_analysis_scale.py -m slow -s

Outside references: scipy.stats (``boxcox_llf``/``boxcox`` in test_analysis_stats,
``skew``, ``levene``, ``linregress``, ``binom``), statsmodels (``ols`` + ``anova_lm``).
"""

from __future__ import annotations

import json
import math
import re

import numpy as np
import pandas as pd
import pytest

from benchharness.analysis import analyze


# ---- simulations ---------------------------------------------------------------------------

def _layout(shape, reps):
    grids = np.meshgrid(*[np.arange(k) for k in shape], indexing="ij")
    return [np.repeat(g.ravel(), reps) for g in grids]


def lambda_coverage(shape, reps, n_exp, seed, sigma=0.3, step=0.4, use_n=False):
    """Share of lognormal experiments whose 95% λ interval holds 0 (the true λ).

    Full factorial ``shape`` with ``reps`` runs per cell, multiplicative main effects
    (each level step multiplies the time by e^step), noise sd ``sigma`` on the log scale;
    the interval is the analysis's own (`BoxCoxProfile.profile`, full model); ``use_n``
    puts N where the residual degrees of freedom belong (the plain likelihood, for contrast).
    """
    from benchharness.analysis.cells import index_cells
    from benchharness.analysis.transform import BoxCoxProfile

    rng = np.random.default_rng(seed)
    codes = _layout(shape, reps)
    cells = index_cells(codes, list(shape))
    n = np.bincount(cells.row_cell).astype(float)
    N = len(codes[0])
    mu = sum(step * c for c in codes)
    hits = 0
    for _ in range(n_exp):
        y = 0.05 * np.exp(mu + sigma * rng.standard_normal(N))
        p = BoxCoxProfile(y, cells.row_cell, n, None,
                          df=N if use_n else N - cells.count).profile()
        hits += p.ci[0] <= 0.0 <= p.ci[1]
    return hits / n_exp


def _frame(shape, reps, y):
    codes = _layout(shape, reps)
    names = "ABCDEFG"[: len(shape)]
    d = pd.DataFrame({f: [f"{f.lower()}{c}" for c in col] for f, col in zip(names, codes)})
    d["wall_s"] = y
    return d, list(names)


def false_interaction(n_exp, seed, shape=(3, 4), reps=3, sigma=0.3):
    """Lognormal data, multiplicative main effects, no interaction on the log scale.

    Returns (share of experiments with interaction p < 0.05 under ``auto``, the same
    under ``log``, share of experiments where ``auto`` left the log scale).
    """
    rng = np.random.default_rng(seed)
    codes = _layout(shape, reps)
    mu = 0.4 * codes[0] + 0.25 * codes[1]
    term = "A:B"
    hits = {"auto": 0, "log": 0}
    left = 0
    for _ in range(n_exp):
        d, f = _frame(shape, reps, np.exp(mu + sigma * rng.standard_normal(len(mu))))
        an = analyze(d, factors=f, comparisons=False, art=False)
        p_auto = next(r["p"] for r in an.anova_rows if r["term"] == term)
        if an.transform["name"] == "log":
            p_log = p_auto
        else:
            left += 1
            an = analyze(d, factors=f, transform="log", comparisons=False, art=False)
            p_log = next(r["p"] for r in an.anova_rows if r["term"] == term)
        hits["auto"] += p_auto < 0.05
        hits["log"] += p_log < 0.05
    return hits["auto"] / n_exp, hits["log"] / n_exp, left / n_exp


def art_disagreement(n_exp, seed, shape=(3, 4), reps=3, sigma=0.3):
    """Share of clean lognormal experiments where the rank-based cross-check disagrees.

    A has a ×1.5 effect per level, B none, no interaction; returns (share of experiments
    with any term disagreeing, share of term tests disagreeing).
    """
    rng = np.random.default_rng(seed)
    codes = _layout(shape, reps)
    mu = 0.4 * codes[0]
    any_, terms, total = 0, 0, 0
    for _ in range(n_exp):
        d, f = _frame(shape, reps, np.exp(mu + sigma * rng.standard_normal(len(mu))))
        an = analyze(d, factors=f, comparisons=False, art=True)
        flags = [r["agrees"] is False for r in an.art["terms"]]
        any_ += any(flags)
        terms += sum(flags)
        total += len(flags)
    return any_ / n_exp, terms / total


def _band(n, p, level=0.999):
    from scipy import stats  # binomial band around the nominal rate (scipy.stats.binom)

    return stats.binom.ppf((1 - level) / 2, n, p) / n, stats.binom.isf((1 - level) / 2, n, p) / n


# ---- 1. the λ interval uses the residual degrees of freedom ------------------------------

DESIGNS = [((3, 2, 4), 3), ((3, 3, 3), 3), ((3, 3, 3, 3), 2)]


@pytest.mark.parametrize("shape,reps", DESIGNS)
def test_lambda_interval_coverage_small(shape, reps):
    # 300 fixed-seed experiments: inside the 99.9% binomial band around 95% (with N in place
    # of ν the 3×3×3×3 design covers about 83%, far below the band)
    cov = lambda_coverage(shape, reps, 300, seed=5)
    lo, hi = _band(300, 0.95)
    assert lo <= cov <= hi


@pytest.mark.slow
@pytest.mark.parametrize("shape,reps", DESIGNS)
def test_lambda_interval_coverage_10000(shape, reps):
    cov = lambda_coverage(shape, reps, 10000, seed=2026)
    with_n = lambda_coverage(shape, reps, 10000, seed=2026, use_n=True)
    print(f"\nλ interval coverage {'×'.join(map(str, shape))}, {reps} runs per cell: "
          f"{100 * cov:.1f}% of 10000 (with N in place of ν: {100 * with_n:.1f}%)")
    assert 0.94 <= cov <= 0.96


# ---- 1. one scale, chosen for the question ---------------------------------------------------

def test_lognormal_times_are_analysed_on_the_log_scale_with_the_profile_as_evidence(tmp_path):
    # planted: multiplicative main effects (A ×1.5 per level), lognormal noise
    rng = np.random.default_rng(7)
    codes = _layout((3, 4), 3)
    d, f = _frame((3, 4), 3, np.exp(0.4 * codes[0] + 0.3 * rng.standard_normal(36)))
    an = analyze(d, factors=f)
    t = json.loads(an.to_json())["transform"]
    assert (t["name"], t["lambda"], t["requested"]) == ("log", 0.0, "auto")
    assert t["ratio_scaled"] is True and t["profile_df"] == 36 - 12
    lo, hi = t["lambda_ci"]
    assert lo <= 0 <= hi and t["lambda_ci99"][0] < lo and t["lambda_ci99"][1] > hi
    assert t["summary"] == (
        "Analysed on the log scale, the default for a positive, ratio-scaled response "
        "(effects are exact ratios). Box-Cox profile: the data are consistent with the log "
        f"scale (λ̂ = {t['lambda_hat']:.2f}, 95% interval {lo:.2f} to {hi:.2f})"
        .replace("-", "−").replace("Box−Cox", "Box-Cox").replace("ratio−scaled", "ratio-scaled")
        + (", and also with no transform (λ = 1)." if lo <= 1 <= hi else "."))
    # the effect is an exact ratio of geometric means (the planted ×1.5 per level, roughly)
    e = {(x["factor"], x["level"]): x for x in an.effects}
    gm = d.groupby("A")["wall_s"].apply(lambda v: math.exp(np.log(v).mean()))
    assert e[("A", "a2")]["ratio"] == pytest.approx(gm["a2"] / gm["a0"], rel=1e-9)


def test_auto_leaves_log_only_on_strong_evidence_and_failing_checks_and_says_why():
    # planted: additive normal noise on a large constant (λ = 1 is the truth) with the spread
    # growing after log: strong evidence against log, and unequal variances on the log scale
    rng = np.random.default_rng(3)
    a = np.repeat(["p", "q", "r"], 30)
    base = np.repeat([3.0, 12.0, 48.0], 30)
    y = base + rng.normal(0, 0.5, 90)
    d = pd.DataFrame({"a": a, "wall_s": y})
    an = analyze(d, factors=["a"])
    t = an.transform
    assert not t["lambda_ci99"][0] <= 0 <= t["lambda_ci99"][1]
    assert t["name"] != "log"
    assert t["reason"].startswith(f"{t['scale']} instead of the log scale: λ = 0 lies outside "
                                  "the 99% interval")
    assert "and on the log scale" in t["reason"] and "the cell variances differ a lot (" in t["reason"]
    # the log-scale check it quotes, by scipy: Brown-Forsythe = levene(center="median")
    from scipy import stats

    groups = [np.log(y[a == g]) for g in ("p", "q", "r")]
    assert stats.levene(*groups, center="median").pvalue < 0.05
    # asked for log, it stays there and says so
    forced = analyze(d, factors=["a"], transform="log")
    assert forced.transform["name"] == "log"
    assert forced.transform["reason"].startswith("the log scale, as requested")


def test_difference_unit_stays_on_the_original_scale(tmp_path):
    # a custom metric declared in °C: differences, not ratios, are what its effects mean
    from benchharness.analysis.transform import unit_of_response

    (tmp_path / "metrics.json").write_text(json.dumps(
        {"core_temp": {"unit": "°C", "better": "lower", "source": "json"}}))
    assert unit_of_response("core_temp", folder=tmp_path) == "°C"
    assert unit_of_response("wall_s", folder=tmp_path) is None


def test_false_interaction_rate_under_auto_small():
    # 150 fixed-seed experiments: the rate of a false interaction at p < 0.05 stays inside
    # the 99.9% binomial band around 5%, and auto rarely leaves the log scale
    auto, log, left = false_interaction(150, seed=11)
    lo, hi = _band(150, 0.05)
    assert lo <= auto <= hi and lo <= log <= hi
    assert left <= 0.03


@pytest.mark.slow
def test_false_interaction_rate_under_auto_2000():
    auto, log, left = false_interaction(2000, seed=2026)
    print(f"\nfalse interaction at p < 0.05, 3×4 design, 3 runs per cell, 2000 experiments: "
          f"auto {100 * auto:.1f}%, log {100 * log:.1f}%; auto left the log scale in "
          f"{100 * left:.1f}%")
    lo, hi = _band(2000, 0.05)
    assert lo <= auto <= hi and abs(auto - log) <= 0.01


# ---- 2. the rank-based cross-check on the analysed scale ------------------------------------

def test_cross_check_ranks_the_analysed_scale_and_agrees_on_clean_lognormal_data():
    # planted: strong multiplicative main effects, no interaction on the log scale. On the
    # original scale these effects *do* interact, so ranking the raw times disagreed always.
    rng = np.random.default_rng(21)
    codes = _layout((3, 4), 4)
    d, f = _frame((3, 4), 4, np.exp(1.0 * codes[0] + 0.6 * codes[1]
                                    + 0.1 * rng.standard_normal(48)))
    an = analyze(d, factors=f, art=True)
    assert an.transform["name"] == "log" and an.art["scale"] == "log"
    rows = {r["term"]: r for r in an.art["terms"]}
    assert all(r["agrees"] for r in rows.values())
    assert rows["A:B"]["p"] > 0.05
    assert not any("cross-check disagrees" in n for n in an.notes)
    # reference: the same aligned rank transform done by hand on log(y) with statsmodels
    import statsmodels.formula.api as smf
    from scipy import stats
    from statsmodels.stats.anova import anova_lm

    z = np.log(d["wall_s"].to_numpy())
    cm = d.assign(z=z).groupby(["A", "B"])["z"].transform("mean").to_numpy()
    ma = d.assign(z=z).groupby("A")["z"].transform("mean").to_numpy()
    mb = d.assign(z=z).groupby("B")["z"].transform("mean").to_numpy()
    aligned = (z - cm) + (cm - ma - mb + z.mean())
    ranks = stats.rankdata(aligned)
    ref = anova_lm(smf.ols("r ~ C(A) * C(B)", d.assign(r=ranks)).fit(), typ=2)
    assert rows["A:B"]["F"] == pytest.approx(ref.loc["C(A):C(B)", "F"], rel=1e-9)


def test_cross_check_follows_the_fitted_model():
    # a main-effects model: the cross-check fits ranks with the same terms (no interaction)
    rng = np.random.default_rng(4)
    codes = _layout((3, 3, 3), 2)
    d, f = _frame((3, 3, 3), 2, np.exp(0.3 * codes[0] + 0.2 * rng.standard_normal(54)))
    an = analyze(d, factors=f, model="main", art=True)
    assert [r["term"] for r in an.art["terms"]] == ["A", "B", "C"]
    assert all(r["df_resid"] == 54 - 1 - 6 for r in an.art["terms"])
    # reference: ranks of the aligned log response fitted with the main-effects model
    import statsmodels.formula.api as smf
    from scipy import stats
    from statsmodels.stats.anova import anova_lm

    g = d.rename(columns={"A": "fa", "B": "fb", "C": "fc"})  # "C" is patsy's coding function
    z = np.log(g["wall_s"].to_numpy())
    fitted = smf.ols("z ~ C(fa) + C(fb) + C(fc)", g.assign(z=z)).fit().fittedvalues.to_numpy()
    ma = g.assign(z=z).groupby("fa")["z"].transform("mean").to_numpy()
    ranks = stats.rankdata(z - fitted + ma - z.mean())
    ref = anova_lm(smf.ols("r ~ C(fa) + C(fb) + C(fc)", g.assign(r=ranks)).fit(), typ=2)
    a_row = an.art["terms"][0]
    assert a_row["F"] == pytest.approx(ref.loc["C(fa)", "F"], rel=1e-9)


def test_cross_check_can_be_switched_off_from_the_command_line(tmp_path, main_cli):
    rng = np.random.default_rng(8)
    d = pd.DataFrame({"a": np.repeat(["x", "y", "z"], 8),
                      "wall_s": rng.standard_cauchy(24) ** 2 + 1.0})
    src = tmp_path / "t.csv"
    d.to_csv(src, index=False)
    on = main_cli("analyze", str(src), "--factors", "a", "--art", "--json")
    assert on.returncode == 0 and json.loads(on.stdout)["art"] is not None
    off = main_cli("analyze", str(src), "--factors", "a", "--no-cross-check", "--json")
    assert off.returncode == 0 and json.loads(off.stdout)["art"] is None
    both = main_cli("analyze", str(src), "--factors", "a", "--art", "--no-cross-check")
    assert both.returncode == 2 and "not allowed with" in both.stderr


def test_cross_check_disagreement_on_clean_lognormal_data_small():
    # 120 fixed-seed experiments; the full simulation (slow) gives the documented figure
    any_rate, term_rate = art_disagreement(120, seed=13)
    assert any_rate <= 0.08 + 0.05  # 99.9% binomial margin of 120 experiments at 8%
    assert term_rate <= 0.08


@pytest.mark.slow
def test_cross_check_disagreement_on_clean_lognormal_data_1000():
    any_rate, term_rate = art_disagreement(1000, seed=2026)
    print(f"\ncross-check disagreement, 3×4 design, 3 runs per cell, 1000 experiments: "
          f"{100 * any_rate:.1f}% of experiments, {100 * term_rate:.1f}% of term tests")
    assert any_rate <= 0.08


# ---- 3. verdicts that weigh size ---------------------------------------------------------------

def test_large_variance_ratio_is_never_ok_even_when_the_test_does_not_reject():
    # planted: one cell with 6× the standard deviation (36× the variance), 3 runs per cell
    rng = np.random.default_rng(0)
    sd = np.repeat([1, 1, 1, 6], 3)
    d = pd.DataFrame({"a": np.repeat(list("pqrs"), 3), "v": 50 + rng.normal(0, 1, 12) * sd})
    an = analyze(d, response="v", factors=["a"], transform="none")
    ev = an.diagnostics["equal_variance"]
    var = d.groupby("a")["v"].var()   # cell residual variances (full model), by pandas
    assert ev["variance_ratio"] == pytest.approx(var.max() / var.min(), rel=1e-9)
    assert ev["variance_ratio"] > 10 and ev["p"] >= 0.05
    from scipy import stats  # Brown-Forsythe = scipy levene(center="median")

    assert ev["p"] == pytest.approx(stats.levene(*[g["v"] for _, g in d.groupby("a")],
                                                 center="median").pvalue, rel=1e-9)
    assert (ev["level"], ev["ok"], ev["size"]) == ("caution", False, "large")
    assert ev["verdict"].startswith(f"the largest cell variance is {ev['variance_ratio']:.3g}× "
                                    "the smallest, beyond 10×")
    assert an.diagnostics["assumptions_ok"] is False


def test_large_skewness_is_never_ok_even_when_the_test_does_not_reject():
    rng = np.random.default_rng(4)
    v = rng.lognormal(0, 0.8, 10)
    d = pd.DataFrame({"a": ["x"] * 5 + ["y"] * 5, "v": np.r_[v[:5], v[5:] + 3]})
    an = analyze(d, response="v", factors=["a"], transform="none")
    nm = an.diagnostics["normality"]
    from scipy import stats  # skewness of the residuals, and Shapiro-Wilk, by scipy

    resid = d["v"] - d.groupby("a")["v"].transform("mean")
    assert nm["skewness"] == pytest.approx(stats.skew(resid), rel=1e-9)
    assert nm["p"] == pytest.approx(stats.shapiro(resid).pvalue, rel=1e-6)
    assert abs(nm["skewness"]) > 1 and nm["p"] >= 0.05
    assert (nm["level"], nm["ok"]) == ("caution", False)
    assert nm["verdict"].startswith(f"residuals are strongly skewed (skewness "
                                    f"{nm['skewness']:+.2f}, beyond ±1")


def test_large_drift_is_never_ok_even_when_the_slope_is_not_significant():
    # planted: +10% per 100 runs on the log scale, hidden in large noise over 40 runs
    rng = np.random.default_rng(1)
    n = 40
    pos = np.arange(n)
    d = pd.DataFrame({"a": np.tile(["x", "y"], n // 2), "position": pos,
                      "wall_s": np.exp(0.001 * pos + 0.4 * rng.standard_normal(n))})
    an = analyze(d, factors=["a"], transform="log")
    dr = an.diagnostics["drift"]
    from scipy import stats  # slope of residuals on run order, by scipy.stats.linregress

    ref = stats.linregress(pos, an.residuals)
    assert dr["percent_per_100_runs"] == pytest.approx(ref.slope * 100 * 100, rel=1e-9)
    assert dr["p"] == pytest.approx(ref.pvalue, rel=1e-9)
    assert abs(dr["percent_per_100_runs"]) > 5 and dr["p"] >= 0.05
    assert (dr["level"], dr["ok"]) == ("caution", False)
    # three significant figures and a p written as every output writes them (docs/cli.md)
    pct = dr["percent_per_100_runs"]
    stated = re.search(r"run order, ([+-][\d.,]+)% per 100 runs", dr["verdict"])
    assert stated and float(stated.group(1)) == pytest.approx(pct, rel=5e-3)
    assert len(stated.group(1).lstrip("+-").replace(".", "").lstrip("0")) == 3
    # Not significant, so it is not said that the response moves: the verdict says a drift
    # that large cannot be ruled out, with the slope's 95% interval (scipy's linregress
    # standard error and t quantile) holding both 0 and a value beyond the limit.
    assert "the response moves" not in dr["verdict"]
    assert dr["verdict"].startswith("a drift beyond ±5% per 100 runs cannot be ruled out: the "
                                    f"slope over the run order, {stated.group(1)}% per 100 runs, "
                                    f"is not significant (p = {dr['p']:.3f}); its 95% interval")
    half = stats.t.ppf(0.975, n - 2) * ref.stderr * 100 * 100
    lo, hi = (float(x.replace(",", "")) for x in re.search(
        r"95% interval, ([+-][\d.,]+)% to ([+-][\d.,]+)% per 100 runs", dr["verdict"]).groups())
    assert lo == pytest.approx(ref.slope * 1e4 - half, rel=5e-3)
    assert hi == pytest.approx(ref.slope * 1e4 + half, rel=5e-3)
    assert lo < 0 < 5 < abs(hi) or hi > 0 > -5 > lo


def test_small_departures_stay_ok():
    # planted: clean lognormal data with many runs per cell: every check ok, sizes small
    rng = np.random.default_rng(12)
    codes = _layout((2, 3), 40)
    d, f = _frame((2, 3), 40, np.exp(0.3 * codes[0] + 0.1 * rng.standard_normal(240)))
    d["position"] = rng.permutation(240)
    an = analyze(d, factors=f)
    for key in ("normality", "equal_variance", "drift"):
        assert an.diagnostics[key]["level"] == "ok", an.diagnostics[key]["verdict"]
        assert an.diagnostics[key]["ok"] is True


def test_terminal_marks_a_large_departure_as_a_concern(tmp_path, main_cli):
    rng = np.random.default_rng(0)
    sd = np.repeat([1, 1, 1, 6], 3)
    d = pd.DataFrame({"a": np.repeat(list("pqrs"), 3), "v": 50 + rng.normal(0, 1, 12) * sd})
    src = tmp_path / "t.csv"
    d.to_csv(src, index=False)
    out = main_cli("analyze", str(src), "--factors", "a", "--response", "v", "--transform", "none")
    assert out.returncode == 0
    line = next(x for x in out.stdout.splitlines() if "Equal spread across cells" in x)
    assert line.lstrip().startswith("! Equal spread across cells")
    assert "the largest cell variance is 99.4× the smallest, beyond 10×" in " ".join(
        out.stdout.split())


# ---- every command that judges the response uses the recorded scale and says which --------

def _two_folders(tmp_path):
    from history_helpers import write_folder

    rng = np.random.default_rng(17)
    vals = {(c,): list(np.exp(rng.normal(m, 0.1, 4))) for c, m in (("zlib", 0.0), ("lzma", 0.7))}
    a = write_folder(tmp_path / "a", "codecs", {"codec": ["zlib", "lzma"]}, vals)
    vals_b = {k: [x * 1.3 for x in v] for k, v in vals.items()}
    b = write_folder(tmp_path / "b", "codecs", {"codec": ["zlib", "lzma"]}, vals_b)
    return a, b


def test_choose_compare_and_history_use_the_scale_the_analysis_records(tmp_path):
    from benchharness.analysis import write_analysis_json
    from benchharness.choose import choose
    from benchharness.history.cells import summarize_cells
    from benchharness.history.compare import compare_folders
    from benchharness.history.folder import read_folder

    a, b = _two_folders(tmp_path)
    # no analysis.json yet: the same rule, log for positive times
    ch = choose(a)
    assert ch.scale == "log"
    assert ch.scale_reason == "the log scale, the default for a positive, ratio-scaled response"
    cmp_ = compare_folders(a, b)
    assert cmp_.scale == "log" and cmp_.cells[0].estimate == pytest.approx(1.3, rel=1e-9)
    # the analysis recorded the original scale (asked for): every command follows it
    write_analysis_json(analyze(a, transform="none"), a / "analysis.json")
    ch = choose(a)
    assert ch.scale == "none"
    assert ch.scale_reason == "the original scale, the scale analysis.json records for wall_s"
    from benchharness.choose.render import terminal_text

    assert ("analysed on the original scale, the scale analysis.json records for wall_s"
            in terminal_text(ch))
    cmp_ = compare_folders(a, b)
    assert cmp_.scale == "linear" and "records for wall_s" in cmp_.scale_reason
    d = read_folder(a)
    assert {c.scale for c in summarize_cells(d.runs, d.factors, "wall_s", folder=a)} == {"linear"}
    assert {c.scale for c in summarize_cells(d.runs, d.factors, "wall_s")} == {"log"}


def test_compare_command_says_which_scale(tmp_path, main_cli):
    a, b = _two_folders(tmp_path)
    out = main_cli("compare", a, b)
    assert out.returncode == 0, out.stderr
    assert ("Compared on the log scale, the default for a positive, ratio-scaled response."
            in " ".join(out.stdout.split()))


def test_profile_sentences():
    from benchharness.analysis.transform import Profile

    def say(lh, ci, ci99, open_=(False, False)):
        return Profile(lh, ci, open_, (), (), 0.0, ci99, 20.0).sentence()

    assert say(0.05, (-0.3, 0.4), (-0.45, 0.55)) == (
        "the data are consistent with the log scale (λ̂ = 0.05, 95% interval −0.30 to 0.40)")
    assert say(0.6, (0.1, 1.1), (-0.1, 1.3)) == (
        "the data lean away from the log scale, but not strongly (λ̂ = 0.60, 95% interval 0.10 "
        "to 1.10; λ = 0 is inside the 99% interval −0.10 to 1.30)")
    assert say(0.9, (0.5, 1.3), (0.4, 1.4)) == (
        "the data are not consistent with the log scale (λ̂ = 0.90, 95% interval 0.50 to 1.30; "
        "99% interval 0.40 to 1.40); they are consistent with no transform (λ = 1)")
    assert "95% interval −0.01 to 5.00 or higher" in say(5.0, (-0.01, 5.0), (-0.3, 5.0),
                                                            (False, True))
