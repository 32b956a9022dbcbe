"""Post hoc and planned comparisons between level means of the fitted model.

Owns:

* pairwise t-tests between estimated marginal means on the model's mean square
  error and residual degrees of freedom (standard errors of the marginal means
  from the model, so unbalanced data are handled), adjusted within each factor
  by Bonferroni or Holm (Holm 1979, *Scand. J. Statistics* 6:65) — on request;
* Tukey HSD for each main effect (Tukey 1953; Kramer 1956 for unequal n):
  q = |difference| / (SE/√2) against the studentized range distribution
  (``srange``, checked against scipy);
* simple effects: when a two-factor interaction is significant, the levels of
  one factor compared within each level of the other, adjusted over that
  family;
* comparisons declared in advance in the experiment file (``compare:``),
  adjusted only among themselves because the family was fixed before the data.

Which families run by default is decided in ``analysis.__init__`` (``family``):
Tukey HSD for each significant main effect outside any significant
interaction, simple effects inside significant two-factor interactions, and
the declared comparisons; the others on request.

Orientation: every comparison is a ratio *level over reference*, like the
effects (> 1 = the level gives a larger response): a pair that contains the
factor's reference level has it as ``b``; any other pair puts the later level
over the earlier one.

Interval and p always come from the same adjustment, so an adjusted p below α
never sits beside an interval that contains 1×: Tukey intervals use the
studentized range quantile of its p-values; Bonferroni intervals have level
1 − α/m, the level of its p-values; with Holm, each interval has the level of
the step that decided it (α/(m − k) for the k-th smallest p while the steps
reject; the level of the first step that does not reject for the rest), so it
excludes 1× exactly when Holm rejects. Only the Bonferroni and Tukey intervals
are simultaneous at 1 − α; the Holm step intervals match its decisions.
"""

from __future__ import annotations

import math
from functools import lru_cache
from itertools import combinations

import numpy as np

from benchharness.errors import UsageError
from benchharness.analysis.effects import contrast_result, margin_rows
from benchharness.analysis.model import Fit

ADJUST = ("bonferroni", "holm")

#: comparison methods that can be requested by name (``declared`` always runs when given)
METHODS = ("tukey", "pairwise", "simple")


def adjust_p(p, method: str) -> np.ndarray:
    """Adjusted p-values of one family: Bonferroni, or Holm's (1979) step-down.

    Holm: the i-th smallest of m p-values (0-based) times m − i, capped at 1,
    with the running maximum carried forward so the adjusted values keep the
    order of the raw ones. The project's only Holm adjustment.
    """
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
    from benchharness.analysis import dist as stats

    if se is None or not (se > 0) or df <= 0:
        return None
    return float(2 * stats.t.sf(abs(d / se), df))


def _family(fit: Fit, items, choice, alpha, adjust, method):
    """items: (factor name, within dict|None, a label, b label, La, Lb).

    Raw p from the t test of each contrast; adjusted p by ``adjust``; each
    interval at the level that matches its adjusted p (see the module notes).
    """
    from benchharness.analysis import dist as stats

    m = len(items)
    if m == 0 or fit.df_resid <= 0:
        return []
    results, ps = [], []
    for factor, within, a, b, la, lb in items:
        r = contrast_result(fit, la, lb, choice, 1.0)
        ps.append(_t_p(r["estimate"], r["se"], fit.df_resid) if r["estimable"] else None)
        results.append(r)
    valid = [i for i, p in enumerate(ps) if p is not None]
    adj = adjust_p([ps[i] for i in valid], adjust)
    levels = step_levels([ps[i] for i in valid], alpha, adjust)
    p_adj = {i: float(pa) for i, pa in zip(valid, adj)}
    level = {i: lv for i, lv in zip(valid, levels)}
    rows = []
    for i, (factor, within, a, b, la, lb) in enumerate(items):
        q = float(stats.t.ppf(1 - level.get(i, alpha / m) / 2, fit.df_resid))
        r = contrast_result(fit, la, lb, choice, q) if results[i]["estimable"] else results[i]
        e = _entry(method, factor, within, a, b, r, ps[i])
        e["p_adj"] = p_adj.get(i)
        e["adjust"] = adjust
        e["family_size"] = m
        e["interval_level"] = 1 - level.get(i, alpha / m)
        rows.append(e)
    return rows


def step_levels(p, alpha: float, method: str) -> list[float]:
    """Two-sided level of each interval so that it excludes 0 exactly when ``method`` rejects.

    Bonferroni: α/m for all. Holm: α/(m − k) for the k-th smallest p (0-based)
    while every step up to it rejects, then the level of the first step that
    does not reject for that one and all larger p.
    """
    m = len(p)
    if m == 0:
        return []
    if method == "bonferroni":
        return [alpha / m] * m
    order = np.argsort(np.asarray(p, dtype=float), kind="stable")
    out = [0.0] * m
    stop = None
    for k, i in enumerate(order):
        if stop is None and not (p[i] * (m - k) < alpha):
            stop = alpha / (m - k)
        out[i] = stop if stop is not None else alpha / (m - k)
    return out


def oriented_pairs(k: int, ref: int = 0) -> list[tuple[int, int]]:
    """Every pair of levels as (a, b) for the ratio a/b, level over reference.

    A pair holding the reference level ``ref`` has it as b; other pairs put the
    later level over the earlier one.
    """
    out = []
    for i, j in combinations(range(k), 2):
        if j == ref:
            out.append((i, j))
        else:
            out.append((j, i))
    return out


def _entry(method, factor, within, a, b, r, p):
    e = {"method": method, "factor": factor, "within": within, "a": a, "b": b,
         "ratio": r["ratio"], "lower": r["lower"], "upper": r["upper"], "p": p, "p_adj": None,
         "estimate": r["estimate"], "se": r["se"]}
    for k in ("difference", "difference_lower", "difference_upper", "approximate"):
        if k in r:
            e[k] = r[k]
    return e


def pairwise(fit: Fit, names, levels, factor_idx, choice, alpha, adjust,
             refs=None) -> list[dict]:
    out = []
    for f in factor_idx:
        _, L = margin_rows(fit, (f,))
        items = [(names[f], None, levels[f][i], levels[f][j], L[i], L[j])
                 for i, j in oriented_pairs(fit.sizes[f], (refs or {}).get(f, 0))]
        out += _family(fit, items, choice, alpha, adjust, "pairwise")
    return out


@lru_cache(maxsize=256)
def _q_crit(alpha: float, k: int, df: int) -> float:
    from benchharness.analysis import srange

    return srange.isf(alpha, k, df)


def tukey(fit: Fit, names, levels, factor_idx, choice, alpha, refs=None) -> list[dict]:
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
        for i, j in oriented_pairs(k, (refs or {}).get(f, 0)):
            r = contrast_result(fit, L[i], L[j], choice, half)
            stat = None
            if r["estimable"] and r["se"] and r["se"] > 0:
                stat = abs(r["estimate"]) / (r["se"] / math.sqrt(2.0))
            e = _entry("tukey", names[f], None, levels[f][i], levels[f][j], r, None)
            e["q"] = stat
            e["adjust"] = "tukey"
            e["family_size"] = k * (k - 1) // 2
            e["interval_level"] = 1 - alpha
            rows.append(e)
            stats_q.append(stat)
        idx = [i for i, q in enumerate(stats_q) if q is not None]
        if idx:
            ps = srange.sf(np.array([stats_q[i] for i in idx]), k, fit.df_resid)
            from benchharness.analysis import dist as st

            for i, p in zip(idx, np.atleast_1d(ps)):
                # p: the pair's own two-sided t test (t = q / √2); p_adj: Tukey's
                rows[i]["p"] = float(2 * st.t.sf(stats_q[i] / math.sqrt(2.0), fit.df_resid))
                rows[i]["p_adj"] = float(p)
        out += rows
    return out


def simple_effects(fit: Fit, names, levels, anova_p: dict, choice, alpha,
                   adjust: str = "bonferroni", refs=None) -> list[dict]:
    """Within each level of B, compare levels of A, for significant two-factor interactions.

    One family per interaction and direction (A within B, B within A).
    """
    out = []
    for t in fit.terms:
        if t.is_block or len(t.factors) != 2 or t.parts is not None:   # nested: own ratios
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
                for i, j in oriented_pairs(fit.sizes[fa], (refs or {}).get(fa, 0)):
                    ci, cj = [0, 0], [0, 0]
                    ci[a_pos], ci[b_pos] = i, lb
                    cj[a_pos], cj[b_pos] = j, lb
                    items.append((names[fa], {names[fb]: levels[fb][lb]}, levels[fa][i],
                                  levels[fa][j], L[index[tuple(ci)]], L[index[tuple(cj)]]))
            rows = _family(fit, items, choice, alpha, adjust, "simple")
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
    return _family(fit, fam, choice, alpha, adjust, "declared")
