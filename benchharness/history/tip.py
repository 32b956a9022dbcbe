"""A change at the newest commits: flagged once two commits show it.

Owns the test that looks at the end of a cell's series (the newest commits of
the host measured last), where the whole-series permutation test of
`changepoint` is weakest: with ``N`` points, a shift of the newest ``k`` of them
can reach a permutation p-value of ``1/C(N, k)`` at best, so three commits at one
speed and three at 2.3x the time (``1/20``) can never be told from chance there.

The test compares the newest ``k`` points of the stretch since the last step
with the points before them, for every ``k`` from 1 to ``TIP_MAX`` (at least two
points before): the two-sample t statistic with the variance pooled over both
parts (the pooled two-sample t of Student 1908),
``t_k = (mean_new - mean_before) / (s_p sqrt(1/k + 1/(W - k)))``, and the largest
``|t_k|``. In a steady series the points are independent draws of one normal
law (each a mean of logged timings; session-to-session noise included), so
the null distribution of ``max |t_k|`` does not depend on the unknown level or
spread: it is simulated once per window length (1,999 series, fixed seed) and
the test is an exact Monte Carlo test (Barnard 1963; Besag & Clifford 1991).
The pooled variance is never taken below the points' own within-commit
variance, which only makes the test more cautious.

If the largest ``|t_k|`` is beyond the critical value:

* some ``k >= 2`` beyond it, and the series without its newest point was
  already beyond its own critical value, the same way, at ``k - 1``: a
  **confirmed** step at the first of the newest ``k`` commits (the ``k`` with the
  largest ``|t_k|``). Two commits show it; one odd newest point that drags the
  mean of the newest two along is not enough;
* otherwise **not yet confirmed**: the newest commit alone differs (one session
  cannot be told from one unlucky session), or the newest ``k`` do while the look
  before did not show it (it is then named at the first of them); the next
  commit decides.

`changepoint.detect_steps` gives this test half the false-step level of the
host measured last and the whole-series test the other half, so the chance of
a false step in a steady series stays at most the level (Bonferroni).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache

import numpy as np

TIP_MAX = 10            # newest commits considered as the changed part (k <= TIP_MAX)
TIP_WINDOW = 60         # at most this many newest points of the stretch are used
MIN_TIP_POINTS = 3      # two before and one newest
N_TIP_SIM = 1999        # simulated steady series for the null distribution


@dataclass(frozen=True)
class TipResult:
    k: int                   # newest points forming the change
    confirmed: bool          # k >= 2
    statistic: float         # |t_k|
    critical: float          # critical value of max |t_k| at the level
    t: tuple[float, ...]     # t_k for k = 1..K


def tip_statistics(X, floor_var: float = 0.0):
    """``t_k`` for k = 1..K of each row of ``X`` (points oldest first); shape (R, K).

    ``floor_var``: smallest pooled variance used (the within-commit variance of a
    point's mean); 0 for the simulated null.
    """
    X = np.atleast_2d(np.asarray(X, dtype=float))
    R, W = X.shape
    K = min(TIP_MAX, W - 2)
    X = X - X.mean(axis=1, keepdims=True)
    rev = X[:, ::-1]
    s1_new = np.cumsum(rev, axis=1)[:, :K]             # sums of the newest k
    s2_new = np.cumsum(rev * rev, axis=1)[:, :K]
    s1_all = X.sum(axis=1, keepdims=True)
    s2_all = (X * X).sum(axis=1, keepdims=True)
    k = np.arange(1, K + 1)[None, :]
    nb = W - k
    s1_old, s2_old = s1_all - s1_new, s2_all - s2_new
    m_new, m_old = s1_new / k, s1_old / nb
    ss = (s2_new - s1_new * m_new) + (s2_old - s1_old * m_old)
    sp2 = np.maximum(np.maximum(ss, 0.0) / (W - 2), floor_var)
    with np.errstate(divide="ignore", invalid="ignore"):
        t = (m_new - m_old) / np.sqrt(sp2 * (1.0 / k + 1.0 / nb))
    return np.where(np.isfinite(t), t, np.where(m_new != m_old, np.inf * np.sign(
        m_new - m_old), 0.0))


@lru_cache(maxsize=256)
def _null_max(W: int) -> np.ndarray:
    """Sorted (descending) simulated ``max |t_k|`` of steady normal series of ``W`` points."""
    rng = np.random.default_rng([19530, W])
    Z = rng.standard_normal((N_TIP_SIM, W))
    return np.sort(np.abs(tip_statistics(Z)).max(axis=1))[::-1]


def critical_value(W: int, alpha: float) -> float:
    """The Monte Carlo critical value: rejecting when ``max |t_k|`` exceeds it has
    p = (1 + #{T* >= T}) / (1 + R) <= alpha. Infinite when alpha is too small for R."""
    m = int(math.floor(alpha * (N_TIP_SIM + 1))) - 1
    if m < 0:
        return math.inf
    return float(_null_max(W)[m])


def tip_test(x, v, alpha: float) -> TipResult | None:
    """Is there a change at the newest points of ``x`` (a stretch with no step in it)?

    ``x``: log means oldest first; ``v``: each one's within-commit variance of the
    mean (NaN when unknown). Returns None when nothing is beyond the critical value
    at ``alpha`` or there are fewer than `MIN_TIP_POINTS` points.
    """
    x = np.asarray(x, dtype=float)[-TIP_WINDOW:]
    v = np.asarray(v, dtype=float)[-TIP_WINDOW:]
    W = len(x)
    if W < MIN_TIP_POINTS:
        return None
    fv = v[np.isfinite(v)]
    floor = float(np.median(fv)) if len(fv) else 0.0
    t = tip_statistics(x[None, :], floor)[0]
    crit = critical_value(W, alpha)
    a = np.abs(t)
    if not a.max() > crit:
        return None
    # confirmed: beyond at k >= 2 now, and already beyond, the same way, without the
    # newest point (newest k - 1 of the points before it), so a single odd newest
    # point that drags the mean of the newest two along is not enough
    before = tip_statistics(x[None, :-1], floor)[0] if W - 1 >= MIN_TIP_POINTS else None
    crit_before = critical_value(W - 1, alpha) if before is not None else math.inf
    beyond = [k for k in range(2, len(t) + 1) if a[k - 1] > crit
              and k - 1 <= len(before if before is not None else ())
              and abs(before[k - 2]) > crit_before and before[k - 2] * t[k - 1] > 0]
    if beyond:
        k = max(beyond, key=lambda j: a[j - 1])
        return TipResult(k, True, float(a[k - 1]), crit, tuple(map(float, t)))
    # not yet confirmed: the newest commit alone when it is beyond by itself; else the
    # newest k that are (a change the look before missed), so the flag names the
    # commit where the change began, not a newest commit that matches its predecessor
    k = 1 if a[0] > crit else max((j for j in range(1, len(t) + 1) if a[j - 1] > crit),
                                  key=lambda j: a[j - 1])
    return TipResult(k, False, float(a[k - 1]), crit, tuple(map(float, t)))
