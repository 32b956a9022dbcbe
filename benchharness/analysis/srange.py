"""Upper tail of the studentized range distribution, vectorised.

Owns ``sf(q, k, df)``: P(Q > q) for the range of k independent standard
normals divided by an independent sqrt(χ²_df / df) (Tukey 1953; the double
integral as in Copenhaver & Holland 1988, *J. Statist. Comput. Simul.* 30:1).
The inner integral over z uses the trapezoid rule on a fine fixed grid (the
integrand is smooth and decays like a Gaussian, where the trapezoid rule
converges geometrically); the outer integral over s = sqrt(χ²/df) uses
Gauss-Legendre nodes on log s between far quantiles. One call evaluates every
q at once, which is what Tukey HSD over many pairs needs; scipy's
``studentized_range.sf`` integrates each value adaptively and is the
reference in the tests.
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np

_Z = np.linspace(-8.5, 8.5, 341)
_HZ = _Z[1] - _Z[0]


@lru_cache(maxsize=64)
def _s_nodes(df: float, n: int = 64):
    from benchharness.analysis import dist as stats

    if not np.isfinite(df) or df > 1e7:
        return np.array([0.0]), np.array([1.0])
    lo = 0.5 * np.log(stats.chi2.ppf(1e-15, df) / df)
    hi = 0.5 * np.log(stats.chi2.isf(1e-15, df) / df)
    x, w = np.polynomial.legendre.leggauss(n)
    u = 0.5 * (hi - lo) * x + 0.5 * (hi + lo)
    wu = 0.5 * (hi - lo) * w
    s = np.exp(u)
    # density of u = log s where s^2 * df ~ chi2(df): f(u) = chi2pdf(df s^2) * 2 df s^2
    logf = (stats.chi2.logpdf(df * s * s, df) + np.log(2.0 * df) + 2.0 * u)
    weights = wu * np.exp(logf)
    weights /= weights.sum()  # the nodes carry all but ~1e-15 of the mass
    return u, weights


def sf(q, k: int, df: float) -> np.ndarray:
    """P(Q > q) for the studentized range with k means and df degrees of freedom."""
    from scipy.special import ndtr

    q = np.atleast_1d(np.asarray(q, dtype=float))
    u, wts = _s_nodes(float(df))
    s = np.exp(u)
    w = (q[:, None] * s[None, :]).ravel()             # ranges to evaluate
    phi = np.exp(-0.5 * _Z * _Z) / np.sqrt(2 * np.pi)
    Phi = ndtr(_Z)
    # P(range > w) = 1 - k ∫ φ(z) [Φ(z) - Φ(z - w)]^(k-1) dz
    inner = Phi[None, :] - ndtr(_Z[None, :] - w[:, None])
    np.clip(inner, 0.0, 1.0, out=inner)
    cdf_w = k * (phi[None, :] * inner ** (k - 1)).sum(axis=1) * _HZ
    tail = np.clip(1.0 - cdf_w, 0.0, 1.0).reshape(len(q), len(s))
    out = tail @ wts
    out[q <= 0] = 1.0
    return np.clip(out, 0.0, 1.0)


def isf(p: float, k: int, df: float) -> float:
    """The q with P(Q > q) = p (root of `sf`)."""
    from benchharness.analysis.roots import brentq

    hi = 10.0
    while sf(hi, k, df)[0] > p and hi < 1e4:
        hi *= 2
    return float(brentq(lambda x: sf(x, k, df)[0] - p, 0.0, hi, xtol=1e-10, rtol=1e-12))
