"""Variance between executions and between iterations, and how many to run.

Implements the two-level random-effects analysis of Kalibera & Jones (2013),
"Rigorous benchmarking in reasonable time" (ISMM): a benchmark is executed
``n`` times (level 2) and each execution repeats ``r`` steady-state iterations
(level 1).  With ``Y[j, i]`` the i-th iteration of execution j,

    S1^2 = sum_j sum_i (Y[j,i] - mean_j)^2 / (n (r - 1))      (within executions)
    S2^2 = sum_j (mean_j - grand mean)^2 / (n - 1)              (between execution means)
    T1^2 = S1^2                    estimated iteration-level variance
    T2^2 = S2^2 - S1^2 / r         estimated execution-level variance

the ANOVA method-of-moments estimates for a balanced nested design (Searle,
Casella & McCulloch 1992, ch. 3).  A negative T2^2 is reported and truncated
at zero.

Cost model (Kalibera & Jones): a new execution costs ``c_exec`` (start-up and
warm-up), one more iteration ``c_iter``.  The variance of the grand mean is
``T2^2/n + T1^2/(n r)``; minimising ``n (c_exec + r c_iter)`` for a fixed
variance gives ``r* = sqrt(c_exec T1^2 / (c_iter T2^2))``; ``n`` is then the
smallest count whose confidence half-width (t with n-1 degrees of freedom)
reaches the target precision.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Components:
    executions: int
    iterations: int
    mean: float
    within_var: float          # T1^2, between iterations of one execution
    between_var: float         # T2^2 truncated at 0, between executions
    between_var_raw: float     # T2^2 before truncation (may be negative)
    s1_sq: float
    s2_sq: float

    def to_json_dict(self) -> dict:
        return {
            "executions": self.executions, "iterations": self.iterations, "mean_s": self.mean,
            "within_execution_var_s2": self.within_var,
            "between_execution_var_s2": self.between_var,
            "between_execution_var_raw_s2": self.between_var_raw,
        }


def variance_components(matrix) -> Components:
    """Method-of-moments components of a balanced executions x iterations array."""
    y = np.asarray(matrix, dtype=float)
    if y.ndim != 2:
        raise ValueError("expected a 2-D array: executions x iterations")
    n, r = y.shape
    if n < 2 or r < 2:
        raise ValueError(f"need at least 2 executions and 2 iterations each (have {n} x {r})")
    means = y.mean(axis=1)
    grand = float(means.mean())
    s1 = float(((y - means[:, None]) ** 2).sum() / (n * (r - 1)))
    s2 = float(((means - grand) ** 2).sum() / (n - 1))
    t2 = s2 - s1 / r
    return Components(n, r, grand, s1, max(t2, 0.0), t2, s1, s2)


def balanced(series_list, min_iterations: int = 2) -> np.ndarray | None:
    """Last ``r`` values of each series, r = the shortest length (balanced design).

    Series shorter than ``min_iterations`` are left out.  None when fewer than
    two executions remain.
    """
    kept = [np.asarray(s, dtype=float) for s in series_list if len(s) >= min_iterations]
    if len(kept) < 2:
        return None
    r = min(len(s) for s in kept)
    return np.vstack([s[len(s) - r:] for s in kept])


@dataclass(frozen=True)
class Recommendation:
    executions: int
    iterations: int
    rel_halfwidth: float        # expected relative CI half-width of the mean
    cost_s: float               # n * (c_exec + r * c_iter)
    target_rel_halfwidth: float
    confidence: float
    reached: bool
    note: str = ""

    def to_json_dict(self) -> dict:
        return dict(self.__dict__)


def _halfwidth(c: Components, n: int, r: int, confidence: float) -> float:
    from scipy import stats

    t = float(stats.t.ppf(0.5 + confidence / 2, n - 1))
    return t * math.sqrt((c.between_var + c.within_var / r) / n)


def best_iterations(c: Components, cost_execution_s: float, cost_iteration_s: float,
                    max_iterations: int = 100_000) -> int:
    """Kalibera & Jones' optimal iterations per execution, rounded to the cheaper side."""
    if c.within_var <= 0:
        return 1
    if c.between_var <= 0 or cost_iteration_s <= 0:
        return max_iterations
    r_star = math.sqrt(cost_execution_s * c.within_var / (cost_iteration_s * c.between_var))
    options = {max(1, min(max_iterations, k)) for k in (math.floor(r_star), math.ceil(r_star))}

    # per unit precision, cost is proportional to (T2^2 + T1^2/r)(c_exec + r c_iter)
    def score(r: int) -> float:
        return (c.between_var + c.within_var / r) * (cost_execution_s + r * cost_iteration_s)

    return min(sorted(options), key=score)


def recommend(c: Components, cost_execution_s: float, cost_iteration_s: float,
              target_rel_halfwidth: float = 0.01, confidence: float = 0.95,
              max_executions: int = 10_000, max_iterations: int = 100_000,
              min_executions: int = 2) -> Recommendation:
    """Executions x iterations reaching ``target_rel_halfwidth`` of the mean at least cost.

    Iterations per execution follow Kalibera & Jones' optimum (`best_iterations`).
    When the between-execution variance is estimated as zero that optimum is
    unbounded; then every split of the same total number of iterations is
    equally precise, and we take the cheapest (n, r) found by searching n.
    """
    target = target_rel_halfwidth * abs(c.mean)
    note = ""
    if c.between_var <= 0:
        note = ("between-execution variance estimated at or below zero (set to 0): runs "
                "barely differ, so extra iterations are cheaper than extra runs")
        best = None
        for n in range(min_executions, min(max_executions, 200) + 1):
            r = _iterations_for(c, n, target, confidence, max_iterations)
            if r is None:
                continue
            cost = n * (cost_execution_s + r * cost_iteration_s)
            if best is None or cost < best[0] - 1e-12:
                best = (cost, n, r)
        if best is not None:
            _, n, r = best
            hw = _halfwidth(c, n, r, confidence)
            return Recommendation(n, r, hw / abs(c.mean) if c.mean else math.inf,
                                  best[0], target_rel_halfwidth, confidence, True, note)
        r = max_iterations
    else:
        r = best_iterations(c, cost_execution_s, cost_iteration_s, max_iterations)
    n = min_executions
    while n < max_executions and _halfwidth(c, n, r, confidence) > target:
        n = n + max(1, n // 8) if n > 64 else n + 1
    # step back to the smallest n that works (the coarse steps above may overshoot)
    while n > min_executions and _halfwidth(c, n - 1, r, confidence) <= target:
        n -= 1
    hw = _halfwidth(c, n, r, confidence)
    reached = hw <= target
    if not reached:
        note = (note + "; " if note else "") + f"target not reached within {max_executions} executions"
    return Recommendation(n, r, hw / abs(c.mean) if c.mean else math.inf,
                          n * (cost_execution_s + r * cost_iteration_s), target_rel_halfwidth,
                          confidence, reached, note)


def _iterations_for(c: Components, n: int, target: float, confidence: float,
                    max_iterations: int) -> int | None:
    """Smallest r with the target half-width at n executions (None if out of reach)."""
    from scipy import stats

    t = float(stats.t.ppf(0.5 + confidence / 2, n - 1))
    room = (target / t) ** 2 * n - c.between_var    # needs within_var / r <= room
    if room <= 0:
        return None
    if c.within_var <= 0:
        return 1
    r = max(1, math.ceil(c.within_var / room))
    return r if r <= max_iterations else None
