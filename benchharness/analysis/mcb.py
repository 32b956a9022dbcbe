"""Multiple comparisons with the best: which settings cannot be told apart from the best.

This module owns the statistics of "best or tied": the one-sided many-to-one
critical values (the distribution of Dunnett 1955's one-sided test) and Hsu's
constrained multiple comparisons with the best (Hsu 1981, 1984; the
unequal-variance-weight form as in Hsu, *Multiple Comparisons*, 1996, ch. 4).

Everything here is on a "larger is better" scale: callers pass *goodness*
values (for times on the log scale, goodness is ``-log(time)``). Inputs are
plain arrays; outputs are plain arrays in a frozen dataclass.

The model behind the intervals: setting ``i`` has an estimated mean ``m_i`` whose
variance is ``sigma^2 * w_i`` (``w_i = 1/n_i`` for a plain cell mean), the
estimates are independent, and ``sigma^2`` is estimated by a pooled residual
variance on ``df`` degrees of freedom, independent of the means.

Critical values. For setting ``i`` taken as the "control", the statistics
``T_j = ((m_i - mu_i) - (m_j - mu_j)) / (s * sqrt(w_i + w_j))`` (``j != i``) are
multivariate t with correlations ``rho_jk = lambda_j * lambda_k``,
``lambda_j = sqrt(w_i / (w_i + w_j))``. That product structure turns the
``(k-1)``-variate t probability into a two-dimensional integral (Dunnett 1955)::

    P(all T_j <= d) = E_s E_z prod_j Phi((lambda_j z + d s) / sqrt(1 - lambda_j^2))

with ``z`` standard normal and ``s = sqrt(chi2_df / df)``. We evaluate it by
deterministic quadrature (Gauss-Hermite in ``z``, Gauss-Legendre in the
probability scale of ``s``), so critical values are reproducible to ~1e-6,
unlike Monte Carlo estimates. ``d_i`` solves ``P = confidence``.

Constrained MCB intervals (Hsu 1984) for ``theta_i = mu_i - max_{j != i} mu_j``,
simultaneous at the chosen confidence::

    D_i^+ = max(0, min_{j != i} (m_i - m_j + d_i * s * sqrt(w_i + w_j)))
    G     = {i : D_i^+ > 0}                  # not shown worse than the best
    D_i^- = 0                                           if G == {i}
          = min(0, min_{j in G, j != i} (m_i - m_j - d_j * s * sqrt(w_i + w_j)))   otherwise
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache

import numpy as np

__all__ = [
    "critical_values",
    "bounding_critical_values",
    "tie_confidence",
    "many_to_one_cdf",
    "many_to_one_critical",
    "dunnett_critical",
    "MCBResult",
    "mcb",
]

# Quadrature sizes: the one-comparison case reproduces scipy.stats.t.cdf to
# about 1e-7 for df >= 1, and critical values move by < 2e-6 against rules
# twice as large (see tests).
_Z_NODES = 64
_S_NODES = 96


@lru_cache(maxsize=1)
def _z_rule():
    from numpy.polynomial.hermite_e import hermegauss

    x, w = hermegauss(_Z_NODES)  # weight exp(-x^2/2)
    return x, w / np.sqrt(2.0 * np.pi)


@lru_cache(maxsize=64)
def _s_rule(df: float):
    """Nodes and weights for s = sqrt(chi2_df/df) (a point mass at 1 when df is infinite)."""
    if not np.isfinite(df):
        return np.array([1.0]), np.array([1.0])
    from scipy.special import chdtri  # inverse survival function of chi-square

    # Gauss-Legendre on u in (0, 1) after the probability transform
    # s = sqrt(chi2.ppf(u)/df); the integrand is bounded and smooth inside.
    # Two panels split at the median keep the endpoints' square-root
    # behaviour from spoiling accuracy.
    x, w = np.polynomial.legendre.leggauss(_S_NODES // 2)
    panels = [(0.0, 0.02), (0.02, 0.5), (0.5, 0.98), (0.98, 1.0)]
    us, ws = [], []
    for a, b in panels:
        us.append(a + (b - a) * (x + 1) / 2)
        ws.append(w * (b - a) / 2)
    u = np.concatenate(us)
    wt = np.concatenate(ws)
    s = np.sqrt(chdtri(df, 1.0 - u) / df)
    return s, wt


def many_to_one_cdf(d, lambdas, df) -> float:
    """P(T_j <= d for all j) for multivariate t with correlations lambda_j*lambda_k.

    ``lambdas`` are in [0, 1); ``df`` may be ``np.inf`` (multivariate normal).
    """
    from scipy.special import log_ndtr

    lam = np.asarray(lambdas, dtype=float).reshape(-1)
    if lam.size == 0:
        return 1.0
    if np.any(lam < 0) or np.any(lam >= 1):
        raise ValueError("lambdas must lie in [0, 1)")
    z, wz = _z_rule()
    s, ws = _s_rule(float(df))
    # equal weights give equal factors: evaluate each distinct lambda once
    lam, mult = np.unique(np.round(lam, 14), return_counts=True)
    root = np.sqrt(1.0 - lam * lam)
    # shape (n_s, n_z, distinct lambdas)
    arg = (lam[None, None, :] * z[None, :, None] + d * s[:, None, None]) / root[None, None, :]
    prod = np.exp(log_ndtr(arg) @ mult.astype(float))
    return float(ws @ (prod @ wz))


def many_to_one_critical(lambdas, df, confidence: float = 0.95) -> float:
    """The one-sided critical value d with P(all T_j <= d) = confidence."""
    if not 0 < confidence < 1:
        raise ValueError("confidence must lie strictly between 0 and 1")
    lam = np.asarray(lambdas, dtype=float).reshape(-1)
    if lam.size == 0:
        return 0.0
    f = lambda d: many_to_one_cdf(d, lam, df) - confidence  # noqa: E731
    # Bracket: one comparison's t quantile below (the maximum is at least any
    # one statistic), Bonferroni's above (Dunnett 1955 notes both bounds).
    lo, hi = _t_quantile(confidence, df) - 1e-6, _t_quantile(1 - (1 - confidence) / lam.size, df) + 1e-6
    flo, fhi = f(lo), f(hi)
    if not flo <= 0:
        lo = -10.0
        flo = f(lo)
    while not fhi >= 0:
        hi = max(hi, 5.0) * 2
        if hi > 1e4:
            raise ValueError("critical value did not converge (too few degrees of freedom?)")
        fhi = f(hi)
    return _root(f, lo, hi, flo, fhi)


def _t_quantile(p: float, df) -> float:
    from scipy.special import ndtri, stdtrit

    return float(ndtri(p)) if not np.isfinite(df) else float(stdtrit(df, p))


def _root(f, a: float, b: float, fa: float, fb: float, tol: float = 1e-9) -> float:
    """Root of an increasing f bracketed by [a, b] (f(a) <= 0 <= f(b)): Illinois
    regula falsi with bisection steps (keeps scipy.optimize, a slow import, off
    the command path)."""
    if fa == 0:
        return float(a)
    if fb == 0:
        return float(b)
    side = 0
    for _ in range(200):
        if b - a <= tol:
            break
        c = b - fb * (b - a) / (fb - fa) if fb != fa else (a + b) / 2
        if not a < c < b:
            c = (a + b) / 2
        fc = f(c)
        if abs(fc) < 1e-12:  # the slope is ~0.1-1, so d is within ~1e-11
            return float(c)
        if (fc < 0) == (fa < 0):
            a, fa = c, fc
            if side == -1:
                fb /= 2
            side = -1
        else:
            b, fb = c, fc
            if side == 1:
                fa /= 2
            side = 1
    return float((a + b) / 2)


@lru_cache(maxsize=4096)
def _critical_cached(lambdas: tuple, df: float, confidence: float) -> float:
    # the critical value depends only on the sorted weights, df and level
    return many_to_one_critical(np.array(lambdas), df, confidence)


def dunnett_critical(n_control: int, n_others, df, confidence: float = 0.95) -> float:
    """One-sided many-to-one critical value for group sizes as in Dunnett (1955).

    ``n_others`` lists the sizes of the compared groups; correlations are
    ``1/sqrt((n0/ni + 1)(n0/nj + 1))``.
    """
    n_others = np.asarray(n_others, dtype=float)
    lambdas = np.sqrt(n_others / (n_others + float(n_control)))
    return many_to_one_critical(lambdas, df, confidence)


@dataclass(frozen=True)
class MCBResult:
    """Constrained MCB intervals on the goodness scale (larger is better).

    ``low[i], high[i]`` bound ``mu_i - max_{j != i} mu_j``; ``tied[i]`` is true
    when setting i is not shown worse than the best (``high[i] > 0``);
    ``critical[i]`` is d_i; ``sigma``/``df`` the residual standard deviation
    and its degrees of freedom.
    """

    means: tuple[float, ...]
    weights: tuple[float, ...]
    sigma: float
    df: float
    confidence: float
    critical: tuple[float, ...]
    low: tuple[float, ...]
    high: tuple[float, ...]
    tied: tuple[bool, ...]

    def to_dict(self) -> dict:
        return {
            "confidence": self.confidence,
            "sigma": self.sigma,
            "df": None if not np.isfinite(self.df) else self.df,
            "critical": list(self.critical),
            "low": list(self.low),
            "high": list(self.high),
            "tied": list(self.tied),
        }


def tie_confidence(confidence: float) -> float:
    """The level each one-sided bound of "best or tied" is drawn at, for a statement made
    at ``confidence``: (1 + confidence) / 2, so that with two settings the tie is exactly
    the two-sided t test (the ANOVA's F test of their factor), and a setting one command
    calls the best is never "no detectable difference" in the other. `analyze`'s tied set
    and `choose`'s both use it; with more settings it stays simultaneous and conservative
    at ``confidence`` (and sharper than a Bonferroni split over the comparisons)."""
    return (1.0 + float(confidence)) / 2.0


def critical_values(weights, df, confidence: float = 0.95) -> np.ndarray:
    """The one-sided critical value ``d_i`` of each setting taken as the control against
    all the others (``weights[i]`` = Var(mean i) / sigma²), as Hsu's MCB uses them.

    The correlations' factors are rounded to 12 decimals before the (cached) root, so
    settings with equal weights share one root; large unbalanced tables use
    `bounding_critical_values` instead (`analysis.findings`).
    """
    w = np.asarray(weights, dtype=float)
    d = np.empty(w.size)
    for i in range(w.size):
        lam = np.sqrt(w[i] / (w[i] + np.delete(w, i)))
        d[i] = _critical_cached(tuple(np.round(np.sort(lam), 12)), float(df),
                                float(confidence))
    return d


def bounding_critical_values(weights, df, confidence: float = 0.95) -> np.ndarray:
    """An upper bound of each `critical_values` entry that costs one root per distinct
    bound: every correlation factor of setting ``i`` replaced by the smallest of them,
    rounded down to 0.001. Smaller positive correlations of a multivariate t only raise
    its one-sided quantile (Slepian's inequality, Slepian 1962), so the bound is
    conservative; it is exact when the weights are equal (a balanced table), and on a
    large unbalanced table it solves a handful of one-factor roots instead of one root
    over all ``k − 1`` factors per setting (seconds at 180 settings)."""
    w = np.asarray(weights, dtype=float)
    d = np.empty(w.size)
    k = w.size
    for i in range(k):
        all_lam = np.sqrt(w[i] / (w[i] + np.delete(w, i)))
        lam = float(np.min(all_lam))
        lam = (round(lam, 12) if float(np.max(all_lam)) - lam < 1e-12 else
               math.floor(lam * 1000) / 1000)      # equal weights: exact
        d[i] = _critical_cached((lam,) * (k - 1), float(df), float(confidence))
    return d


def mcb(means, weights, sigma: float, df, confidence: float = 0.95) -> MCBResult:
    """Hsu's constrained MCB intervals for larger-is-better ``means``.

    ``weights[i]`` is Var(means[i]) / sigma^2 (1/n for a cell mean of n runs).
    """
    m = np.asarray(means, dtype=float)
    w = np.asarray(weights, dtype=float)
    k = m.size
    if k < 1 or w.shape != m.shape:
        raise ValueError("means and weights must be equal-length, non-empty")
    if np.any(w <= 0) or not np.isfinite(sigma) or sigma < 0:
        raise ValueError("weights must be positive and sigma finite")
    if k == 1:
        return MCBResult((float(m[0]),), (float(w[0]),), float(sigma), float(df), confidence,
                         (0.0,), (0.0,), (0.0,), (True,))
    d = critical_values(w, df, confidence)
    se = sigma * np.sqrt(w[:, None] + w[None, :])
    diff = m[:, None] - m[None, :]  # diff[i, j] = m_i - m_j
    upper = diff + d[:, None] * se
    np.fill_diagonal(upper, np.inf)
    high = np.maximum(0.0, upper.min(axis=1))
    tied = high > 0
    lower_terms = diff - d[None, :] * se  # uses d_j for the lower bound
    low = np.zeros(k)
    g = np.flatnonzero(tied)
    for i in range(k):
        others = g[g != i]
        if others.size == 0:
            low[i] = 0.0
        else:
            low[i] = min(0.0, float(lower_terms[i, others].min()))
    # Degenerate noise-free data (sigma == 0): intervals collapse to the
    # differences themselves, and only exact ties stay tied.
    if sigma == 0:
        best_other = np.array([np.max(np.delete(m, i)) for i in range(k)])
        theta = m - best_other
        high = np.maximum(0.0, theta)
        tied = theta >= 0
        low = np.minimum(0.0, theta)
    return MCBResult(
        means=tuple(float(x) for x in m),
        weights=tuple(float(x) for x in w),
        sigma=float(sigma),
        df=float(df),
        confidence=float(confidence),
        critical=tuple(float(x) for x in d),
        low=tuple(float(x) for x in low),
        high=tuple(float(x) for x in high),
        tied=tuple(bool(x) for x in tied),
    )
