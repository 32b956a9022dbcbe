"""Replicate sizing: how many replicates per cell a decision needs.

Power of the ANOVA F test of a main effect, by the noncentral F distribution
(Montgomery, *Design and Analysis of Experiments*, §5.3; the operating
characteristic of the fixed-effects model). Timings are analysed on the log
scale, so a ratio to detect becomes a difference ``D = ln(1 + detect)``, and a
coefficient of variation CV of the run times becomes the log-scale standard
deviation ``sigma = sqrt(ln(1 + CV^2))`` (lognormal model, common practice).

For a factor with ``a`` levels in a design of ``cells`` cells (the other
factors form ``b = cells / a`` combinations), with ``n`` replicates per cell,
the worst case for a smallest difference D is two levels D apart and the rest
midway, so sum(tau_i^2) = D^2/2 and the non-centrality is

    lambda = n * b * D^2 / (2 * sigma^2),

with ``a - 1`` numerator and ``cells * (n - 1)`` denominator degrees of freedom
(the error of the model with all interactions). Each factor needs its own n;
the answer is the largest.

``for: pairwise`` sizes instead for the pairwise comparisons between the levels
of each factor that users act on, Holm-adjusted (Holm 1979) over the
a(a-1)/2 pairs of the factor. Holm's first step is Bonferroni and Holm rejects
everything Bonferroni rejects, so the power of a two-sided t test at level
alpha / (a(a-1)/2) (noncentral t, shift D / (sigma * sqrt(2 / (n b)))) is a
conservative bound on the power to detect the pair that differs by D. For
two-level factors it equals the F-test power (t^2 = F).
"""

from __future__ import annotations

from benchharness.numbers import plural

import math
from dataclasses import dataclass, field
from typing import Mapping, Sequence

from benchharness.errors import UsageError

MAX_REPLICATES = 100_000


def sigma_from_cv(cv: float) -> float:
    """Log-scale SD of a lognormal with coefficient of variation ``cv``."""
    return math.sqrt(math.log1p(cv * cv))


def log_difference(detect: float) -> float:
    """``D = ln(1 + detect)`` for a relative difference (0.03 = 3%)."""
    return math.log1p(detect)


def noncentrality(n: int, a: int, cells: int, D: float, sigma: float) -> float:
    b = cells / a
    return n * b * D * D / (2.0 * sigma * sigma)


def f_power(n: int, a: int, cells: int, D: float, sigma: float, alpha: float) -> float:
    """Power of the main-effect F test of an a-level factor with n replicates per cell."""
    from scipy import stats

    df1 = a - 1
    df2 = cells * (n - 1)
    if df2 <= 0 or df1 <= 0:
        return 0.0
    crit = stats.f.isf(alpha, df1, df2)
    return float(stats.ncf.sf(crit, df1, df2, noncentrality(n, a, cells, D, sigma)))


def pairwise_power(n: int, a: int, cells: int, D: float, sigma: float, alpha: float) -> float:
    """Bonferroni bound on Holm power for the pair of levels D apart (two-sided t)."""
    from scipy import stats

    df = cells * (n - 1)
    if df <= 0 or a < 2:
        return 0.0
    m = a * (a - 1) // 2
    b = cells / a
    delta = D / (sigma * math.sqrt(2.0 / (n * b)))
    crit = stats.t.isf(alpha / (2.0 * m), df)
    return float(stats.nct.sf(crit, df, delta) + stats.nct.cdf(-crit, df, delta))


POWER_FUNCTIONS = {"anova": f_power, "pairwise": pairwise_power}


def replicates_needed(a: int, cells: int, D: float, sigma: float, alpha: float, power: float,
                      method: str = "anova") -> int:
    """Smallest n >= 2 reaching ``power`` (power grows with n: doubling then bisection)."""
    fn = POWER_FUNCTIONS[method]
    return _smallest_n(lambda n: fn(n, a, cells, D, sigma, alpha), power,
                       "; the difference to detect is tiny next to the noise")


def _smallest_n(power_at, power: float, why: str) -> int:
    """Smallest n >= 2 with ``power_at(n) >= power``: doubling, then bisection (power grows
    with n). Past MAX_REPLICATES it is a usage error ending with ``why``."""
    lo, hi = 1, 2
    while power_at(hi) < power:
        lo, hi = hi, hi * 2
        if hi > MAX_REPLICATES:
            raise UsageError(f"more than {MAX_REPLICATES} replicates per cell would be needed"
                             + why)
    while hi - lo > 1:
        mid = (lo + hi) // 2
        if power_at(mid) >= power:
            hi = mid
        else:
            lo = mid
    return hi


@dataclass(frozen=True)
class SizingAnswer:
    replicates: int
    power: float                       # achieved by the binding factor at `replicates`
    runs: int                          # timed runs = replicates * cells
    cells: int
    per_factor: Mapping[str, int]
    per_factor_power: Mapping[str, float]
    binding_factor: str
    curve: tuple[tuple[int, float], ...]   # (n, power of the binding factor)
    detect: float
    sigma_log: float
    alpha: float
    target_power: float
    method: str
    notes: tuple[str, ...] = field(default_factory=tuple)

    def to_json_dict(self) -> dict:
        return {
            "replicates": self.replicates, "power": self.power, "runs": self.runs,
            "per_factor": dict(self.per_factor),
            "per_factor_power": dict(self.per_factor_power),
            "binding_factor": self.binding_factor, "cells": self.cells,
            "power_at": [{"replicates": n, "power": p} for n, p in self.curve],
            "detect": self.detect, "log_difference": log_difference(self.detect),
            "sigma_log": self.sigma_log, "alpha": self.alpha, "target_power": self.target_power,
            "for": self.method, "notes": list(self.notes),
        }


def _check_noise_and_levels(sigma_log: float, alpha: float, power: float) -> None:
    """A usage error unless the noise is positive and the confidence and power are
    proper fractions."""
    if not sigma_log > 0:
        raise UsageError("the noise must be positive (a CV like 2%, or a pilot with "
                         "varying run times)")
    if not 0 < alpha < 1 or not 0 < power < 1:
        raise UsageError("--confidence and --power must lie strictly between 0% and 100%")


def _curve_points(n: int) -> list[int]:
    """The replicate counts the power curve is shown at, around the answer ``n``."""
    return sorted({m for m in (2, 3, n // 2, n - 1, n, n + 1, 2 * n) if m >= 2})


def size_design(factors: Sequence[tuple[str, int]], detect: float, sigma_log: float,
                alpha: float = 0.05, power: float = 0.9, method: str = "anova",
                cells: int | None = None) -> SizingAnswer:
    """Replicates per cell so every factor's main effect of size ``detect`` is found.

    ``factors`` = [(name, number of levels)]; ``cells`` defaults to the full
    factorial (pass a fraction's cell count for a fractional design).
    """
    if method not in POWER_FUNCTIONS:
        raise UsageError(f"--for {method!r}: use 'anova' (main-effect F tests) or 'pairwise' "
                         f"(Holm-adjusted comparisons between levels)")
    if not factors:
        raise UsageError("no factors to size for; give --levels 3,2,4 or an experiment file")
    if not detect > 0:
        raise UsageError("the difference to detect must be positive, like 3%")
    _check_noise_and_levels(sigma_log, alpha, power)
    for name, a in factors:
        if a < 2:
            raise UsageError(f"factor {name!r} has {plural(a, 'level')}; a factor needs at least 2")
    if cells is None:
        cells = math.prod(a for _, a in factors)
    D = log_difference(detect)
    per = {name: replicates_needed(a, cells, D, sigma_log, alpha, power, method)
           for name, a in factors}
    n = max(per.values())
    fn = POWER_FUNCTIONS[method]
    pf = {name: fn(n, a, cells, D, sigma_log, alpha) for name, a in factors}
    order = {name: i for i, (name, _a) in enumerate(factors)}
    binding = min(pf, key=lambda k: (pf[k], order[k]))
    a_bind = dict(factors)[binding]
    others = _curve_points(n)
    curve = tuple((m, fn(m, a_bind, cells, D, sigma_log, alpha)) for m in others)
    notes = []
    if method == "pairwise":
        notes.append("pairwise power is a Bonferroni lower bound for Holm-adjusted comparisons "
                     "within each factor")
    return SizingAnswer(replicates=n, power=pf[binding], runs=n * cells, cells=cells,
                        per_factor=per, per_factor_power=pf, binding_factor=binding, curve=curve,
                        detect=detect, sigma_log=sigma_log, alpha=alpha, target_power=power,
                        method=method, notes=tuple(notes))


# -- noise from a pilot -------------------------------------------------------------

@dataclass(frozen=True)
class PilotNoise:
    sigma_log: float       # pooled within-cell SD of ln(response)
    df: int                # its degrees of freedom
    runs: int              # ok runs used
    cells: int             # cells with at least one ok run


def pilot_noise(runs, factors: Sequence[str], response: str = "wall_s") -> PilotNoise:
    """Pooled within-cell SD of ln(response) from a runs table (ok runs only).

    Within-cell pooling (the error of the cell-means model) is free of any
    factor effect, so the pilot may be any design with replicated cells.
    """
    import numpy as np

    df = runs
    if "status" in df.columns:
        df = df[df["status"] == "ok"]
    if response not in df.columns:
        raise UsageError(f"the pilot has no column {response!r}")
    y = df[response].astype(float)
    df = df[y > 0]
    if len(df) == 0:
        raise UsageError(f"the pilot has no successful runs with a positive {response}")
    missing = [f for f in factors if f not in df.columns]
    if missing:
        raise UsageError(f"the pilot has no factor column {missing[0]!r}")
    logy = np.log(df[response].astype(float).to_numpy())
    if factors:
        keys = df[list(factors)].astype(str).agg("\x1f".join, axis=1).to_numpy()
    else:
        keys = np.zeros(len(df), dtype=int)
    ss = 0.0
    dof = 0
    uniq = set(keys.tolist())
    for k in uniq:
        v = logy[keys == k]
        if len(v) > 1:
            ss += float(((v - v.mean()) ** 2).sum())
            dof += len(v) - 1
    if dof == 0:
        raise UsageError("the pilot has no cell with two or more successful runs, so its noise "
                         "cannot be estimated; run the pilot with replicates: 2 or more")
    return PilotNoise(sigma_log=math.sqrt(ss / dof), df=dof, runs=len(df), cells=len(uniq))


# -- interactions and trends ----------------------------------------------------------
#
# Every test sized below is an F test (a two-sided t test is F with one numerator
# degree of freedom), so one power function serves them all: an effect is its
# numerator degrees of freedom, its noncentrality per replicate of every cell, and
# the number of parameters of the model whose residual is the error term.

@dataclass(frozen=True)
class Effect:
    """One test to size: power(n) = P(F'(df1, n·cells − params; n·lam1) > F crit)."""

    name: str
    df1: int
    lam1: float          # noncentrality with one replicate per cell
    params: int          # parameters of the model whose residual is the error

    def power(self, n: int, cells: int, alpha: float) -> float:
        from scipy import stats

        df2 = n * cells - self.params
        if df2 <= 0 or self.df1 <= 0:
            return 0.0
        crit = stats.f.isf(alpha, self.df1, df2)
        return float(stats.ncf.sf(crit, self.df1, df2, n * self.lam1))


def interaction_effects(factors: Sequence[tuple[str, int]], cells: int, D: float,
                        sigma: float) -> list[Effect]:
    """Every two-factor interaction, sized for a ratio of ratios ``e^D``.

    The interaction to find: one factor's ratio between two of its levels changes
    by ``e^D`` between two levels of the other (a difference of differences D on
    the log scale). The smallest interaction pattern with that contrast puts
    ±D/4 on the four cells of a 2×2 sub-table, so Σ(αβ)² = D²/4 over the
    a×b table, each cell mean resting on cells/(a·b) combinations of the other
    factors: λ = n·(cells/(a·b))·D²/(4σ²), with (a−1)(b−1) degrees of freedom
    (Montgomery, *Design and Analysis of Experiments*, §5.3, for the
    noncentral F of a fixed-effects term).
    """
    out = []
    for i, (fa, a) in enumerate(factors):
        for fb, b in factors[i + 1:]:
            out.append(Effect(name=f"{fa}:{fb}", df1=(a - 1) * (b - 1),
                              lam1=cells / (a * b) * D * D / (4.0 * sigma * sigma),
                              params=cells))
    return out


def interaction_effects_on_cells(factors: Sequence[tuple[str, int]],
                                 cells: Sequence[Mapping[str, str]], D: float, sigma: float
                                 ) -> tuple[list[Effect], list[str]]:
    """Every two-factor interaction estimable on the cells an exclusion leaves, and why
    each other one is not: (effects, [one sentence per interaction left out]).

    The test is the extra-sum-of-squares F test of the ``a:b`` columns in the model
    with every main effect and every two-factor interaction, fitted to the cells that
    remain (treatment coding; a conditional factor's ``-`` is one more level), against
    the pure error of the cell means (``params`` = the cells), as for a full grid.
    With the cell means ``mu`` of one replicate, its noncentrality is
    ``lam1 = |(I - P_red) mu|² / σ²`` (``P_red`` the projection on the model without
    ``a:b``) on ``rank(full) − rank(reduced)`` degrees of freedom: the general linear
    hypothesis (Searle, *Linear Models*, 1971, §5.5). The planted pattern is the
    ±D/4 of `interaction_effects` on a 2×2 sub-grid of the two factors' levels, on
    every remaining cell with those levels; the sizing takes the sub-grid with the
    smallest noncentrality (the worst case). On a full grid this is exactly
    `interaction_effects`. An interaction needs a 2×2 sub-grid: two levels of ``a``
    each run with the same two levels of ``b``; where the rules leave none it
    cannot be estimated at all.
    """
    import numpy as np

    from benchharness.experiment.space import NOT_APPLIED

    names = [f for f, _ in factors]
    dummies = {f: _dummy_columns([c[f] for c in cells]) for f in names}
    pairs = [(fa, fb) for i, fa in enumerate(names) for fb in names[i + 1:]]
    inter = {pr: _product_columns(dummies[pr[0]], dummies[pr[1]]) for pr in pairs}
    main = np.column_stack([np.ones(len(cells))] + [dummies[f] for f in names])
    full = np.column_stack([main] + [inter[pr] for pr in pairs])
    rank_full = np.linalg.matrix_rank(full)
    effects, skipped = [], []
    for fa, fb in pairs:
        grids = _sub_grids([(c[fa], c[fb]) for c in cells
                            if c[fa] != NOT_APPLIED and c[fb] != NOT_APPLIED])
        if not grids:
            skipped.append(f"{fa}:{fb}: no 2×2 sub-grid, no two levels of {fa} run with the "
                           f"same two levels of {fb}")
            continue
        reduced = np.column_stack([main] + [inter[pr] for pr in pairs if pr != (fa, fb)])
        df1 = int(rank_full - np.linalg.matrix_rank(reduced))
        if df1 <= 0:
            skipped.append(f"{fa}:{fb}: its contrasts cannot be told apart from the other "
                           "interactions on these cells")
            continue
        lam = min(_unexplained(reduced, _pattern(cells, fa, fb, g, D)) for g in grids)
        effects.append(Effect(name=f"{fa}:{fb}", df1=df1, lam1=lam / (sigma * sigma),
                              params=len(cells)))
    return effects, skipped


def _dummy_columns(labels):
    """Treatment-coded indicator columns of one factor (its first level the reference)."""
    import numpy as np

    levels = list(dict.fromkeys(labels))
    return np.array([[lab == lv for lv in levels[1:]] for lab in labels], dtype=float
                    ).reshape(len(labels), len(levels) - 1)


def _product_columns(a, b):
    """Every product of a column of ``a`` with a column of ``b`` (an interaction's columns)."""
    import numpy as np

    cols = [a[:, i] * b[:, j] for i in range(a.shape[1]) for j in range(b.shape[1])]
    return np.column_stack(cols) if cols else np.zeros((a.shape[0], 0))


def _sub_grids(pairs) -> list[tuple]:
    """Every ((a1, a2), (b1, b2)) whose four combinations are all among ``pairs``."""
    have = set(pairs)
    la = list(dict.fromkeys(p[0] for p in pairs))
    lb = list(dict.fromkeys(p[1] for p in pairs))
    out = []
    for i, a1 in enumerate(la):
        for a2 in la[i + 1:]:
            for j, b1 in enumerate(lb):
                for b2 in lb[j + 1:]:
                    if {(a1, b1), (a1, b2), (a2, b1), (a2, b2)} <= have:
                        out.append(((a1, a2), (b1, b2)))
    return out


def _pattern(cells, fa, fb, grid, D):
    """±D/4 on the cells whose (fa, fb) levels lie on the 2×2 sub-grid, 0 elsewhere."""
    import numpy as np

    (a1, a2), (b1, b2) = grid
    sign = {(a1, b1): 1, (a2, b2): 1, (a1, b2): -1, (a2, b1): -1}
    return np.array([sign.get((c[fa], c[fb]), 0) * D / 4.0 for c in cells])


def _unexplained(X, mu) -> float:
    """|(I − P_X) mu|²: what of ``mu`` the columns of ``X`` cannot fit."""
    import numpy as np

    coef = np.linalg.lstsq(X, mu, rcond=None)[0]
    r = mu - X @ coef
    return float(r @ r)


def trend_effects(factors: Sequence[tuple[str, int]], values: Mapping[str, Sequence[float]],
                  cells: int, slope: float, sigma: float) -> list[Effect]:
    """The log-log slope of each numeric factor, and its difference across each other factor.

    With levels at u_j = ln x_j and S = Σ (u_j − ū)², the slope over a numeric
    factor with k levels, one intercept per combination of the others
    (m = cells/k of them), has variance σ²/(n·m·S): a slope ``slope`` away from
    the null gives λ = n·m·S·slope²/σ² on 1 degree of freedom, with m + 1
    parameters (`benchharness.analysis.trend`). Slopes that differ by ``slope``
    between two of the L levels of another factor (the rest midway) give
    Σ(b_l − b̄)² = slope²/2, each slope resting on m/L combinations:
    λ = n·(m/L)·S·slope²/(2σ²) on L − 1 degrees of freedom, with m + L parameters
    (the extra-sum-of-squares F test of separate slopes; Fisher 1932).
    """
    out = []
    sizes = dict(factors)
    for name, xs in values.items():
        u = [math.log(float(x)) for x in xs]
        mean = sum(u) / len(u)
        S = sum((v - mean) ** 2 for v in u)
        m = cells / len(u)
        out.append(Effect(name=f"trend over {name}", df1=1,
                          lam1=m * S * slope * slope / (sigma * sigma),
                          params=int(round(m)) + 1))
        for other, L in sizes.items():
            if other == name:
                continue
            out.append(Effect(name=f"{name} exponent by {other}", df1=L - 1,
                              lam1=(m / L) * S * slope * slope / (2.0 * sigma * sigma),
                              params=int(round(m)) + L))
    return out


def effect_replicates(effect: Effect, cells: int, alpha: float, power: float) -> int:
    """Smallest n ≥ 2 at which ``effect`` reaches ``power`` (doubling, then bisection)."""
    return _smallest_n(lambda n: effect.power(n, cells, alpha), power,
                       f" for {effect.name}; the effect to detect is tiny next to the noise")


def size_effects(effects: Sequence[Effect], cells: int, detect: float, sigma_log: float,
                 alpha: float, power: float, method: str, notes=()) -> SizingAnswer:
    """Replicates per cell so that every effect in ``effects`` is found with ``power``."""
    if not effects:
        raise UsageError({"interaction": "an interaction needs two factors or more",
                          "trend": "no numeric factor to size a trend for: give an "
                                   "experiment file whose levels are numbers (--levels FILE)"}
                         .get(method, "nothing to size"))
    _check_noise_and_levels(sigma_log, alpha, power)
    per = {e.name: effect_replicates(e, cells, alpha, power) for e in effects}
    n = max(per.values())
    pf = {e.name: e.power(n, cells, alpha) for e in effects}
    binding = min(effects, key=lambda e: (pf[e.name], -per[e.name]))
    others = _curve_points(n)
    curve = tuple((m, binding.power(m, cells, alpha)) for m in others)
    return SizingAnswer(replicates=n, power=pf[binding.name], runs=n * cells, cells=cells,
                        per_factor=per, per_factor_power=pf, binding_factor=binding.name,
                        curve=curve, detect=detect, sigma_log=sigma_log, alpha=alpha,
                        target_power=power, method=method, notes=tuple(notes))
