"""Parallel scaling: speed-up, parallel efficiency and the serial fraction (Amdahl 1967).

For a numeric factor that sets how many workers run at once (threads, workers,
jobs; `benchharness.experiment.quantities`), with p₀ its smallest level:

* **speed-up** at level p: ``S(p) = T(p₀) / T(p)``, the ratio of the
  geometric means (each averaged over the other factors on the log scale),
  with a t interval from the cell-means model's pure error;
* **parallel efficiency** ``E(p) = S(p) · p₀ / p``: the share of the ideal
  speed-up obtained (1 when doubling the workers halves the time);
* **the serial fraction** ``s`` of Amdahl's law (Amdahl 1967, AFIPS Conference
  Proceedings 30:483): ``T(p) = T₁ · (s + (1 − s)/p)``, with one ``T₁`` per
  combination of the other factors (each input size its own one-worker time)
  and a common ``s``, plus one ``s`` per level of the most important other
  factor.

The fit is nonlinear least squares on the log scale, ``log T = log T₁ +
log(s + (1 − s)/p) + e``: timings' noise is multiplicative (the ANOVA's own
scale, so the residual error is the same quantity the rest of the analysis
uses), and a linearisation (fitting ``T`` against ``1/p`` on the original
scale) would weight the slowest cells most and lose the interval's link to the
log-scale error. For a fixed ``s`` the ``log T₁`` are a linear least-squares
fit, so the residual sum of squares is profiled over ``s ∈ [0, 1]`` (golden
section) and the interval is the profile (likelihood-ratio) interval
``{s : RSS(s) ≤ RSS(ŝ)·(1 + F₁,ν(1 − α)/ν)}`` (Bates & Watts 1988, *Nonlinear
Regression Analysis and Its Applications*, §6.1), which follows the curvature
that a Wald interval ŝ ± t·se would ignore near 0 and 1. The lack of fit of
the law against the cell means uses the pure error (as in `trend`).
"""

from __future__ import annotations

import math

import numpy as np

from benchharness.analysis import trend as tr


def amdahl_shape(s: float, p: np.ndarray) -> np.ndarray:
    """log(s + (1 − s)/p): the log of Amdahl's time relative to one worker."""
    return np.log(s + (1.0 - s) / p)


def fit_amdahl(cd: tr.CellData, p_cells: np.ndarray, others: list[int], alpha: float,
               sign: float = 1.0) -> dict:
    """The serial fraction of the cells ``cd`` (p per cell given), with its profile interval.

    ``sign`` is 1 for a time (it shrinks as workers are added), −1 for a rate
    such as throughput (it grows: ``X(p) = X₁ / (s + (1 − s)/p)``).
    """
    from benchharness.analysis import dist as stats
    from benchharness.analysis import roots

    base = tr.base_columns(cd, others)
    w = np.sqrt(cd.n)
    A = base * w[:, None]
    U, sv, _ = np.linalg.svd(A, full_matrices=False)
    Q = U[:, sv > sv.max() * 1e-10]          # an orthonormal basis of the intercepts
    ssw = cd.ss_within

    def rss(s: float) -> float:              # the log T1 profiled out by projection
        b = w * (cd.mean - sign * amdahl_shape(s, p_cells))
        r = b - Q @ (Q.T @ b)
        return float(r @ r) + ssw

    best = roots.minimize_scalar(rss, (0.0, 1.0), options={"xatol": 1e-7})
    s_hat, r_min = float(best.x), float(best.fun)
    for edge in (0.0, 1.0):                         # the minimum may sit on an edge
        r = rss(edge)
        if r < r_min:
            s_hat, r_min = edge, r
    df = cd.N - Q.shape[1] - 1
    out = {"estimate": s_hat, "lower": None, "upper": None, "df": int(df),
           "rss": r_min, "method": "profile least squares on the log scale"}
    if df <= 0 or not r_min > 0:
        return out
    crit = r_min * (1.0 + float(stats.t.ppf(1 - alpha / 2, df)) ** 2 / df)
    out["lower"] = 0.0 if rss(0.0) <= crit else roots.brentq(lambda s: rss(s) - crit, 0.0,
                                                             max(s_hat, 1e-12), xtol=1e-9)
    out["upper"] = 1.0 if rss(1.0) <= crit else roots.brentq(lambda s: rss(s) - crit,
                                                             min(s_hat, 1 - 1e-12), 1.0,
                                                             xtol=1e-9)
    out["max_speedup"] = (1.0 / s_hat) if s_hat > 0 else None
    return out


def speedups(sat: tr.Saturated, j: int, values, labels, alpha: float,
             sign: float = 1.0) -> list[dict]:
    """Speed-up and efficiency of every level over the smallest, with t intervals
    (``sign`` −1 for a rate, whose speed-up is X(p) / X(p₀))."""
    from benchharness.analysis import dist as stats

    values = list(values)
    k0 = values.index(min(values))
    ref = tr.marginal(sat, {j: k0})
    if ref is None or sat.fit.df <= 0:
        return []
    q = float(stats.t.ppf(1 - alpha / 2, sat.fit.df))
    out = []
    for k, v in enumerate(values):
        m = tr.marginal(sat, {j: k})
        if m is None:
            return []
        L = sign * (ref[2] - m[2])
        est = float(L @ sat.fit.coef)
        se = math.sqrt(max(float(L @ sat.fit.cov @ L), 0.0) * sat.fit.mse)
        ideal = v / values[k0]
        lo, hi = math.exp(est - q * se), math.exp(est + q * se)
        out.append({"level": labels[k], "workers": v, "speedup": math.exp(est),
                    "lower": lo, "upper": hi, "ideal": ideal,
                    "efficiency": math.exp(est) / ideal, "efficiency_lower": lo / ideal,
                    "efficiency_upper": hi / ideal})
    return out


def scaling(cd: tr.CellData, j: int, values, names, levels, sizes, alpha: float,
            sat: tr.Saturated, line_by: str | None, better: str = "lower") -> dict:
    """analysis.json's ``scaling`` of a trend: speed-ups, efficiency, serial fraction.

    ``better``: ``lower`` for a time, ``higher`` for a rate (throughput).
    """
    sign = -1.0 if better == "higher" else 1.0
    values = np.asarray(values, dtype=float)
    others = [i for i in range(len(names)) if i != j]
    p_cells = values[cd.codes[:, j]]
    overall = fit_amdahl(cd, p_cells, others, alpha, sign)
    out = {"factor": names[j], "smallest": levels[names[j]][int(np.argmin(values))],
           "speedups": (speedups(sat, j, values, levels[names[j]], alpha, sign)
                        if tr.complete(cd, sizes) else []),
           "serial_fraction": overall, "by": None, "better": better}
    if overall["df"] > 0:
        model = tr.LinFit(coef=np.zeros(0), cov=np.zeros((0, 0)), rss=overall["rss"],
                          df=overall["df"])
        out["lack_of_fit"] = tr.f_test(model, sat.fit)
    if line_by is not None:
        g = names.index(line_by)
        per = []
        for code, label in enumerate(levels[line_by]):
            mask = cd.codes[:, g] == code
            if not mask.any() or len(np.unique(cd.codes[mask, j])) < 2:
                continue
            sub = cd.subset(mask)
            fit = fit_amdahl(sub, p_cells[mask], [i for i in others if i != g], alpha, sign)
            per.append({"level": label, **fit})
        out["by"] = {"factor": line_by, "serial_fractions": per}
    return out
