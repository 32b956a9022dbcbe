"""Estimated marginal means, level ratios and effect sizes.

Owns: estimated marginal means (least-squares means; Searle, Speed & Milliken
1980, *The American Statistician* 34:216) of every level and interaction cell,
i.e. the model's cell means averaged with equal weight over the levels of the
other factors and the blocks; their confidence intervals on the analysis
scale back-transformed to the original units (geometric means on the log
scale); the ratio of each level to a reference level (exact on the log scale,
delta method otherwise, flagged approximate); and per-term effect sizes:
partial η² = SS/(SS + SS_error) and ω² = (SS − df·MSE)/(SS_total + MSE)
(Hays 1963; Olejnik & Algina 2003), with ω² floored at 0.

With sum-to-zero coding each contrast column averages to zero over its
levels, so the averaging row of a marginal mean keeps only the intercept and
the columns of terms contained in the margin.
"""

from __future__ import annotations

import math

import numpy as np

from benchharness.analysis.model import Fit, sum_contrasts
from benchharness.analysis import transform as tr


#: most level combinations `margin_estimates` evaluates (beyond: None, nothing ranked)
MAX_MARGIN_CELLS = 2_000_000
#: rows of L built at a time by `margin_estimates` (memory: this × parameters × 8 bytes)
MARGIN_CHUNK = 20_000


def level_combos(sizes) -> np.ndarray:
    """(G, k) every combination of levels, the last factor varying fastest."""
    G = int(np.prod(sizes, dtype=np.int64)) if len(sizes) else 1
    if not len(sizes):
        return np.zeros((1, 0), dtype=np.int64)
    return np.stack(np.unravel_index(np.arange(G), tuple(sizes)), axis=1).astype(np.int64)


def margin_estimates(fit: Fit, factors: tuple[int, ...]):
    """(combos, est, se, ok) of every combination of ``factors``, built in chunks.

    Memory stays O(MARGIN_CHUNK × parameters) however many combinations there
    are; (None, None, None, None) above `MAX_MARGIN_CELLS` combinations.
    """
    sizes = [fit.sizes[f] for f in factors]
    if float(np.prod(sizes, dtype=np.float64)) > MAX_MARGIN_CELLS:
        return None, None, None, None
    combos = level_combos(sizes)
    parts = []
    for a in range(0, len(combos), MARGIN_CHUNK):
        _, L = margin_rows(fit, factors, combos[a:a + MARGIN_CHUNK])
        parts.append(linear_estimates(fit, L))
    est, se, ok = (np.concatenate([p_[i] for p_ in parts]) for i in range(3))
    return combos, est, se, ok


def margin_rows(fit: Fit, factors: tuple[int, ...], combos=None):
    """Averaging rows L (G, p) for every combination of the levels of ``factors``
    (or for the given (G, k) ``combos``)."""
    if fit.support is not None:   # cells missing by design: average over those that exist
        from benchharness.analysis.support import support_rows

        return support_rows(fit, factors, combos)
    if combos is None:
        combos = level_combos([fit.sizes[f] for f in factors])
    combos = np.asarray(combos, dtype=np.int64).reshape(-1, len(factors))
    G = len(combos)
    L = np.zeros((G, fit.X.shape[1]))
    L[:, 0] = 1.0
    fs = set(factors)
    pos = {f: j for j, f in enumerate(factors)}
    for t in fit.terms:
        if not set(t.factors) <= fs:
            continue
        m = np.ones((G, 1))
        for f in t.factors:
            c = sum_contrasts(fit.sizes[f])[combos[:, pos[f]]]
            m = (m[:, :, None] * c[:, None, :]).reshape(G, -1)
        L[:, fit.slices[t.name]] = m
    return combos, L


def margin_counts(fit: Fit, factors, combos) -> np.ndarray:
    """Number of observations behind each combination of ``factors``."""
    lv = fit.cells.levels[:, list(factors)]
    sizes = [fit.sizes[f] for f in factors]
    key = np.zeros(len(lv), dtype=np.int64)
    for j, k in enumerate(sizes):
        key = key * k + lv[:, j]
    total = np.bincount(key, weights=fit.moments.n, minlength=int(np.prod(sizes)))
    ckey = np.zeros(len(combos), dtype=np.int64)
    for j, k in enumerate(sizes):
        ckey = ckey * k + combos[:, j]
    return total[ckey]


def linear_estimates(fit: Fit, L: np.ndarray):
    """Estimates, standard errors (NaN without residual df) and estimability of rows of L."""
    est = L @ fit.beta
    var = ((L @ fit.cov_unscaled) * L).sum(axis=1) * fit.mse
    se = np.sqrt(np.maximum(var, 0.0))
    ok = fit.estimable(L)
    est = np.where(ok, est, np.nan)
    se = np.where(ok, se, np.nan)
    return est, se, ok


def t_quantile(fit: Fit, alpha: float) -> float:
    from benchharness.analysis import dist as stats

    if fit.df_resid <= 0:
        return float("nan")
    return float(stats.t.ppf(1 - alpha / 2, fit.df_resid))


def _num(x):
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


def marginal_means(fit: Fit, names, levels, choice, alpha: float, terms=None) -> list[dict]:
    """`means` entries for every (non-block) term of the model."""
    q = t_quantile(fit, alpha)
    out = []
    for t in (terms or fit.terms):
        if t.is_block:
            continue
        combos, L = margin_rows(fit, t.factors)
        est, se, ok = linear_estimates(fit, L)
        n = margin_counts(fit, t.factors, combos)
        mean = tr.inverse(est, choice)
        lo = tr.inverse(est - q * se, choice)
        hi = tr.inverse(est + q * se, choice)
        for g, combo in enumerate(combos):
            out.append({
                "term": t.name,
                "levels": {names[f]: levels[f][combo[j]] for j, f in enumerate(t.factors)},
                "mean": _num(mean[g]), "lower": _num(lo[g]), "upper": _num(hi[g]),
                "n": int(n[g]),
                "estimate": _num(est[g]), "se": _num(se[g]),   # analysis scale
                "estimable": bool(ok[g]),
            })
    return out


def contrast_result(fit: Fit, la: np.ndarray, lb: np.ndarray, choice, q: float) -> dict:
    """Ratio a/b (and difference for no transform) with an interval using quantile ``q``."""
    est, se, ok = linear_estimates(fit, np.vstack([la - lb, la, lb]))
    d, sd = est[0], se[0]
    out = {"estimate": _num(d), "se": _num(sd), "estimable": bool(ok[0])}
    if not ok[0]:
        out.update(ratio=None, lower=None, upper=None)
        return out
    if choice.name == "log":
        out.update(ratio=_num(math.exp(d)), lower=_num(math.exp(d - q * sd)),
                   upper=_num(math.exp(d + q * sd)), approximate=False)
        return out
    # original or Box-Cox scale: back-transformed means, delta-method interval for the ratio
    La = np.vstack([la, lb])
    cov = (La @ fit.cov_unscaled @ La.T) * fit.mse
    ea, eb = est[1], est[2]
    a, b = float(tr.inverse(ea, choice)), float(tr.inverse(eb, choice))
    ga, gb = float(tr.derivative_inverse(ea, choice)), float(tr.derivative_inverse(eb, choice))
    ratio = a / b if b else float("nan")
    if a > 0 and b > 0:
        v = (ga / a) ** 2 * cov[0, 0] + (gb / b) ** 2 * cov[1, 1] - 2 * ga * gb / (a * b) * cov[0, 1]
        s = math.sqrt(max(v, 0.0))
        # a mean at (or a rounding error above) zero leaves the log ratio unbounded
        lo, hi = ((ratio * math.exp(-q * s), ratio * math.exp(q * s)) if q * s < 700
                  else (0.0, math.inf))
    else:
        v = ratio**2 * ((ga / a) ** 2 * cov[0, 0] + (gb / b) ** 2 * cov[1, 1]
                        - 2 * ga * gb / (a * b) * cov[0, 1]) if a and b else float("nan")
        s = math.sqrt(max(v, 0.0)) if math.isfinite(v) else float("nan")
        lo, hi = ratio - q * s, ratio + q * s
    out.update(ratio=_num(ratio), lower=_num(lo), upper=_num(hi), approximate=True)
    if choice.name == "none":
        out.update(difference=_num(d), difference_lower=_num(d - q * sd),
                   difference_upper=_num(d + q * sd))
    return out


def level_ratios(fit: Fit, names, levels, factor_idx, references, choice, alpha) -> list[dict]:
    """`effects`: each level of each factor against its reference level."""
    q = t_quantile(fit, alpha)
    out = []
    for f in factor_idx:
        combos, L = margin_rows(fit, (f,))
        ref = references[f]
        part = _margin_over(fit, f, names, levels) if fit.support is not None else None
        for j in range(fit.sizes[f]):
            if j == ref:
                continue
            over = None
            if fit.support is not None and not (np.isfinite(L[j]).all()
                                                and np.isfinite(L[ref]).all()):
                r, over = _pair_ratio(fit, f, j, ref, choice, q, names, levels)
            else:
                r, over = contrast_result(fit, L[j], L[ref], choice, q), part
            entry = {"factor": names[f], "level": levels[f][j], "reference": levels[f][ref],
                     "ratio": r["ratio"], "lower": r["lower"], "upper": r["upper"]}
            for k in ("difference", "difference_lower", "difference_upper", "approximate"):
                if k in r:
                    entry[k] = r[k]
            entry["estimable"] = r["estimable"]
            entry["wording"] = ratio_wording(entry, names[f])
            if over:
                from benchharness.analysis.support import where_both_ran

                over, left_out = over
                entry["over"] = over
                entry["left_out"] = left_out
                entry["wording"] += f" ({where_both_ran(over, left_out)})"
            out.append(entry)
    return out


def _margin_over(fit: Fit, f: int, names, levels) -> list[dict] | None:
    """(The other factors' combinations the margins of factor ``f`` average over, those
    left out), when they
    are fewer than those that ran (``b=q`` ran only with ``a=x``: ``a``'s levels are compared
    at ``b=p`` only), so the wording says where the ratio holds; None when it is all of them
    (`benchharness.analysis.support.margin_plan`)."""
    from benchharness.analysis.support import margin_plan

    plan = margin_plan(fit.support, (f,))
    cross = plan["cross"] if plan else []
    if not cross:
        return None
    ran = {tuple(c) for c in fit.support.cells[:, cross].tolist()}
    if not plan["common"] or len(plan["common"]) >= len(ran):
        return None
    return _named(plan["common"], cross, names, levels), \
        _named(sorted(ran - set(plan["common"])), cross, names, levels)


def _named(combos, factors, names, levels) -> list[dict]:
    """Level codes of ``factors`` as ``{factor: level}`` dicts."""
    return [{names[g]: levels[g][c[i]] for i, g in enumerate(factors)} for c in combos]


def _pair_ratio(fit: Fit, f: int, j: int, ref: int, choice, q, names, levels):
    """(contrast, (the other factors' combinations it averages over, those where only one
    of the two ran)) of levels ``j`` and ``ref`` of factor ``f`` over the combinations where
    both ran, when the cells missing by design leave the level's margin undefined (`benchharness.analysis.support.pair_rows`)."""
    from benchharness.analysis.support import pair_rows

    la, lb, common, others = pair_rows(fit, (f,), (j,), (ref,))
    if la is None:
        return {"ratio": None, "lower": None, "upper": None, "estimable": False}, None
    cells = fit.support.cells
    either = {tuple(c) for c in cells[np.isin(cells[:, f], (j, ref))][:, others].tolist()}
    left_out = sorted(either - set(common))
    return contrast_result(fit, la, lb, choice, q), (_named(common, others, names, levels),
                                                     _named(left_out, others, names, levels))


def ratio_wording(e: dict, factor: str, level_of_confidence: str = "95%") -> str:
    """One plain sentence for a level ratio, e.g. ``codec=lzma is 2.31× codec=zlib (131% higher ...)``."""
    from benchharness.numbers import fmt_ratio, fmt_ratio_interval

    r, lo, hi = e["ratio"], e["lower"], e["upper"]
    a, b = f"{factor}={e['level']}", f"{factor}={e['reference']}"
    if r is None:
        return f"{a} cannot be compared with {b}: the cells needed are empty"
    about = "about " if e.get("approximate") else ""
    pct = (r - 1.0) * 100.0
    change = f"{abs(pct):.3g}% {'higher' if pct > 0 else 'lower'}" if pct else "the same"
    text = f"{a} is {about}{fmt_ratio(r)} {b} ({change}"
    if lo is None or hi is None:
        return text + "; no interval without residual degrees of freedom)"
    text += f"; {level_of_confidence} interval {fmt_ratio_interval(lo, hi)})"
    if lo <= 1.0 <= hi:
        text += ": not distinguishable"
    return text


def effect_sizes(ss: float, df: int, ss_error: float, ss_total: float, mse: float):
    """(partial η², ω²) of one term; None where undefined."""
    if not math.isfinite(ss):
        return None, None
    peta = ss / (ss + ss_error) if (ss + ss_error) > 0 else None
    if math.isfinite(mse) and (ss_total + mse) > 0:
        omega = max((ss - df * mse) / (ss_total + mse), 0.0)
    else:
        omega = None
    return peta, omega
