"""Changepoints in a series of per-iteration timings, by PELT.

Implements the Pruned Exact Linear Time search of Killick, Fearnhead & Eckley
(2012), "Optimal detection of changepoints with a linear computational cost",
JASA 107(500), for a change in both mean and variance of normally distributed
observations.

The segmentation minimises ``sum(C(segment)) + penalty * number_of_changes``
where ``C`` is twice the negative maximised normal log-likelihood of a segment
(constants dropped):

    C(y[s:t]) = n * (log v + var_hat / v),  v = max(var_hat, floor),  n = t - s

``var_hat`` is the maximum-likelihood (biased) variance of the segment.  The
floor keeps constant stretches (timer resolution) from giving ``log 0``; while
``var_hat >= floor`` the cost is ``n * log(var_hat) + n``, the textbook one.
Because ``C`` is a minimised negative log-likelihood, splitting a segment never
raises its cost (Killick et al.'s condition with K = 0), so pruning is exact.

With a minimum segment length ``m`` a candidate pruned at time ``t`` may still
be needed for ends in ``(t, t + m)`` (those cannot start a segment at ``t``);
we therefore apply each pruning decision ``m`` steps late, which keeps the
search exact (checked against brute-force optimal partitioning in the tests).

The default penalty is ``15 * log(n)``, the value used by Barrett et al.
(2017) for warm-up analysis (from memory).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

DEFAULT_PENALTY_FACTOR = 15.0


@dataclass(frozen=True)
class Segmentation:
    """Result of a changepoint search over ``n`` observations.

    ``changepoints`` are the indices where a new segment starts (0 < c < n),
    ascending; ``segments`` are ``(start, end)`` half-open pairs covering
    ``[0, n)``; ``cost`` is the penalised total the search minimised.
    """

    n: int
    changepoints: tuple[int, ...]
    segments: tuple[tuple[int, int], ...]
    cost: float
    penalty: float


class _NormalMeanVarCost:
    """Segment cost for a change in mean and variance, from running sums."""

    def __init__(self, y: np.ndarray, var_floor: float | None):
        y = np.asarray(y, dtype=float)
        # Centre the data first: running sums of squares then lose little
        # precision.  The cost is invariant to a shift.
        centred = y - (y.mean() if y.size else 0.0)
        self.s1 = np.concatenate(([0.0], np.cumsum(centred)))
        self.s2 = np.concatenate(([0.0], np.cumsum(centred * centred)))
        if var_floor is None:
            total_var = float(centred.var()) if y.size else 0.0
            scale = max(total_var, float(np.mean(np.abs(y))) ** 2 if y.size else 0.0)
            var_floor = max(scale * 1e-10, 1e-300)
        self.floor = var_floor

    def __call__(self, starts: np.ndarray, end: int) -> np.ndarray:
        n = end - starts
        s1 = self.s1[end] - self.s1[starts]
        s2 = self.s2[end] - self.s2[starts]
        mean = s1 / n
        var_hat = np.maximum(s2 / n - mean * mean, 0.0)
        v = np.maximum(var_hat, self.floor)
        return n * (np.log(v) + var_hat / v)

    def single(self, start: int, end: int) -> float:
        return float(self(np.array([start]), end)[0])


def segment_cost(y, start: int, end: int, var_floor: float | None = None) -> float:
    """Cost ``C(y[start:end])`` as used by `pelt` (for checks and reports)."""
    return _NormalMeanVarCost(np.asarray(y, dtype=float), var_floor).single(start, end)


def default_penalty(n: int, factor: float = DEFAULT_PENALTY_FACTOR) -> float:
    """``factor * log(n)``; 15 log n by default (Barrett et al. 2017, from memory)."""
    return factor * math.log(max(n, 2))


def pelt(y, penalty: float | None = None, min_size: int = 2,
         var_floor: float | None = None) -> Segmentation:
    """Optimal segmentation of ``y`` by PELT (Killick et al. 2012).

    ``penalty`` is added per segment (equivalently per changepoint);
    ``None`` means `default_penalty`.  ``min_size`` is the shortest segment
    allowed (at least 1; 2 keeps each segment's variance estimable).
    """
    y = np.asarray(y, dtype=float)
    if y.ndim != 1:
        raise ValueError("pelt expects a one-dimensional series")
    if not np.all(np.isfinite(y)):
        raise ValueError("pelt expects finite values (drop NaN/inf first)")
    n = int(y.size)
    min_size = max(1, int(min_size))
    if penalty is None:
        penalty = default_penalty(n)
    if n == 0:
        return Segmentation(0, (), (), 0.0, float(penalty))
    if n < 2 * min_size:
        cost = _NormalMeanVarCost(y, var_floor)
        return Segmentation(n, (), ((0, n),), cost.single(0, n) + penalty, float(penalty))

    cost = _NormalMeanVarCost(y, var_floor)
    F = np.full(n + 1, np.inf)
    F[0] = 0.0
    last = np.zeros(n + 1, dtype=np.int64)
    candidates = np.array([0], dtype=np.int64)
    # pending[k] = set of candidates found prunable at time k; they are removed
    # at time k + min_size (see module docstring).
    pending: dict[int, np.ndarray] = {}
    for t in range(min_size, n + 1):
        s_new = t - min_size
        if s_new >= min_size and np.isfinite(F[s_new]):
            candidates = np.append(candidates, s_new)
        drop = pending.pop(t - min_size, None)
        if drop is not None and drop.size:
            candidates = candidates[~np.isin(candidates, drop)]
        seg = F[candidates] + cost(candidates, t)
        total = seg + penalty
        i = int(np.argmin(total))
        F[t] = total[i]
        last[t] = candidates[i]
        prunable = candidates[seg > F[t]]
        if prunable.size:
            pending[t] = prunable

    return _traced_back(last, F, n, penalty)


def _traced_back(last, F, n: int, penalty: float) -> Segmentation:
    """The segmentation ending at ``n``, read back through each end's best last start."""
    cps: list[int] = []
    t = n
    while t > 0:
        s = int(last[t])
        if s > 0:
            cps.append(s)
        t = s
    cps.reverse()
    bounds = [0, *cps, n]
    return Segmentation(n, tuple(cps), tuple(zip(bounds[:-1], bounds[1:])), float(F[n]),
                        float(penalty))


def optimal_partitioning(y, penalty: float, min_size: int = 2,
                         var_floor: float | None = None) -> Segmentation:
    """Unpruned dynamic programme (Jackson et al. 2005); O(n^2), for checking `pelt`."""
    y = np.asarray(y, dtype=float)
    n = int(y.size)
    cost = _NormalMeanVarCost(y, var_floor)
    F = np.full(n + 1, np.inf)
    F[0] = 0.0
    last = np.zeros(n + 1, dtype=np.int64)
    for t in range(min_size, n + 1):
        starts = np.array([0] + [s for s in range(min_size, t - min_size + 1)], dtype=np.int64)
        starts = starts[np.isfinite(F[starts])]
        total = F[starts] + cost(starts, t) + penalty
        i = int(np.argmin(total))
        F[t] = total[i]
        last[t] = starts[i]
    return _traced_back(last, F, n, penalty)
