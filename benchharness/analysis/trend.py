"""Trends over numeric factors: log-log slopes, their differences, lack of fit, polynomials.

For a factor whose levels are quantities (`benchharness.experiment.quantities`),
the ANOVA treats ``n = 1000, 10000, 100000`` as three labels; this module adds,
beside it, what a quantity lets us ask: how does the response grow with it?

* **The exponent** (the log-log slope): ``log y = a_c + b·log x + e`` with one
  intercept per combination of the other factors (and the block, additively),
  fitted by least squares, so ``y ∝ x^b``; its t interval on the model's own
  residual degrees of freedom. This is the ordinary regression
  ``log(y) ~ log(x) + C(others)`` (a power law, e.g. Montgomery, *Design and
  Analysis of Experiments*, ch. 10 on regression with a factorial).
* **Whether the exponent differs** with each other factor: one slope per level
  of it (``... + C(g):log x``), and the extra-sum-of-squares F test of the
  separate slopes against the common one (the test of an interaction between
  a covariate and a factor; analysis of covariance, Fisher 1932).
* **Lack of fit** of the straight line on log-log axes: a line per
  combination of the other factors against the cell means, with the pure
  error (the within-cell variation) as denominator (Draper & Smith, *Applied
  Regression Analysis*, 1998, §2.1). With two levels there is nothing to test.
* **Orthogonal polynomial contrasts** of the factor's marginal means (equal
  weight to every combination of the other factors), with coefficients built
  for the actual spacing of the levels, on the same axis as the slope (log x
  when every level is positive): the Gram-Schmidt orthogonalisation of the
  powers of the scores (Fisher & Yates 1938 tabulate the equally spaced case;
  for unequal spacing, Robson 1959, *Biometrics* 15:187). Each contrast has
  its sum of squares, F and p against the pure error; they add up to the
  factor's main-effect sum of squares in a balanced experiment.

Everything is computed from per-cell counts, means and within-cell sums of
squares of log y (`cells.moments`), so the cost grows with the cells, not the
rows. The trend uses the log of the response whatever the ANOVA's scale (an
exponent is a statement about logs); it needs a positive response.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

#: degree names of the first polynomial contrasts
DEGREE_NAMES = ("linear", "quadratic", "cubic", "quartic")


@dataclass(frozen=True)
class CellData:
    """Per-cell statistics of log y over the factors (and the block)."""

    codes: np.ndarray        # (C, F) level code of every factor in every cell
    block: np.ndarray | None  # (C,) block code, or None
    n: np.ndarray            # (C,) runs
    mean: np.ndarray         # (C,) mean of log y
    ss_cells: np.ndarray     # (C,) within-cell sum of squares
    N: int

    @property
    def ss_within(self) -> float:
        """The pooled within-cell sum of squares."""
        return float(self.ss_cells.sum())

    def subset(self, mask: np.ndarray) -> "CellData":
        """The cells ``mask`` keeps."""
        return CellData(codes=self.codes[mask], block=None if self.block is None
                        else self.block[mask], n=self.n[mask], mean=self.mean[mask],
                        ss_cells=self.ss_cells[mask], N=int(self.n[mask].sum()))


@dataclass(frozen=True)
class LinFit:
    """A weighted least-squares fit of cell means (exact for the rows)."""

    coef: np.ndarray
    cov: np.ndarray          # unscaled: (X'WX)^+
    rss: float
    df: int

    @property
    def mse(self) -> float:
        return self.rss / self.df if self.df > 0 else float("nan")


def cell_data(codes, block_codes, y) -> CellData:
    """Cell statistics of log y for coded factors (list of (N,) arrays) and a block."""
    from benchharness.analysis.cells import index_cells, moments

    cols = [np.asarray(c, dtype=np.int64) for c in codes]
    sizes = [int(c.max()) + 1 if len(c) else 1 for c in cols]
    if block_codes is not None:
        cols.append(np.asarray(block_codes, dtype=np.int64))
        sizes.append(int(cols[-1].max()) + 1)
    cells = index_cells(cols, sizes)
    z = np.log(np.asarray(y, dtype=float))
    mom = moments(cells.row_cell, z, cells.count)
    nf = len(codes)
    return CellData(codes=cells.levels[:, :nf], block=(cells.levels[:, nf]
                                                       if block_codes is not None else None),
                    n=mom.n, mean=mom.mean, ss_cells=mom.ss_within,
                    N=int(len(z)))


def wls(X: np.ndarray, cd: CellData, target=None) -> LinFit:
    """Least squares of the rows' log y on cell-level columns ``X`` (C × p)."""
    m = cd.mean if target is None else target
    w = np.sqrt(cd.n)
    A = X * w[:, None]
    b = m * w
    if not A.size:
        return LinFit(coef=np.zeros(X.shape[1]), cov=np.zeros((X.shape[1],) * 2),
                      rss=float(b @ b) + cd.ss_within, df=cd.N)
    # one SVD gives the minimum-norm solution, the rank and (X'WX)^+ together
    U, sv, Vt = np.linalg.svd(A, full_matrices=False)
    keep = sv > sv[0] * max(A.shape) * np.finfo(float).eps
    Uk, sk, Vk = U[:, keep], sv[keep], Vt[keep].T
    coef = Vk @ ((Uk.T @ b) / sk)
    r = b - Uk @ (Uk.T @ b)
    rss = float(r @ r) + cd.ss_within
    return LinFit(coef=coef, cov=(Vk / sk**2) @ Vk.T, rss=max(rss, 0.0),
                  df=cd.N - int(keep.sum()))


def one_hot(codes) -> np.ndarray:
    """Indicator columns of the distinct values of ``codes`` (in sorted order)."""
    _, inv = np.unique(codes, return_inverse=True)
    inv = inv.reshape(-1)
    out = np.zeros((len(inv), int(inv.max()) + 1 if len(inv) else 0))
    out[np.arange(len(inv)), inv] = 1.0
    return out


def group_ids(codes: np.ndarray, cols) -> np.ndarray:
    """Id of every cell's combination of the factor columns ``cols`` (0 when none)."""
    if not len(cols):
        return np.zeros(codes.shape[0], dtype=np.int64)
    _, inv = np.unique(codes[:, list(cols)], axis=0, return_inverse=True)
    return inv.reshape(-1)


def base_columns(cd: CellData, others) -> np.ndarray:
    """One intercept per combination of the other factors, plus the block additively."""
    cols = [one_hot(group_ids(cd.codes, others))]
    if cd.block is not None:
        cols.append(one_hot(cd.block)[:, 1:])
    return np.hstack(cols)


def f_test(small: LinFit, big: LinFit, denom: LinFit | None = None) -> dict | None:
    """Extra-sum-of-squares F test of ``big`` against the nested ``small``."""
    from benchharness.analysis import dist as stats

    denom = denom or big
    df1 = small.df - big.df
    if df1 <= 0 or denom.df <= 0 or not denom.rss > 0:
        return None
    F = ((small.rss - big.rss) / df1) / denom.mse
    F = max(F, 0.0)
    return {"F": F, "df1": int(df1), "df2": int(denom.df), "p": float(stats.f.sf(F, df1,
                                                                                  denom.df))}


def t_interval(est: float, se: float, df: int, alpha: float) -> dict:
    """Estimate, standard error, t interval and two-sided p against zero."""
    from benchharness.analysis import dist as stats

    if df <= 0 or not math.isfinite(se):
        return {"estimate": est, "se": None, "lower": None, "upper": None, "df": int(df),
                "p": None}
    q = float(stats.t.ppf(1 - alpha / 2, df))
    p = float(2 * stats.t.sf(abs(est / se), df)) if se > 0 else (0.0 if est else 1.0)
    return {"estimate": est, "se": se, "lower": est - q * se, "upper": est + q * se,
            "df": int(df), "p": p}


def orthogonal_polynomials(scores) -> np.ndarray:
    """(k, k−1) orthonormal polynomial contrasts for levels at ``scores`` (any spacing).

    Column d is the degree-(d+1) polynomial in the scores made orthogonal to
    every lower degree (QR of the Vandermonde matrix of centred scores), scaled
    to unit length and signed so its last coefficient is positive.
    """
    x = np.asarray(scores, dtype=float)
    x = (x - x.mean()) / (x.std() or 1.0)
    V = np.vander(x, len(x), increasing=True)
    Q, _ = np.linalg.qr(V)
    P = Q[:, 1:]
    P = P * np.sign(P[-1, :])[None, :]
    return P


@dataclass(frozen=True)
class Saturated:
    """The cell-means model: one mean per factor cell (plus the block)."""

    fit: LinFit
    groups: np.ndarray          # (C,) factor-cell id of every cell
    cell_codes: np.ndarray      # (G, F) the factor codes of every factor cell
    block_mean: np.ndarray      # weights on the block columns giving their average


def saturated(cd: CellData) -> Saturated:
    """The cell-means model (closed form without a block: the means themselves)."""
    groups = group_ids(cd.codes, range(cd.codes.shape[1]))
    first = np.zeros(int(groups.max()) + 1 if len(groups) else 0, dtype=np.int64)
    first[groups] = np.arange(len(groups))
    if cd.block is None:       # one cell per factor cell: no least squares needed
        coef = np.zeros(len(first))
        coef[groups] = cd.mean
        inv_n = np.zeros(len(first))
        inv_n[groups] = 1.0 / cd.n
        fit = LinFit(coef=coef, cov=np.diag(inv_n), rss=cd.ss_within, df=cd.N - len(first))
        return Saturated(fit=fit, groups=groups, cell_codes=cd.codes[first],
                         block_mean=np.zeros(0))
    B = one_hot(cd.block)[:, 1:]
    bm = np.full(B.shape[1], 1.0 / (B.shape[1] + 1))
    return Saturated(fit=wls(np.hstack([one_hot(groups), B]), cd), groups=groups,
                     cell_codes=cd.codes[first], block_mean=bm)


def marginal(sat: Saturated, fixed: dict):
    """(mean of log y, se, its weights over the fit's coefficients) over the factor cells
    matching ``fixed`` {factor index: code}, each weighted equally; None when none ran.
    Callers check `complete` first: with cells missing, an equal-weight mean is not the
    marginal mean of the design."""
    codes = sat.cell_codes
    mask = np.ones(len(codes), dtype=bool)
    for j, c in fixed.items():
        mask &= codes[:, j] == c
    idx = np.flatnonzero(mask)
    if not len(idx):
        return None
    L = np.zeros(len(sat.fit.coef))
    L[idx] = 1.0 / len(idx)
    L[len(codes):] = sat.block_mean
    est = float(L @ sat.fit.coef)
    var = float(L @ sat.fit.cov @ L) * sat.fit.mse
    return est, math.sqrt(var) if var >= 0 else float("nan"), L


def complete(cd: CellData, sizes) -> bool:
    """Whether every combination of the factors' levels was observed (EMMs defined)."""
    groups = np.unique(group_ids(cd.codes, range(cd.codes.shape[1])))
    return len(groups) == int(np.prod(sizes))


# ---- one numeric factor ---------------------------------------------------------------------

def slope_fits(cd: CellData, j: int, u_levels: np.ndarray, others: list[int]):
    """(the common-slope fit, its intercept columns, each cell's score) for factor ``j``;
    the slope is the fit's last coefficient."""
    u = u_levels[cd.codes[:, j]]
    base = base_columns(cd, others)
    common = wls(np.hstack([base, u[:, None]]), cd)
    return common, base, u


def confounded_with_block(cd: CellData, j: int, values) -> bool:
    """Whether factor ``j``'s trend is lost in the block: its score column is a combination
    of the block's and the other factors' intercepts (e.g. each block ran one level of it,
    as a gate's pairs do), but not of the other factors' intercepts alone. Least squares
    would then split the factor's effect between the slope and the block columns in an
    arbitrary way and give a slope with a narrow but meaningless interval."""
    if cd.block is None:
        return False
    values = np.asarray(values, dtype=float)
    scores = np.log(values) if np.all(values > 0) else values
    u = scores[cd.codes[:, j]][:, None]
    others = [i for i in range(cd.codes.shape[1]) if i != j]
    plain = one_hot(group_ids(cd.codes, others))
    base = base_columns(cd, others)
    rank = np.linalg.matrix_rank
    return bool(rank(np.hstack([base, u])) == rank(base)
                and rank(np.hstack([plain, u])) > rank(plain))


def trend_of(cd: CellData, j: int, name: str, labels, values, names, sizes, alpha: float,
             sat: Saturated, importance: dict) -> dict:
    """Everything the trend section says about numeric factor ``j``."""
    values = np.asarray(values, dtype=float)
    loglog = bool(np.all(values > 0))
    scores = np.log(values) if loglog else values
    others = [i for i in range(len(names)) if i != j]
    common, base, u = slope_fits(cd, j, scores, others)
    k = len(values)
    out: dict = {"factor": name, "levels": list(labels), "values": values.tolist(),
                 "axis": f"log {name}" if loglog else name, "log_log": loglog}
    slope = t_interval(float(common.coef[-1]), math.sqrt(max(common.cov[-1, -1], 0.0)
                                                         * common.mse), common.df, alpha)
    untested = no_run_to_run_variation(cd)
    if untested:
        # Repeated runs of a cell all gave the same value: there is no noise to judge a
        # slope or a difference of slopes against (the residuals of a line are its lack
        # of fit, not noise), so the exponents are given as measured, untested.
        slope = {**slope, "se": None, "lower": None, "upper": None, "p": None}
        out["untested"] = "no run-to-run variation"
    out["slope"] = slope if loglog else None
    if not loglog:
        out["slope_on_log_scale"] = slope   # log y per unit of the factor
    out["by"] = [slope_by(cd, j, g, u, base, common, names, alpha, untested) for g in others]
    out["lack_of_fit"] = lack_of_fit(cd, u, base, others, sat, k)
    full = complete(cd, sizes)
    out["contrasts"] = (polynomial_contrasts(sat, j, scores, alpha)
                        if full and sat.fit.df > 0 else [])
    # the figure's lines: by the factor the exponent differs with most, where one does (so
    # the figure shows what the finding says), else by the most important other factor
    differ = [b for b in out["by"] if b["differ"]]
    line_by = (names.index(min(differ, key=lambda b: b["test"]["p"])["factor"]) if differ
               else most_important(others, names, importance))
    out["line_by"] = names[line_by] if line_by is not None else None
    out["line_by_reason"] = ("exponent differs" if differ else
                             "largest effect" if line_by is not None else None)
    out["points"] = points(sat, j, line_by, names, sizes, alpha) if full else []
    return out


def no_run_to_run_variation(cd: CellData) -> bool:
    """Cells were run more than once and every repeat gave the same value."""
    return bool(np.any(cd.n > 1)) and cd.ss_within == 0


def slope_by(cd: CellData, j: int, g: int, u, base, common: LinFit, names, alpha,
             untested: bool = False) -> dict:
    """A slope per level of factor ``g``, and the F test of their differences (none when
    ``untested``: no run-to-run variation to test against)."""
    G = one_hot(cd.codes[:, g])
    present = np.unique(cd.codes[:, g])
    fit = wls(np.hstack([base, u[:, None] * G]), cd)
    p0 = base.shape[1]
    slopes = []
    for col, code in enumerate(present):
        i = p0 + col
        se = math.sqrt(max(fit.cov[i, i], 0.0) * fit.mse) if fit.df > 0 else float("nan")
        s = t_interval(float(fit.coef[i]), se, fit.df, alpha)
        if untested:
            s = {**s, "se": None, "lower": None, "upper": None, "p": None}
        slopes.append({"level": int(code), **s})
    test = None if untested else f_test(common, fit)
    return {"factor": names[g], "slopes": slopes, "test": test,
            "differ": bool(test is not None and test["p"] < alpha)}


def lack_of_fit(cd: CellData, u, base, others, sat: Saturated, k: int) -> dict | None:
    """A straight line per combination of the other factors against the cell means
    (pure error in the denominator); None with two levels or no pure error."""
    gid = group_ids(cd.codes, others)
    lines = wls(np.hstack([base, u[:, None] * one_hot(gid)]), cd)
    test = f_test(lines, sat.fit)
    if test is None:
        return None
    return {**test, "pure_error_df": int(sat.fit.df)}


def polynomial_contrasts(sat: Saturated, j: int, scores, alpha: float) -> list[dict]:
    """Orthonormal polynomial contrasts of factor ``j``'s marginal means (log y)."""
    from benchharness.analysis import dist as stats

    P = orthogonal_polynomials(scores)
    k = len(scores)
    Ls = []
    for level in range(k):
        m = marginal(sat, {j: level})
        if m is None:
            return []
        Ls.append(m[2])
    Ls = np.asarray(Ls)
    fit = sat.fit
    out = []
    for d in range(P.shape[1]):
        L = P[:, d] @ Ls
        est = float(L @ fit.coef)
        v = float(L @ fit.cov @ L)
        ss = est * est / v if v > 0 else 0.0
        F = ss / fit.mse if fit.mse > 0 else float("nan")
        p = float(stats.f.sf(F, 1, fit.df)) if math.isfinite(F) else None
        out.append({"degree": d + 1,
                    "name": DEGREE_NAMES[d] if d < len(DEGREE_NAMES) else f"degree {d + 1}",
                    "coefficients": P[:, d].tolist(), "estimate": est,
                    "se": math.sqrt(v * fit.mse) if v > 0 else None, "sum_sq": ss,
                    "F": F, "df": int(fit.df), "p": p})
    return out


def most_important(others: list[int], names, importance: dict):
    """The other factor with the largest main-effect partial η² (None when no other)."""
    if not others:
        return None
    return max(others, key=lambda g: (importance.get(names[g]) or 0.0, -g))


def points(sat: Saturated, j: int, g, names, sizes, alpha: float) -> list[dict]:
    """Geometric means (with t intervals) of the response at every level of ``j``, per level
    of ``g`` (averaged over the rest on the log scale), for the figure."""
    from benchharness.analysis import dist as stats

    q = float(stats.t.ppf(1 - alpha / 2, sat.fit.df)) if sat.fit.df > 0 else float("nan")
    out = []
    glevels = range(sizes[g]) if g is not None else [None]
    for gl in glevels:
        for level in range(sizes[j]):
            fixed = {j: level} if gl is None else {j: level, g: gl}
            m = marginal(sat, fixed)
            if m is None:
                continue
            est, se, _ = m
            ok = math.isfinite(q) and math.isfinite(se)
            out.append({"level": level, "by": gl, "mean": math.exp(est),
                        "lower": math.exp(est - q * se) if ok else None,
                        "upper": math.exp(est + q * se) if ok else None})
    return out
