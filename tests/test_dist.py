"""The light distribution functions, Shapiro-Wilk and root finding against scipy.

benchharness.analysis.dist, .swilk and .roots stand in for scipy.stats and
scipy.optimize so that commands start fast; every check here compares them with
scipy itself (the reference: scipy.stats distributions, scipy.stats.shapiro,
scipy.stats.rankdata / spearmanr, scipy.optimize.brentq / minimize_scalar).
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest

from benchharness.analysis import dist, roots
from benchharness.analysis.swilk import shapiro_wilk

X = np.array([-3, -0.5, 0, 0.3, 1, 2.5, 10, 50, np.nan, np.inf])
Q = np.array([0, 1e-12, 0.025, 0.5, 0.975, 1 - 1e-12, 1, np.nan])


def close(a, b):
    return np.allclose(np.asarray(a, float), np.asarray(b, float), rtol=1e-12, atol=1e-300,
                       equal_nan=True)


@pytest.mark.parametrize("d1,d2", [(1, 1), (2, 27), (5.5, 100), (3, 0.5), (1, np.inf), (0, 3)])
def test_f_tail_equals_scipy(d1, d2):
    from scipy import stats  # reference: scipy.stats.f

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert close(dist.f.sf(X, d1, d2), stats.f.sf(X, d1, d2))


@pytest.mark.parametrize("df", [1, 2.5, 10, 300, 1e6, np.inf])
def test_t_tail_and_quantile_equal_scipy(df):
    from scipy import stats  # reference: scipy.stats.t

    assert close(dist.t.sf(X, df), stats.t.sf(X, df))
    assert close(dist.t.ppf(Q, df), stats.t.ppf(Q, df))
    assert isinstance(dist.t.ppf(0.975, df), np.floating)   # scalars stay scalars


@pytest.mark.parametrize("df", [1, 2, 7.5, 100])
def test_chi2_and_normal_equal_scipy(df):
    from scipy import stats  # reference: scipy.stats.chi2, scipy.stats.norm

    assert close(dist.chi2.ppf(Q, df), stats.chi2.ppf(Q, df))
    assert close(dist.chi2.isf(Q, df), stats.chi2.isf(Q, df))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert close(dist.chi2.logpdf(X, df), stats.chi2.logpdf(X, df))
    assert close(dist.norm.sf(X), stats.norm.sf(X))
    assert close(dist.norm.ppf(Q), stats.norm.ppf(Q))


def test_ranks_and_spearman_equal_scipy():
    from scipy import stats  # reference: scipy.stats.rankdata, scipy.stats.spearmanr

    rng = np.random.default_rng(4)
    for n in (3, 10, 200):
        a = np.round(rng.normal(size=n), 1)          # ties on purpose
        b = a + np.round(rng.normal(size=n), 1)
        assert close(dist.rankdata(a), stats.rankdata(a))
        ours, ref = dist.spearmanr(a, b), stats.spearmanr(a, b)
        assert ours.statistic == pytest.approx(ref.statistic, rel=1e-12)
        assert ours.pvalue == pytest.approx(ref.pvalue, rel=1e-9)


@pytest.mark.parametrize("n", [3, 4, 5, 6, 7, 11, 12, 30, 200, 5000])
def test_shapiro_wilk_equals_scipy(n):
    from scipy import stats  # reference: scipy.stats.shapiro (AS R94)

    rng = np.random.default_rng(n)
    for x in (rng.normal(size=n), rng.exponential(size=n), rng.uniform(size=n),
              np.round(rng.normal(size=n), 1)):
        w, p = shapiro_wilk(x)
        ref = stats.shapiro(x)
        assert w == pytest.approx(ref.statistic, abs=1e-6)
        assert p == pytest.approx(ref.pvalue, abs=1e-6)


def test_shapiro_wilk_conclusions_on_planted_samples():
    # planted truth: normal data is not rejected, strongly skewed data is (fixed seed)
    rng = np.random.default_rng(11)
    assert shapiro_wilk(rng.normal(size=300))[1] > 0.05
    assert shapiro_wilk(rng.lognormal(0, 1, size=300))[1] < 1e-6


def test_brent_root_equals_scipy():
    from scipy import optimize  # reference: scipy.optimize.brentq

    cases = [(lambda x: x ** 3 - 2 * x - 5, 2, 3), (math.cos, 0, 3),
             (lambda x: math.exp(x) - 10, -5, 10), (lambda x: (x - 1) ** 5, 0, 3),
             (lambda x: math.atan(x - 0.3), -100, 100)]
    for f, a, b in cases:
        for xtol in (1e-10, 5e-4):
            ours = roots.brentq(f, a, b, xtol=xtol)
            assert abs(ours - optimize.brentq(f, a, b, xtol=xtol)) <= 2 * xtol
            assert abs(f(ours)) <= abs(f(ours + 4 * xtol)) + abs(f(ours - 4 * xtol))
    with pytest.raises(ValueError):
        roots.brentq(lambda x: x * x + 1, -1, 1)


def test_bounded_minimum_equals_scipy():
    from scipy import optimize  # reference: scipy.optimize.minimize_scalar(method="bounded")

    for f, a, b in [(lambda x: (x - 0.37) ** 2, -1, 1), (lambda x: -math.sin(x), 0, 3),
                    (lambda x: abs(x - 0.2), 0, 1)]:
        ref = optimize.minimize_scalar(f, bounds=(a, b), method="bounded",
                                       options={"xatol": 2e-4}).x
        ours = roots.minimize_scalar(f, bounds=(a, b), method="bounded",
                                     options={"xatol": 2e-4}).x
        assert abs(ours - ref) < 4e-4
