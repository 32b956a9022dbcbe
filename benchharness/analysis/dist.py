"""The few distribution functions the analysis needs, from the special functions alone.

Importing the whole statistics package of scipy costs about half a second of every
command's start-up (it loads every distribution, test and optimiser it has),
while the analysis needs a handful of tail areas and quantiles. These are thin
wrappers over ``scipy.special`` (a tenth of that cost), written so that a module
can say ``from benchharness.analysis import dist as stats`` and keep its calls
(``stats.t.ppf(q, df)``, ``stats.f.sf(x, d1, d2)``, ...):

* ``f.sf``: upper tail of the F distribution (``fdtrc``, the regularised
  incomplete beta function);
* ``t.sf``, ``t.ppf``: Student's t (``stdtr``, ``stdtrit``);
* ``norm.sf``, ``norm.ppf``: the standard normal (``ndtr``, ``ndtri``);
* ``chi2.ppf``, ``chi2.isf``, ``chi2.logpdf``: chi-square through the regularised
  incomplete gamma function and its inverses;
* ``rankdata``: mid-ranks (ties share the mean of their ranks);
* ``spearmanr``: Spearman's rank correlation (Spearman 1904) with the two-sided
  p-value of ``r sqrt((n-2)/(1-r²))`` against t(n−2), the usual large-sample
  approximation (the one ``scipy.stats.spearmanr`` uses);
* ``shapiro``: the Shapiro-Wilk test (`benchharness.analysis.swilk`).

Each agrees with ``scipy.stats`` to rounding (tests/test_dist.py compares them).
"""

from __future__ import annotations

import math
from types import SimpleNamespace

import numpy as np


def _out(x):
    """A numpy scalar for scalar input (as scipy returns), else the array."""
    x = np.asarray(x, dtype=float)
    return x[()] if x.ndim == 0 else x


class _F:
    @staticmethod
    def sf(x, dfn, dfd):
        """P(F > x) for F(dfn, dfd)."""
        from scipy.special import fdtrc

        x = np.asarray(x, dtype=float)
        bad = ~((np.asarray(dfn) > 0) & (np.asarray(dfd) > 0))     # not a distribution
        out = np.where(x <= 0, 1.0, fdtrc(dfn, dfd, np.maximum(x, 0.0)))
        return _out(np.where(bad | np.isnan(x), np.nan, out))


class _T:
    @staticmethod
    def sf(x, df):
        """P(T > x) for Student's t with ``df`` degrees of freedom."""
        from scipy.special import stdtr

        return _out(stdtr(df, -np.asarray(x, dtype=float)))

    @staticmethod
    def ppf(q, df):
        """The x with P(T ≤ x) = q."""
        from scipy.special import stdtrit

        q = np.asarray(q, dtype=float)
        return _out(np.where(q == 0, -np.inf, stdtrit(df, q)))


class _Norm:
    @staticmethod
    def sf(x):
        from scipy.special import ndtr

        return _out(ndtr(-np.asarray(x, dtype=float)))

    @staticmethod
    def cdf(x):
        from scipy.special import ndtr

        return _out(ndtr(np.asarray(x, dtype=float)))

    @staticmethod
    def ppf(q):
        from scipy.special import ndtri

        return _out(ndtri(np.asarray(q, dtype=float)))


class _Chi2:
    @staticmethod
    def ppf(q, df):
        """The x with P(X ≤ x) = q: 2·P⁻¹(df/2, q) (regularised lower incomplete gamma)."""
        from scipy.special import gammaincinv

        return _out(2.0 * gammaincinv(np.asarray(df, dtype=float) / 2.0,
                                      np.asarray(q, dtype=float)))

    @staticmethod
    def isf(q, df):
        """The x with P(X > x) = q (upper incomplete gamma inverted: exact for tiny q)."""
        from scipy.special import gammainccinv

        return _out(2.0 * gammainccinv(np.asarray(df, dtype=float) / 2.0,
                                       np.asarray(q, dtype=float)))

    @staticmethod
    def logpdf(x, df):
        from scipy.special import gammaln, xlogy

        x = np.asarray(x, dtype=float)
        k = np.asarray(df, dtype=float) / 2.0
        out = xlogy(k - 1.0, x) - x / 2.0 - gammaln(k) - k * math.log(2.0)
        return _out(np.where(x < 0, -np.inf, out))


f = _F()
t = _T()
norm = _Norm()
chi2 = _Chi2()


def rankdata(a) -> np.ndarray:
    """Ranks 1..n of ``a`` (flattened), ties given the mean of the ranks they span."""
    a = np.ravel(np.asarray(a))
    n = a.size
    order = np.argsort(a, kind="mergesort")
    s = a[order]
    new = np.ones(n, dtype=bool)
    if n > 1:
        new[1:] = s[1:] != s[:-1]
    group = np.cumsum(new) - 1                  # tie group of each sorted value
    starts = np.flatnonzero(new)                # first sorted index of each group
    ends = np.append(starts[1:], n)             # one past the last
    mid = (starts + ends + 1) / 2.0             # mean of ranks starts+1 .. ends
    ranks = np.empty(n, dtype=float)
    ranks[order] = mid[group]
    return ranks


def spearmanr(x, y):
    """Spearman's rank correlation of two samples and its two-sided p-value."""
    rx, ry = rankdata(x), rankdata(y)
    n = rx.size
    dx, dy = rx - rx.mean(), ry - ry.mean()
    den = math.sqrt(float(dx @ dx) * float(dy @ dy))
    r = float(dx @ dy) / den if den > 0 else float("nan")
    if not math.isfinite(r) or n < 3:
        p = float("nan")
    else:
        r = max(-1.0, min(1.0, r))
        dof = n - 2
        if abs(r) >= 1.0:
            p = 0.0
        else:
            tt = r * math.sqrt(dof / ((1.0 - r) * (1.0 + r)))
            p = float(2.0 * t.sf(abs(tt), dof))
    return SimpleNamespace(statistic=np.float64(r), pvalue=np.float64(p),
                           correlation=np.float64(r))


def shapiro(x):
    """Shapiro-Wilk W and p-value (`benchharness.analysis.swilk.shapiro_wilk`)."""
    from benchharness.analysis.swilk import shapiro_wilk

    w, p = shapiro_wilk(x)
    return SimpleNamespace(statistic=np.float64(w), pvalue=np.float64(p))
