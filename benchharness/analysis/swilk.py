"""The Shapiro-Wilk test of normality (Shapiro & Wilk 1965), Royston's approximations.

W is the squared correlation between the ordered sample and the coefficients
of the best linear estimate of the normal scale. The coefficients and the
p-value follow Royston (1992, *Statistics and Computing* 2:117; the algorithm
AS R94, Royston 1995, *Applied Statistics* 44:547): normal scores of the
expected order statistics, a polynomial correction in 1/√n of the two outer
coefficients, and a normalising transform of 1 − W whose mean and spread are
polynomials in n (3 < n ≤ 11) or log n (n > 11). For n = 3 the exact
distribution is used. Valid for 3 ≤ n ≤ 5000, as the approximation was fitted.

Written here, in numpy and the normal quantile alone, so that the diagnostics do
not import the whole statistics package; tests/test_dist.py compares it with
``scipy.stats.shapiro``.
"""

from __future__ import annotations

import math

import numpy as np

_C1 = (0.0, 0.221157, -0.147981, -2.071190, 4.434685, -2.706056)
_C2 = (0.0, 0.042981, -0.293762, -1.752461, 5.682633, -3.582633)
_C3 = (0.5440, -0.39978, 0.025054, -6.714e-4)
_C4 = (1.3822, -0.77857, 0.062767, -0.0020322)
_C5 = (-1.5861, -0.31082, -0.083751, 0.0038915)
_C6 = (-0.4803, -0.082676, 0.0030302)
_G = (-2.273, 0.459)


def _poly(c, x: float) -> float:
    out = 0.0
    for coef in reversed(c):
        out = out * x + coef
    return out


def coefficients(n: int) -> np.ndarray:
    """The n coefficients a (antisymmetric, ascending order statistics)."""
    from scipy.special import ndtri

    half = n // 2
    if n == 3:
        lower = np.array([math.sqrt(0.5)])
    else:
        m = ndtri((np.arange(1, half + 1) - 0.375) / (n + 0.25))    # lower half: negative
        summ2 = 2.0 * float(m @ m)
        ssumm2 = math.sqrt(summ2)
        rsn = 1.0 / math.sqrt(n)
        a1 = _poly(_C1, rsn) - m[0] / ssumm2
        if n > 5:
            a2 = -m[1] / ssumm2 + _poly(_C2, rsn)
            fac = math.sqrt((summ2 - 2 * m[0] ** 2 - 2 * m[1] ** 2)
                            / (1 - 2 * a1 ** 2 - 2 * a2 ** 2))
            lower = -m / fac
            lower[1] = a2
        else:
            fac = math.sqrt((summ2 - 2 * m[0] ** 2) / (1 - 2 * a1 ** 2))
            lower = -m / fac
        lower[0] = a1
    a = np.zeros(n)
    a[:half] = -lower
    a[n - half:] = lower[::-1]
    return a


def shapiro_wilk(x) -> tuple[float, float]:
    """``(W, p)`` for the sample ``x`` (3 ≤ n; the p-value is approximate above 5000)."""
    from scipy.special import ndtr

    x = np.sort(np.asarray(x, dtype=float).ravel())
    n = x.size
    if n < 3:
        raise ValueError("the Shapiro-Wilk test needs at least 3 values")
    x = x - x[n // 2]
    rng = x[-1] - x[0]
    if not rng > 0:
        return 1.0, 1.0
    a = coefficients(n)
    xs = x / rng
    da = a - a.mean()
    dx = xs - xs.mean()
    ssa, ssx, sax = float(da @ da), float(dx @ dx), float(da @ dx)
    root = math.sqrt(ssa * ssx)
    w1 = (root - sax) * (root + sax) / (ssa * ssx)     # 1 - W, without cancellation
    w = 1.0 - w1
    if n == 3:
        # exact: P(W < w) = (6/π)(asin √w − π/3)  (Shapiro & Wilk 1965)
        p = 6.0 / math.pi * (math.asin(math.sqrt(max(min(w, 1.0), 0.75))) - math.pi / 3.0)
        return w, max(p, 0.0)
    if w1 <= 0:
        return w, 1.0
    y = math.log(w1)
    if n <= 11:
        gamma = _poly(_G, n)
        if y >= gamma:
            return w, 1e-99
        y = -math.log(gamma - y)
        m = _poly(_C3, n)
        s = math.exp(_poly(_C4, n))
    else:
        ln = math.log(n)
        m = _poly(_C5, ln)
        s = math.exp(_poly(_C6, ln))
    return w, float(ndtr(-(y - m) / s))
