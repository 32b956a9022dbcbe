"""Post hoc and planned comparisons between level means of the fitted model.

Owns:

* pairwise t-tests between estimated marginal means on the model's mean square
  error and residual degrees of freedom (standard errors of the marginal means
  from the model, so unbalanced data are handled), adjusted within each factor
  by Bonferroni or Holm (Holm 1979, *Scand. J. Statistics* 6:65);
* Tukey HSD for each main effect (Tukey 1953; Kramer 1956 for unequal n):
  q = |difference| / (SE/√2) against the studentized range distribution
  (``srange``, checked against scipy);
* simple effects: when a two-factor interaction is significant, the levels of
  one factor compared within each level of the other, Holm-adjusted over that
  family;
* comparisons declared in advance in the experiment file (``compare:``),
  adjusted only among themselves because the family was fixed before the data.

Intervals for adjusted families are Bonferroni-simultaneous (level 1 − α/m),
which also covers Holm conservatively; Tukey intervals use the studentized
range quantile.
"""

from __future__ import annotations

import math
from functools import lru_cache
from itertools import combinations

import numpy as np

from benchharness.errors import UsageError
from benchharness.analysis.effects import contrast_result, margin_rows
from benchharness.analysis.model import Fit

ADJUST = ("holm", "bonferroni")


def adjust_p(p, method: str) -> np.ndarray:
    p = np.asarray(p, dtype=float)
    m = len(p)
    if m == 0:
        return p
    if method == "bonferroni":
        return np.minimum(p * m, 1.0)
    if method == "holm":
        order = np.argsort(p, kind="stable")
        adj = np.minimum(1.0, (m - np.arange(m)) * p[order])
        adj = np.maximum.accumulate(adj)
        out = np.empty(m)
        out[order] = adj
        return out
    raise UsageError(f"adjustment {method!r} is not one of {', '.join(ADJUST)}")


def _t_p(d, se, df):
    from scipy import stats

    if se is None or not (se > 0) or df <= 0:
        return None
    return float(2 * stats.t.sf(abs(d / se), df))


def _family(fit: Fit, items, choice, alpha, adjust, method, names):
    """items: (factor name, within dict|None, a label, b label, La, Lb)."""
    from scipy import stats

    m = len(items)
    if m == 0 or fit.df_resid <= 0:
        return []
    q = float(stats.t.ppf(1 - alpha / (2 * m), fit.df_resid))
    rows, ps = [], []
    for factor, within, a, b, la, lb in items:
        r = contrast_result(fit, la, lb, choice, q)
        p = _t_p(r["estimate"], r["se"], fit.df_resid) if r["estimable"] else None
        ps.append(p)
        rows.append(_entry(method, factor, within, a, b, r, p))
    valid = [i for i, p in enumerate(ps) if p is not None]
    adj = adjust_p([ps[i] for i in valid], adjust)
    for i, pa in zip(valid, adj):
        rows[i]["p_adj"] = float(pa)
    for row in rows:
        row["adjust"] = adjust
        row["family_size"] = m
    return rows


def _entry(method, factor, within, a, b, r, p):
    e = {"method": method, "factor": factor, "within": within, "a": a, "b": b,
         "ratio": r["ratio"], "lower": r["lower"], "upper": r["upper"], "p": p, "p_adj": None,
         "estimate": r["estimate"], "se": r["se"]}
    for k in ("difference", "difference_lower", "difference_upper", "approximate"):
        if k in r:
            e[k] = r[k]
    return e


def pairwise(fit: Fit, names, levels, factor_idx, choice, alpha, adjust) -> list[dict]:
    out = []
    for f in factor_idx:
        _, L = margin_rows(fit, (f,))
        items = [(names[f], None, levels[f][i], levels[f][j], L[i], L[j])
                 for i, j in combinations(range(fit.sizes[f]), 2)]
        out += _family(fit, items, choice, alpha, adjust, "pairwise", names)
    return out


@lru_cache(maxsize=256)
def _q_crit(alpha: float, k: int, df: int) -> float:
    from benchharness.analysis import srange

    return srange.isf(alpha, k, df)


def tukey(fit: Fit, names, levels, factor_idx, choice, alpha) -> list[dict]:
    from benchharness.analysis import srange

    if fit.df_resid <= 0:
        return []
    out = []
    for f in factor_idx:
        k = fit.sizes[f]
        if k < 2:
            continue
        _, L = margin_rows(fit, (f,))
        half = _q_crit(float(alpha), int(k), int(fit.df_resid)) / math.sqrt(2.0)
        rows, stats_q = [], []
        for i, j in combinations(range(k), 2):
            r = contrast_result(fit, L[i], L[j], choice, half)
            stat = None
            if r["estimable"] and r["se"] and r["se"] > 0:
                stat = abs(r["estimate"]) / (r["se"] / math.sqrt(2.0))
            e = _entry("tukey", names[f], None, levels[f][i], levels[f][j], r, None)
            e["q"] = stat
            rows.append(e)
            stats_q.append(stat)
        idx = [i for i, q in enumerate(stats_q) if q is not None]
        if idx:
            ps = srange.sf(np.array([stats_q[i] for i in idx]), k, fit.df_resid)
            for i, p in zip(idx, np.atleast_1d(ps)):
                rows[i]["p"] = rows[i]["p_adj"] = float(p)
        out += rows
    return out


def simple_effects(fit: Fit, names, levels, anova_p: dict, choice, alpha) -> list[dict]:
    """Within each level of B, compare levels of A, for significant two-factor interactions."""
    out = []
    for t in fit.terms:
        if t.is_block or len(t.factors) != 2:
            continue
        p = anova_p.get(t.name)
        if p is None or p >= alpha:
            continue
        combos, L = margin_rows(fit, t.factors)
        index = {tuple(c): g for g, c in enumerate(combos)}
        for a_pos, b_pos in ((0, 1), (1, 0)):
            fa, fb = t.factors[a_pos], t.factors[b_pos]
            items = []
            for lb in range(fit.sizes[fb]):
                for i, j in combinations(range(fit.sizes[fa]), 2):
                    ci, cj = [0, 0], [0, 0]
                    ci[a_pos], ci[b_pos] = i, lb
                    cj[a_pos], cj[b_pos] = j, lb
                    items.append((names[fa], {names[fb]: levels[fb][lb]}, levels[fa][i],
                                  levels[fa][j], L[index[tuple(ci)]], L[index[tuple(cj)]]))
            rows = _family(fit, items, choice, alpha, "holm", "simple", names)
            for r in rows:
                r["interaction"] = t.name
            out += rows
    return out


def parse_declared(spec, names, levels) -> list[dict]:
    """Normalise declared comparisons.

    Accepted item forms (a list of them)::

        {codec: [lzma, zlib]}                          # lzma against zlib
        {codec: [lzma, zlib], within: {corpus: text}}  # only for corpus=text
        {factor: codec, a: lzma, b: zlib, within: ...}
    """
    if spec is None:
        return []
    if isinstance(spec, dict):
        spec = [spec]
    if not isinstance(spec, (list, tuple)):
        raise UsageError("compare: expected a list of comparisons such as "
                         "[{codec: [lzma, zlib]}]")
    out = []
    for k, item in enumerate(spec, 1):
        try:
            out.append(_parse_item(item, k, names, levels))
        except UsageError as exc:
            exc.item = k
            raise
    return out


def _parse_item(item, k, names, levels) -> dict:
    where = f"compare item {k}"
    if not isinstance(item, dict):
        raise UsageError(f"{where}: expected a mapping such as {{codec: [lzma, zlib]}}")
    item = dict(item)
    within = item.pop("within", None) or None
    if "factor" in item:
        factor, a, b = item.pop("factor"), item.pop("a", None), item.pop("b", None)
        if item:
            raise UsageError(f"{where}: unknown key {next(iter(item))!r}")
    else:
        if len(item) != 1:
            raise UsageError(f"{where}: name exactly one factor with two levels, e.g. "
                             "{codec: [lzma, zlib]}")
        factor, pair = next(iter(item.items()))
        if not isinstance(pair, (list, tuple)) or len(pair) != 2:
            raise UsageError(f"{where}: {factor!r} needs a list of two levels [a, b]")
        a, b = pair
    factor, a, b = str(factor), str(a), str(b)
    if factor not in names:
        raise UsageError(f"{where}: {factor!r} is not a factor of the analysis")
    lv = levels[names.index(factor)]
    for x in (a, b):
        if x not in lv:
            raise UsageError(f"{where}: {x!r} is not a level of {factor!r} "
                             f"(levels: {', '.join(lv)})")
    if a == b:
        raise UsageError(f"{where}: a level compared with itself")
    if within is not None:
        if not isinstance(within, dict):
            raise UsageError(f"{where}: within must be a mapping factor: level")
        within = {str(kf): str(kv) for kf, kv in within.items()}
        for kf, kv in within.items():
            if kf not in names or kf == factor:
                raise UsageError(f"{where}: within names {kf!r}, not another factor")
            if kv not in levels[names.index(kf)]:
                raise UsageError(f"{where}: {kv!r} is not a level of {kf!r}")
    return {"factor": factor, "a": a, "b": b, "within": within}


def declared(fit: Fit, names, levels, items, choice, alpha, adjust) -> list[dict]:
    fam = []
    for it in items:
        f = names.index(it["factor"])
        wf = [names.index(k) for k in (it["within"] or {})]
        factors = tuple(sorted([f] + wf))
        combos, L = margin_rows(fit, factors)
        index = {tuple(c): g for g, c in enumerate(combos)}

        def row(level):
            key = []
            for x in factors:
                if x == f:
                    key.append(levels[f].index(level))
                else:
                    key.append(levels[x].index(it["within"][names[x]]))
            return L[index[tuple(key)]]

        fam.append((it["factor"], it["within"], it["a"], it["b"], row(it["a"]), row(it["b"])))
    return _family(fit, fam, choice, alpha, adjust, "declared", names)
