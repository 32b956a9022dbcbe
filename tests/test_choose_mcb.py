"""Critical values and MCB intervals of benchharness.choose.mcb against outside references."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from benchharness.choose.mcb import (dunnett_critical, many_to_one_cdf, many_to_one_critical,
                                     mcb)


def _scipy_critical(samples, control, confidence=0.95):
    """The one-sided critical value scipy.stats.dunnett uses for its intervals."""
    r = stats.dunnett(*samples, control=control, alternative="greater", random_state=11)
    ci = r.confidence_interval(confidence)
    diff = r._mean_samples - r._mean_control
    allowance = diff - np.asarray(ci.low)
    return r, allowance / (r._std * np.sqrt(1 / r._n_samples + 1 / r._n_control))


@pytest.mark.parametrize("sizes,n0", [([5, 5, 5], 5), ([4, 5, 8], 6), ([3, 10], 4),
                                      ([6, 6, 6, 6, 6, 6], 6)])
def test_critical_value_agrees_with_scipy_dunnett_one_sided(sizes, n0):
    # Source: scipy.stats.dunnett (alternative="greater", many-to-one), whose
    # interval allowance is critical * s * sqrt(1/n_i + 1/n_0). Its multivariate t
    # integration is randomized quasi-Monte Carlo with tolerance 1e-3, so we allow 3e-3.
    rng = np.random.default_rng(len(sizes) * 100 + n0)
    control = rng.normal(0, 1, n0)
    samples = [rng.normal(0, 1, n) for n in sizes]
    r, crit = _scipy_critical(samples, control)
    ours = dunnett_critical(n0, sizes, r._df, 0.95)
    assert np.allclose(crit, ours, rtol=3e-3)


def test_pvalues_agree_with_scipy_dunnett():
    # Source: scipy.stats.dunnett p-values (one-sided "greater"): 1 - P(max T <= t_i).
    rng = np.random.default_rng(5)
    control = rng.normal(0, 1, 7)
    samples = [rng.normal(m, 1, n) for m, n in [(0.2, 5), (1.0, 6), (1.6, 9)]]
    r = stats.dunnett(*samples, control=control, alternative="greater", random_state=3)
    lam = np.sqrt(r._n_samples / (r._n_samples + r._n_control))
    ours = [1 - many_to_one_cdf(t, lam, r._df) for t in r.statistic]
    assert np.allclose(ours, r.pvalue, atol=3e-4)


@pytest.mark.parametrize("df", [2, 5, 12, 60, np.inf])
def test_single_comparison_is_student_t(df):
    # Source: scipy.stats.t -- with one comparison the many-to-one
    # distribution is Student's t whatever the correlation weight.
    assert many_to_one_critical([0.6], df, 0.95) == pytest.approx(stats.t.ppf(0.95, df), abs=1e-5)
    for d in (-1.0, 0.3, 2.5):
        assert many_to_one_cdf(d, [0.3], df) == pytest.approx(stats.t.cdf(d, df), abs=1e-6)


def test_cdf_agrees_with_scipy_multivariate_t():
    # Source: scipy.stats.multivariate_t.cdf with the product correlation
    # rho_jk = lambda_j lambda_k (randomized QMC; tolerance 2e-3).
    lam = np.array([0.5, 0.7, 0.6])
    rho = np.outer(lam, lam)
    np.fill_diagonal(rho, 1.0)
    mvt = stats.multivariate_t(shape=rho, df=9, seed=1)
    for d in (0.5, 1.5, 2.3):
        ref = mvt.cdf(np.full(3, d), maxpts=200_000)
        assert many_to_one_cdf(d, lam, 9) == pytest.approx(ref, abs=2e-3)


@pytest.mark.parametrize("p,df,value", [(2, np.inf, 1.92), (3, np.inf, 2.06), (4, np.inf, 2.16),
                                        (5, np.inf, 2.23), (2, 20, 2.03), (3, 20, 2.19),
                                        (4, 20, 2.30), (2, 10, 2.15)])
def test_dunnett_table_values(p, df, value):
    # Dunnett's (1955) one-sided table, equal group sizes, alpha = 0.05, p
    # comparisons: values typed from memory (two decimals).
    assert dunnett_critical(5, [5] * p, df, 0.95) == pytest.approx(value, abs=0.006)


def test_mcb_tied_set_matches_scipy_dunnett_with_each_setting_as_control():
    # Hsu (1984): setting i stays tied with the best exactly when the one-sided
    # many-to-one test with i as the control rejects for no other setting.
    # Reference: scipy.stats.dunnett(alternative="greater") on the same data
    # (it pools the variance over all groups given, as MCB does).
    rng = np.random.default_rng(21)
    true = [0.0, 0.15, 0.9, 1.0, 1.05]
    groups = [rng.normal(m, 0.3, n) for m, n in zip(true, [6, 6, 7, 6, 8])]
    means = np.array([g.mean() for g in groups])
    n = np.array([g.size for g in groups])
    dfe = n.sum() - len(groups)
    s = np.sqrt(sum(((g - g.mean()) ** 2).sum() for g in groups) / dfe)
    res = mcb(means, 1.0 / n, s, dfe, 0.95)
    for i in range(len(groups)):
        others = [g for j, g in enumerate(groups) if j != i]
        r = stats.dunnett(*others, control=groups[i], alternative="greater", random_state=2)
        assert res.tied[i] == bool(np.all(r.pvalue >= 0.05)), i
    assert res.tied == (False, False, True, True, True)


def _coverage(mu, n, sigma, reps, seed):
    """Share of replicates where every constrained interval holds mu_i - max_{j != i} mu_j."""
    rng = np.random.default_rng(seed)
    mu, n = np.asarray(mu, float), np.asarray(n)
    dfe = int(n.sum() - len(mu))
    theta = np.array([mu[i] - np.delete(mu, i).max() for i in range(len(mu))])
    covered = 0
    for _ in range(reps):
        groups = [m + rng.normal(0, sigma, k) for m, k in zip(mu, n)]
        means = np.array([g.mean() for g in groups])
        s = np.sqrt(sum(((g - g.mean()) ** 2).sum() for g in groups) / dfe)
        r = mcb(means, 1.0 / n, s, dfe, 0.95)
        covered += np.all((np.array(r.low) - 1e-12 <= theta) & (theta <= np.array(r.high) + 1e-12))
    return covered / reps


def test_mcb_intervals_hold_the_truth_in_simulation():
    # Planted truth: simultaneous coverage of the constrained intervals must be
    # at least the confidence (Hsu 1984), with equal and with unequal group sizes.
    # 300 draws at 0.95: three standard errors below is about 0.912.
    assert _coverage([0.0, 0.1, 0.2, 0.5], [4, 4, 4, 4], 0.3, 300, seed=8) >= 0.91
    assert _coverage([0.0, 0.0, 0.3, 0.35], [3, 9, 5, 4], 0.3, 300, seed=9) >= 0.91


@pytest.mark.slow
def test_mcb_coverage_long_simulation():
    # With one best and all others equal, the upper bound of the best fails
    # exactly when the many-to-one event fails, so coverage should sit at the
    # confidence, not far above it (4000 draws: one standard error ~0.0035).
    eq = _coverage([1.0, 0.0, 0.0, 0.0, 0.0], [5, 5, 5, 5, 5], 1.0, 4000, seed=1)
    assert 0.939 <= eq <= 0.961
    uneq = _coverage([1.0, 0.0, 0.0, 0.0], [3, 9, 5, 4], 1.0, 4000, seed=3)
    assert 0.939 <= uneq <= 0.961


def test_single_setting_and_noise_free_data():
    one = mcb([1.0], [0.5], 0.1, 4, 0.95)
    assert one.tied == (True,)
    exact = mcb([1.0, 1.0, 0.0], [0.5, 0.5, 0.5], 0.0, 4, 0.95)
    assert exact.tied == (True, True, False)
