"""Rank-based cross-check: the aligned rank transform ANOVA, on the analysed scale.

Owns the aligned rank transform of Wobbrock, Findlater, Gergle & Higgins
(2011, *Proc. CHI*, "The Aligned Rank Transform for Nonparametric Factorial
Analyses Using Only ANOVA Procedures"): for each effect, the response is
aligned (model residual plus the estimated effect, built by
inclusion-exclusion from marginal means), the aligned values are ranked
(average ranks for ties), the analysis's own model is fitted to the ranks and
only that effect's F test is kept.

Two choices make it a cross-check of *these* F tests rather than of another
analysis:

* it works on the response **on the analysed scale** (log times when the
  analysis is on the log scale): aligning the original timings would test
  interactions on another scale, where multiplicative main effects do interact,
  and the check would disagree with correct F tests;
* it **follows the fitted model**: residuals are those of the model the
  analysis fitted (cell residuals only for the full model), and the ranks are
  fitted with the same terms (blocks included as additive terms), so a main
  effects model never costs a dense full-factorial fit. Block terms are not
  themselves cross-checked.
"""

from __future__ import annotations

from itertools import combinations

import numpy as np

from benchharness.analysis.cells import index_cells, moments
from benchharness.analysis.model import fit_model


def _marginal_mean_rows(codes, sizes, subset, y):
    """Mean of y over the margin ``subset`` of factors, evaluated for every row."""
    if not subset:
        return np.full(len(y), y.mean())
    key = np.zeros(len(y), dtype=np.int64)
    for f in subset:
        key = key * sizes[f] + codes[f]
    total = int(np.prod([sizes[f] for f in subset]))
    if total <= max(4 * len(y), 1 << 20):
        s = np.bincount(key, weights=y, minlength=total)
        n = np.bincount(key, minlength=total)
        mean = np.divide(s, n, out=np.zeros(total), where=n > 0)
        return mean[key]
    uniq, inv = np.unique(key, return_inverse=True)  # sparse margin: only observed keys
    s = np.bincount(inv, weights=y, minlength=len(uniq))
    n = np.bincount(inv, minlength=len(uniq))
    return (s / n)[inv]


def art_anova(codes, sizes, z, terms, ss_type, alpha, anova_p: dict,
              fitted=None) -> list[dict]:
    """ART F test per non-block term of the model ``terms``.

    ``codes``/``sizes`` describe the model's whole layout (factors and
    the block, if any); ``z`` is the response on the analysed scale; ``fitted``
    the model's fitted value of each row (computed when None); ``anova_p`` holds
    the parametric p-values to compare with.
    """
    from benchharness.analysis import dist as stats

    codes = list(codes)
    cells = index_cells(codes, sizes)
    if fitted is None:
        mom = moments(cells.row_cell, z, cells.count)
        fitted = fit_model(cells, mom, terms, ss_type).fitted[cells.row_cell]
    resid = z - fitted
    n_cells = np.bincount(cells.row_cell, minlength=cells.count).astype(float)
    out = []
    factored: dict = {}    # the ranks change per term, the design does not
    for t in terms:
        if t.is_block:
            continue
        effect = np.zeros(len(z))
        k = len(t.factors)
        for r in range(k + 1):
            sign = (-1.0) ** (k - r)
            for sub in combinations(t.factors, r):
                effect += sign * _marginal_mean_rows(codes, sizes, sub, z)
        aligned = resid + effect
        # equal responses must stay tied whatever the round-off of the fitted values
        step = 1e-10 * (float(np.abs(aligned).max()) or 1.0)
        ranks = stats.rankdata(np.round(aligned / step))
        rmom = moments(cells.row_cell, ranks, cells.count, n=n_cells)
        # only the one sum of squares kept: a fit per term, not a table per term
        fit = fit_model(cells, rmom, terms, ss_type, only=(t.name,), cache=factored)
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
