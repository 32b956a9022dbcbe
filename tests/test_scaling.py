"""Parallel factors: speed-up, efficiency and Amdahl's serial fraction.

A planted serial fraction is recovered inside its interval at the stated rate
(fixed-seed simulation; the long version is marked slow); the point estimate
is checked against scipy's nonlinear least squares on the same rows, the
speed-up interval against statsmodels; and what the analysis says is asserted.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from benchharness.analysis import analyze

THREADS = (1, 2, 4, 8, 16)
SIZES = (1000, 8000)


def _frame(rng, s=0.08, sd=0.05, reps=3, threads=THREADS, overhead=0.0, rate=False):
    """T = W(n)·(s + (1 − s)/p + overhead·p) · noise; a rate is 1/T."""
    rows = []
    for p in threads:
        for n in SIZES:
            w = 1e-3 * (n / 1000) ** 1.1
            for _ in range(reps):
                t = w * (s + (1 - s) / p + overhead * p) * np.exp(rng.normal(0, sd))
                rows.append({"threads": str(p), "n": str(n),
                             **({"ops_per_s": 1.0 / t} if rate else {"wall_s": t})})
    return pd.DataFrame(rows)


def _serial(df, response="wall_s", better=None):
    from benchharness.analysis.numeric import trends
    from benchharness.analysis.prepare import prepare

    prep = prepare(df, response=response, factors=["threads", "n"])
    (tr,) = [t for t in trends(prep, 0.05, [], None, better or "lower")
             if t["factor"] == "threads"]
    return tr["scaling"]


def _coverage(sims, seed):
    rng = np.random.default_rng(seed)
    hits = 0
    for _ in range(sims):
        sf = _serial(_frame(rng))["serial_fraction"]
        hits += sf["lower"] <= 0.08 <= sf["upper"]
    return hits


def test_planted_serial_fraction_is_inside_its_interval_at_the_stated_rate_fast():
    # 40 fixed-seed experiments at 95%: about 38 should cover 0.08; 33 or fewer would
    # happen by chance about 1 time in 700 (binomial, 40, 0.95)
    hits = _coverage(40, seed=101)
    assert hits >= 34


@pytest.mark.slow
def test_planted_serial_fraction_is_inside_its_interval_at_the_stated_rate():
    # 1000 experiments: coverage within ±2.2 points of 95% (three binomial standard errors)
    hits = _coverage(1000, seed=202)
    assert 0.928 <= hits / 1000 <= 0.972


def test_serial_fraction_matches_scipy_nonlinear_least_squares_on_the_log_scale():
    from scipy.optimize import least_squares

    rng = np.random.default_rng(9)
    df = _frame(rng, s=0.15)
    sf = _serial(df)["serial_fraction"]
    p = df["threads"].astype(float).to_numpy()
    g = (df["n"] == "8000").to_numpy().astype(int)
    z = np.log(df["wall_s"].to_numpy())

    def resid(theta):     # one log T1 per input size, a common serial fraction
        a, s = theta[:2], theta[2]
        return z - a[g] - np.log(s + (1 - s) / p)

    # reference: scipy's least_squares on the same model and rows
    ref = least_squares(resid, x0=[z.mean(), z.mean(), 0.5], bounds=([-50, -50, 0],
                                                                      [50, 50, 1]),
                        xtol=1e-14, ftol=1e-14)
    assert sf["estimate"] == pytest.approx(ref.x[2], abs=1e-6)
    assert sf["lower"] < 0.15 < sf["upper"]


def test_speedup_interval_matches_statsmodels_full_model():
    import statsmodels.formula.api as smf

    rng = np.random.default_rng(4)
    df = _frame(rng)
    sc = _serial(df)
    # reference: statsmodels cell-means model; balanced, so a marginal mean is the plain
    # mean of log y at that level, with standard error sqrt(MSE (1/m + 1/m))
    fit = smf.ols("np.log(wall_s) ~ C(threads) * C(n)", df).fit()
    z = np.log(df["wall_s"])
    m = (df["threads"] == "1").sum()
    se = np.sqrt(fit.mse_resid * 2 / m)
    from scipy.stats import t as t_dist

    q = t_dist.ppf(0.975, fit.df_resid)
    for row in sc["speedups"][1:]:        # the first is threads=1 against itself
        d = z[df["threads"] == "1"].mean() - z[df["threads"] == row["level"]].mean()
        assert row["speedup"] == pytest.approx(np.exp(d), rel=1e-9)
        assert row["lower"] == pytest.approx(np.exp(d - q * se), rel=1e-9)
        assert row["efficiency"] == pytest.approx(np.exp(d) / float(row["level"]), rel=1e-9)


def test_what_the_analysis_says_about_a_planted_scaling():
    rng = np.random.default_rng(12)
    an = analyze(_frame(rng, s=0.08, sd=0.03), factors=["threads", "n"])
    (sc,) = [f for f in an.findings if f["kind"] == "scaling"]
    assert sc["significant"] and sc["amdahl_fits"]
    assert sc["serial_lower"] < 0.08 < sc["serial_upper"]
    # 16 threads with 8% serial work: 1/(0.08 + 0.92/16) = 7.3x (Amdahl's formula)
    assert sc["speedup"] == pytest.approx(1 / (0.08 + 0.92 / 16), rel=0.05)
    assert sc["statement"].startswith("threads=16 is 7.")
    assert "as fast as threads=1" in sc["statement"]
    assert "Amdahl's law fits with a serial fraction of 0.0" in sc["statement"]
    from benchharness.report.story import headline

    head = headline(list(an.findings))
    assert "threads=16 is 7." in head and "serial fraction 0.0" in head
    assert head.count("threads=16 is") == 1


def test_an_overhead_that_grows_with_threads_is_not_called_amdahl():
    rng = np.random.default_rng(13)
    df = _frame(rng, s=0.05, sd=0.03, overhead=0.02)   # time rises again past ~8 threads
    an = analyze(df, factors=["threads", "n"])
    (sc,) = [f for f in an.findings if f["kind"] == "scaling"]
    assert sc["amdahl_fits"] is False
    assert "Amdahl's law does not describe these timings" in sc["statement"]
    # planted T ∝ 0.05 + 0.95/p + 0.02·p: fastest at p = 8 (0.339 against 0.419 at 16), so the
    # speed-up peaks there; and the bend of the log-log trend is not a serial part's bend
    assert "the largest measured speed-up is at threads=8 (" in sc["statement"]
    assert "the largest measured speed-up is at threads=8 (" in sc["short"]
    (tr,) = [f for f in an.findings if f["kind"] == "trend" and f["factors"] == ["threads"]]
    assert "as they do when part of the work is serial" not in tr["statement"]
    assert "Amdahl's law does not fit either" in tr["statement"]


def test_a_throughput_scales_the_other_way():
    rng = np.random.default_rng(14)
    df = _frame(rng, s=0.1, sd=0.03, rate=True)
    an = analyze(df, response="ops_per_s", factors=["threads", "n"], better="higher")
    (sc,) = [f for f in an.findings if f["kind"] == "scaling"]
    assert sc["speedup"] > 4 and sc["serial_lower"] < 0.1 < sc["serial_upper"]
    assert sc["statement"].startswith("threads=16 is ")


def test_without_replicates_only_the_serial_fraction_is_said_and_its_fit_is_not_claimed():
    rng = np.random.default_rng(15)
    an = analyze(_frame(rng, s=0.1, sd=0.03, reps=1), factors=["threads", "n"])
    (sc,) = [f for f in an.findings if f["kind"] == "scaling"]
    assert sc["amdahl_fits"] is None and sc["speedup"] is None
    assert "without replicates neither the speed-ups' intervals nor the law's fit" in \
        sc["statement"]
    assert sc["serial_lower"] < 0.1 < sc["serial_upper"]
    # five thread counts: what is missing is the pure error, not levels
    (tr,) = [f for f in an.findings if f["kind"] == "trend" and f["factors"] == ["threads"]]
    assert "with two levels" not in tr["statement"]
    assert "cannot be checked without repeated runs" in tr["statement"]


def test_with_two_thread_counts_the_law_is_not_said_to_fit():
    """Two levels: Amdahl's law passes exactly through both means, so 'fits' would be a
    claim the data cannot make; the serial fraction is given as the law's reading."""
    rng = np.random.default_rng(16)
    df = _frame(rng, s=0.1, sd=0.03, threads=(1, 8))
    an = analyze(df[df["n"] == "1000"], factors=["threads"])     # one T1, one s: exact
    (sc,) = [f for f in an.findings if f["kind"] == "scaling"]
    assert "Amdahl's law fits" not in sc["statement"]
    assert "by Amdahl's law (whose fit cannot be checked with these levels)" in sc["statement"]
    assert sc["serial_lower"] < 0.1 < sc["serial_upper"]


def test_choose_says_what_a_larger_parallel_setting_could_give_and_recommends_none():
    import re

    from benchharness.choose import choose
    from benchharness.choose.scaling import gain_from_doubling

    rng = np.random.default_rng(16)
    ch = choose(_frame(rng, s=0.08, sd=0.03), factors=["threads", "n"])
    assert ch.best == {"threads": "16"}
    (said,) = [r for r in ch.reasons if "largest threads tested" in r]
    assert "no larger one was run, so none is recommended" in said
    # Amdahl's formula (from memory): with s = 0.08, 32 threads over 16 is 1.264x
    assert gain_from_doubling(0.08, 16) == pytest.approx(0.1375 / 0.10875)
    lo, hi = map(float, re.search(r"\[([0-9.]+)× to ([0-9.]+)×\] as fast as threads=16",
                                  said).groups())
    assert lo < gain_from_doubling(0.08, 16) < hi
    # an overhead past 8 threads: the best is not the largest level, nothing is said
    ch = choose(_frame(rng, s=0.05, sd=0.03, overhead=0.01), factors=["threads", "n"])
    assert ch.best != {"threads": "16"}
    assert not [r for r in ch.reasons if "largest threads tested" in r]
