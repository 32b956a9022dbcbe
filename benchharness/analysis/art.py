"""Rank-based cross-check: the aligned rank transform ANOVA.

Owns the aligned rank transform of Wobbrock, Findlater, Gergle & Higgins
(2011, *Proc. CHI*, "The Aligned Rank Transform for Nonparametric Factorial
Analyses Using Only ANOVA Procedures"): for each effect, the response is
aligned (cell residual plus the estimated effect, built by inclusion-exclusion
from marginal means), the aligned values are ranked (average ranks for ties),
a full-factorial ANOVA is fitted to the ranks and only that effect's F test is
kept. Blocks are not aligned; the cross-check uses the experiment's factors.
"""

from __future__ import annotations

from itertools import combinations

import numpy as np

from benchharness.analysis.cells import index_cells, moments
from benchharness.analysis.model import fit_model, model_terms


def _marginal_mean_rows(codes, sizes, subset, y):
    """Mean of y over the margin ``subset`` of factors, evaluated for every row."""
    if not subset:
        return np.full(len(y), y.mean())
    key = np.zeros(len(y), dtype=np.int64)
    for f in subset:
        key = key * sizes[f] + codes[f]
    total = int(np.prod([sizes[f] for f in subset]))
    s = np.bincount(key, weights=y, minlength=total)
    n = np.bincount(key, minlength=total)
    mean = np.divide(s, n, out=np.zeros(total), where=n > 0)
    return mean[key]


def art_anova(codes, sizes, names, y, terms, ss_type, alpha, anova_p: dict) -> list[dict]:
    """ART F test per non-block term; ``anova_p`` holds the parametric p-values to compare."""
    from scipy import stats

    codes = list(codes)
    cells = index_cells(codes, sizes)
    mom = moments(cells.row_cell, y, cells.count)
    resid = y - mom.mean[cells.row_cell]
    full_terms = model_terms(list(names), "full")
    out = []
    for t in terms:
        if t.is_block:
            continue
        effect = np.zeros(len(y))
        k = len(t.factors)
        for r in range(k + 1):
            sign = (-1.0) ** (k - r)
            for sub in combinations(t.factors, r):
                effect += sign * _marginal_mean_rows(codes, sizes, sub, y)
        ranks = stats.rankdata(resid + effect)
        rmom = moments(cells.row_cell, ranks, cells.count)
        fit = fit_model(cells, rmom, full_terms, ss_type)
        row = next(x for x in fit.table if x.term == t.name)
        F_ = p = None
        if fit.df_resid > 0 and row.df > 0 and fit.rss > 0 and np.isfinite(row.sum_sq):
            F_ = (row.sum_sq / row.df) / (fit.rss / fit.df_resid)
            p = float(stats.f.sf(F_, row.df, fit.df_resid))
        p0 = anova_p.get(t.name)
        agrees = None
        if p is not None and p0 is not None:
            agrees = (p < alpha) == (p0 < alpha)
        out.append({"term": t.name, "df": row.df, "df_resid": fit.df_resid,
                    "F": None if F_ is None else float(F_), "p": p, "anova_p": p0,
                    "agrees": agrees})
    return out
