"""Findings: what the fitted analysis says, as structured statements every report renders.

Owns two steps:

* ``best_cells`` — the best cell and the set of cells not distinguishable from
  it, from the fitted model's estimated cell means. A cell stays in the tied
  set unless some other cell is better by more than ``d`` standard errors of
  their difference (Gupta's subset selection, Gupta 1965, *Technometrics* 7:225;
  its equivalence with constrained multiple comparisons with the best is
  Hsu 1984, *Annals of Statistics* 12:1136). ``d`` is each cell's own critical
  value of Hsu's multiple comparisons with the best (Dunnett 1955's one-sided
  many-to-one quantile, `analysis.mcb`, at ``tie_confidence``): the method and
  level `choose` uses, so the two commands never word one tie two ways; for two
  cells exactly the ordinary two-sided t test, so a tied pair never contradicts
  a main effect. The weights treat the cell estimates as independent (exact
  for a full model's cell means); past `MCB_MAX_CELLS` the Bonferroni quantile.
* ``derive`` — the ONE function that turns the analysis (plain data, as in
  ``analysis.json``) into ``findings``: a list of dicts with ``kind`` (main,
  interaction, simple effect, trend, scaling, best, caution), ``terms``, ``factors``,
  ``significant``, ``ratio``/``lower``/``upper``, ``p`` and a one-line
  ``statement``. Headlines and reports only render these.

Rules the findings keep:

* a factor inside a significant interaction is never "no detectable
  difference": its effect is stated per level of its partner, with intervals
  (from the simple-effect comparisons);
* a term is called significant only when its stated interval agrees (a
  significant F whose adjusted intervals all contain 1× is said as such);
* the best cell, or the tied set, with its ratio to the runner-up, is always
  stated; "best" respects the response's direction (``better``).

Terms are named as the ANOVA rows name them (alias chains included).
"""

from __future__ import annotations

import math
import re

from benchharness import numbers as _numbers
from benchharness.analysis.trend_words import adjusted_words, findings as numeric_findings

KINDS = ("surface", "interaction", "simple effect", "main", "trend", "scaling", "best",
         "caution")

#: most cells named in the tied set's statement (the finding lists them all)
TIED_NAMED = 6
#: more cells than this: no tied set is computed (k² differences)
MAX_CELLS_FOR_TIES = 2000
#: at most this many cells (the best first) are listed in ``best["cells"]``
MAX_CELLS_LISTED = 2000


# ---------------------------------------------------------------------------------------------
# formatting (plain text; renderers may restyle)

def fmt_ratio(r) -> str:
    """A ratio, ``1.23×`` (`benchharness.numbers`, the formatter of every output)."""
    return _numbers.fmt_ratio(r)


def fmt_interval(lo, hi) -> str:
    """A ratio interval inside a sentence: ``[1.09× to 1.29×]``."""
    if lo is None or hi is None:
        return "[no interval]"
    return f"[{_numbers.fmt_ratio_interval(lo, hi)}]"


def fmt_p(p) -> str:
    """A p-value in a sentence, written as every output writes one (``numbers.fmt_p``):
    ``p = 0.013``, ``p < 0.001``. Never rounded to two figures, which could print a p
    above the threshold as the threshold itself (0.0112 as ``0.01`` at 99% confidence)."""
    return _numbers.fmt_p_said(p)


#: name suffixes of time responses and their size in seconds (a ``_per_s`` rate is not a time)
_TIME_SUFFIXES = (("_ns", 1e-9), ("_us", 1e-6), ("_ms", 1e-3), ("_s", 1.0))


def seconds_per_unit(response: str) -> float | None:
    """Seconds per unit of a response named as a time (``wall_s``, ``latency_ms``), else None.

    ``ops_per_s`` ends in ``_s`` but is a rate, not a time: higher is not slower.
    """
    low = str(response or "").lower()
    if low.endswith("_per_s"):
        return None
    return next((f for suf, f in _TIME_SUFFIXES if low.endswith(suf)), None)


def fmt_value(x, response: str, unit: str | None = None) -> str:
    """A mean in the response's units: the unit a metric declares (``rows/s``, printed as
    declared, or rescaled when it is a time or a size), else the one its name carries
    (``_s``, ``_kib``, ``_per_s``)."""
    if x is None or not math.isfinite(x):
        return "–"
    if unit:
        return _numbers.fmt_quantity(x, unit)
    if str(response).lower().endswith("_per_s"):
        return f"{_numbers.fmt_num(x)} per s"
    sec = seconds_per_unit(response)
    if sec is not None:
        return _numbers.fmt_seconds(x * sec)
    if str(response).lower().endswith("_kib"):
        return _numbers.fmt_quantity(x, "KiB")
    return _numbers.fmt_num(x, 4)


def cell_text(levels: dict) -> str:
    return ", ".join(f"{k}={v}" for k, v in levels.items())


def _and(items) -> str:
    items = list(items)
    if len(items) <= 1:
        return "".join(items)
    return ", ".join(items[:-1]) + " and " + items[-1]


# ---------------------------------------------------------------------------------------------
# the best cell and the tied set (needs the fit)

def _listed_cells(order, combos, est, se, mean, names, levels, setting_idx) -> list[dict]:
    """The first `MAX_CELLS_LISTED` cells, best first, as plain data."""
    cells = []
    for g, c in enumerate(order[:MAX_CELLS_LISTED]):
        cells.append({"levels": {names[f]: levels[f][combos[c][j]]
                                 for j, f in enumerate(setting_idx)},
                      "mean": _num(mean[g]), "estimate": _num(est[c]), "se": _num(se[c])})
    return cells


def _tested_ties(fit, Lk, b, d: float, k: int) -> list[int]:
    """The tied set by test: cell i leaves it when some j is better by more than d·se of
    their difference (``b``: badness, smaller is better, best first)."""
    import numpy as np

    V = (Lk @ fit.cov_unscaled @ Lk.T) * fit.mse
    dv = np.diag(V)
    se_diff = np.sqrt(np.maximum(dv[:, None] + dv[None, :] - 2 * V, 0.0))
    # cell i leaves the tied set when some j is better by more than d_i·se (d_i: cell i's
    # own critical value against the others)
    margin = (b[:, None] - b[None, :]) - np.asarray(d)[:, None] * se_diff
    np.fill_diagonal(margin, -np.inf)
    return [int(i) for i in range(k) if not np.any(margin[i] > 0)]


def _exact_ties(b) -> list[int]:
    """No error estimate, so no test of ties; but cells whose estimates are exactly equal
    (a response constant within cells) are tied as a matter of arithmetic."""
    return [int(i) for i in range(len(b))
            if abs(b[i] - b[0]) <= 1e-9 * max(1.0, abs(b[0]))]


def _against_best(fit, Lk, i: int, best: int, choice, have_error: bool, d, out: dict) -> dict:
    """Cell ``i`` as a ratio to the best cell, with its interval and whether it is
    distinguishable (by the tie test when there was one)."""
    from benchharness.analysis.effects import contrast_result

    if not have_error:
        r = contrast_result(fit, Lk[i], Lk[best], choice, float("nan"))
        return {"cell": i, "ratio": r["ratio"], "lower": None, "upper": None,
                "distinguishable": None}
    r = contrast_result(fit, Lk[i], Lk[best], choice, d)
    lo, hi = r["lower"], r["upper"]
    dist = None
    if lo is not None and hi is not None:
        dist = bool(lo > 1 or hi < 1)
    if out["tested"]:
        dist = i not in out["tied"]
    return {"cell": i, "ratio": r["ratio"], "lower": lo, "upper": hi,
            "distinguishable": dist}


def best_cells(fit, names, levels, setting_idx, choice, alpha: float, better: str,
               response: str, ran=None) -> dict | None:
    """Best cell over the factors ``setting_idx`` (others averaged) and its tied set.

    ``ran`` (a set of level-code tuples over ``setting_idx``), when given, keeps only those
    combinations: a response surface's cell table chooses among the settings it ran, never
    a combination its design leaves out (whose mean only the main-effects model predicts).

    Returns plain data: ``cells`` (every estimable cell, best first, with mean,
    estimate and se on the analysis scale), ``tied`` (indices into ``cells``),
    ``runner_up`` (ratio runner-up / best with its interval and whether it is
    distinguishable), ``outside`` (the best cell outside the tied set, same
    form) and ``critical`` (the quantile ``d``).
    """
    import numpy as np

    from benchharness.analysis import transform as tr
    from benchharness.analysis.effects import margin_estimates, margin_rows

    if not setting_idx:
        return None
    combos, est, se, ok = margin_estimates(fit, tuple(setting_idx))   # bounded memory
    if combos is None:
        return None
    keep = _estimable_cells(combos, est, ok, ran)
    if len(keep) == 0:
        return None
    sign = -1.0 if better == "higher" else 1.0      # smaller "badness" is better
    bad = sign * est[keep]
    order = keep[np.argsort(bad, kind="stable")]
    k = len(order)
    mean = tr.inverse(est[order], choice)
    cells = _listed_cells(order, combos, est, se, mean, names, levels, setting_idx)
    out = {"factors": [names[f] for f in setting_idx], "cells": cells, "tied": [0],
           "runner_up": None, "outside": None, "critical": None, "better": better,
           "tested": False, "response": response, "cells_total": int(k)}
    if k < 2:
        return out
    Lk = margin_rows(fit, tuple(setting_idx), combos[order[:MAX_CELLS_LISTED]])[1]
    _ties_and_margins(fit, Lk, sign * est[order], k, alpha, choice, out)
    return out


def _estimable_cells(combos, est, ok, ran):
    """Indices of the cells with a finite estimate, kept to the combinations in ``ran``."""
    import numpy as np

    keep = np.flatnonzero(ok & np.isfinite(est))
    if ran is not None:
        keep = np.array([i for i in keep if tuple(int(c) for c in combos[i]) in ran],
                        dtype=np.int64)
    return keep


#: up to this many cells each cell's critical value is Hsu's exact one (Dunnett's
#: one-sided many-to-one quantile at `analysis.mcb.tie_confidence`); above, the Bonferroni
#: t quantile over the k − 1 comparisons at the same level, never smaller (conservative)
MCB_MAX_CELLS = 500
#: up to this many cells the critical values are exact even when the cells' weights differ;
#: above, Slepian's bound (`analysis.mcb.bounding_critical_values`: equal on a balanced
#: table, a little larger otherwise), which costs a few roots instead of one per cell
MCB_EXACT_CELLS = 20


def critical_per_cell(fit, Lk, k: int, alpha: float):
    """The one-sided critical value of each listed cell against all the others: Hsu's
    multiple comparisons with the best (Hsu 1984; `analysis.mcb`), the method `choose`
    uses, so the two commands draw one tied set from one model. Each cell's weight is the
    variance of its estimate over σ²; the estimates are taken as independent (exact for
    the cell means of a full model)."""
    import numpy as np

    from benchharness.analysis import dist as stats

    n = min(k, Lk.shape[0])
    if k > MCB_MAX_CELLS:
        return np.full(n, float(stats.t.ppf(1 - alpha / (2 * (k - 1)), fit.df_resid)))
    from benchharness.analysis.mcb import (bounding_critical_values, critical_values,
                                           tie_confidence)

    w = np.maximum(np.einsum("ij,jk,ik->i", Lk, fit.cov_unscaled, Lk), 1e-300)
    if k <= MCB_EXACT_CELLS:
        return critical_values(w, float(fit.df_resid), tie_confidence(1 - alpha))
    return bounding_critical_values(w, float(fit.df_resid), tie_confidence(1 - alpha))


def _ties_and_margins(fit, Lk, bad, k: int, alpha: float, choice, out: dict) -> None:
    """Fill ``out``'s critical value, tied set, runner-up and best cell outside the ties.

    ``bad`` is the ordered "badness" (smaller is better) of the ``k`` cells, ``Lk`` the
    contrast rows of the listed ones; the ties use each cell's critical value of the
    multiple comparisons with the best (`critical_per_cell`), and a cell's ratio to the
    best is given with that value, so its interval excludes 1× when it is outside the
    tied set because of the best.
    """
    have_error = fit.df_resid > 0 and math.isfinite(fit.mse) and fit.mse > 0
    d = critical_per_cell(fit, Lk, k, alpha) if have_error else None
    out["critical"] = float(d[0]) if d is not None else None
    out["method"] = "comparisons with the best (Hsu)" if have_error else None
    best = 0
    if have_error and k <= MAX_CELLS_FOR_TIES:
        out["tied"] = _tested_ties(fit, Lk, bad, d, k)
        out["tested"] = True
    elif not have_error:
        out["tied"] = _exact_ties(bad[:MAX_CELLS_LISTED])

    out["runner_up"] = _against_best(fit, Lk, 1, best, choice, have_error,
                                     None if d is None else float(d[1]), out)
    outside = [i for i in range(1, min(k, MAX_CELLS_LISTED)) if i not in out["tied"]]
    if out["tested"] and outside and outside[0] != 1:
        out["outside"] = _against_best(fit, Lk, outside[0], best, choice, have_error,
                                       float(d[outside[0]]), out)


def _num(x):
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


# ---------------------------------------------------------------------------------------------
# the findings

def term_label(row: dict) -> str:
    """The name a term is shown by: its alias chain when the row has one (``a:b (+ c:d)``)."""
    return str(row.get("chain") or row.get("term", ""))


def term_members(row: dict, factors) -> list[tuple[str, ...]]:
    """The factor tuples a term row names: its own, then those of its alias chain.

    ``A:B (+ C:D)`` gives ``[("A", "B"), ("C", "D")]``. Without a chain label
    the row's ``aliases`` are read; members that are not products of the
    analysis' factors (signs, ``...``) are skipped.
    """
    label = term_label(row)
    chain = []
    if "(" in label and label.rstrip().endswith(")"):
        inner = label[label.index("(") + 1: label.rindex(")")]
        chain = [x.strip() for x in re.split(r"(?:^|\s)[+-]\s", " " + inner) if x.strip()]
        label = label[: label.index("(")]
    elif not row.get("chain"):
        chain = [str(a).lstrip("-") for a in row.get("aliases") or []]
    out = []
    for member in [str(row.get("term") or label).strip()] + chain:
        parts = tuple(p.strip() for p in member.split(":") if p.strip())
        if parts and all(p in factors for p in parts) and parts not in out:
            out.append(parts)
    return out


def derive(d: dict) -> list[dict]:
    """The findings of an analysis (``d`` is the plain content of analysis.json).

    Order: a response surface's findings (stationary point, fit, proposal),
    interactions (each followed by its simple effects), main effects, the best cell
    or tied set, cautions.
    """
    alpha = float(d.get("alpha") or 0.05)
    conf = _numbers.fmt_confidence(alpha)
    factors, refs, comps, rows = _terms_read(d)
    if ((d.get("model") or {}).get("no_variation") or {}).get("kind") == "constant":
        return _cautions(d)[:1]   # every run the same: that is the whole finding
    out = list((d.get("surface") or {}).get("findings") or [])   # analysis/surface.py
    unit = (d.get("best") or {}).get("unit")
    comps = [dict(c, response=d.get("response"), unit=unit) if "difference" in c else c
             for c in comps]
    out += _interaction_findings(rows, factors, comps, refs, alpha, conf)
    out += _main_findings(_with_levels(rows, d), factors, out, comps, d.get("effects") or [],
                          refs, alpha, conf)
    if d.get("incomplete"):   # nested terms ("level within codec"): analysis.incomplete
        from benchharness.analysis.incomplete import findings as nested_findings

        out += nested_findings(d)
    out += numeric_findings(d)      # trends over numeric factors, parallel scaling
    best = d.get("best")
    if best and best.get("cells"):
        out.append(_not_adjusted_over_terms(_best_with_unrun(best, conf), out))
    out += _cautions(d)
    return out


def _terms_read(d: dict):
    """The factor names, reference levels, comparisons and effect rows of the ANOVA in ``d``."""
    factors = [f["name"] if isinstance(f, dict) else str(f) for f in d.get("factors") or []]
    refs = (d.get("model") or {}).get("references") or {}
    comps = d.get("comparisons") or []
    rows = [r for r in d.get("anova") or []
            if r.get("term") != "Residual" and r.get("kind", "effect") == "effect"]
    if not d.get("fraction"):
        # outside a fraction a term confounded with others lost its columns to a
        # combination with no runs: the missing-cells caution says so once, in those
        # words, rather than each term calling it an alias (`_missing_cells_caution`)
        rows = [dict(r, aliases=[]) if r.get("aliases") and not r.get("chain") else r
                for r in rows]
    return factors, refs, comps, rows


def _with_levels(rows: list[dict], d: dict) -> list[dict]:
    """The ANOVA rows of the main effects that could not be tested, each with the factor's
    analysed levels and the residual df beside it, so the finding can say why
    (`untested_why`)."""
    levels = {f["name"]: list(f.get("levels") or []) for f in d.get("factors") or []
              if isinstance(f, dict)}
    res_df = (d.get("counts") or {}).get("df_resid")
    still = bool((d.get("model") or {}).get("no_variation"))
    return [dict(r, analysed_levels=levels.get(r.get("term")), df_resid=res_df,
                 no_variation=still)
            if r.get("p") is None and r.get("term") in levels else r for r in rows]


def untested_why(r: dict) -> tuple[str, str]:
    """(long, short) reason a main effect has no test: only one of its levels has runs (a
    filtered table, or the other levels' runs all failed), or no run is left over to
    estimate the noise, or the runs do not vary within cells, or what the ANOVA's row
    notes."""
    lv = r.get("analysed_levels")
    if lv is not None and len(lv) == 1:
        f = r.get("term")
        return (f"only one of its levels has analysed runs ({f}={lv[0]}), so there is "
                "nothing to compare it with", "only one level has runs")
    if r.get("df_resid") is not None and r["df_resid"] <= 0:
        return ("no replicate is left to estimate the noise (no residual degrees of "
                "freedom): add replicates or fit fewer interactions", "no replicate left to "
                "estimate the noise")
    if r.get("no_variation"):
        return ("every run in a cell gave the same value, so there is no run-to-run "
                "variation to judge it against", "no run-to-run variation")
    note = str(r.get("note") or "no error estimate")
    # the headline's part: the note's first clause ("completely confounded with block"),
    # the rest ("left out of the model, ...") stays in the finding
    short = note.split(";")[0].strip()
    short = short[len("inestimable: "):] if short.startswith("inestimable: ") else short
    return note, short or note


def _significant_row(r, alpha) -> bool:
    p = r.get("p_holm", r.get("p"))
    return p is not None and p < alpha


def _interaction_findings(rows, factors, comps, refs, alpha, conf) -> list[dict]:
    """Each significant interaction, a two-factor one followed by its simple effects."""
    out: list[dict] = []
    for r in rows:
        members = term_members(r, factors)
        if not members or len(members[0]) < 2 or not _significant_row(r, alpha):
            continue
        pf, aliased = members[0], members[1:]
        alias_text = ""
        if aliased:
            alias_text = (f"; this fraction cannot tell {':'.join(pf)} from "
                          + _and(":".join(m) for m in aliased) + ": the estimate is their sum")
        if len(pf) == 2:
            out += _two_factor_findings(r, pf, aliased, alias_text, comps, refs, alpha, conf)
            continue
        statement = (f"{_and(pf)} interact together ({term_label(r)}, {_p_text(r)})"
                     f"{alias_text}: the effect of each depends on the levels of the "
                     "others, so read the cell means rather than any single ratio")
        out.append({"kind": "interaction", "terms": [term_label(r)], "factors": list(pf),
                    "significant": True, "ratio": None, "lower": None, "upper": None,
                    "p": r.get("p_holm", r["p"]), "p_raw": r["p"], "statement": statement,
                    "per_level": [], "aliased": [":".join(m) for m in aliased]})
    return out


def _two_factor_findings(r, pf, aliased, alias_text, comps, refs, alpha, conf) -> list[dict]:
    """A two-factor interaction stated per level of each partner, then its simple effects."""
    clauses, simple = [], []
    for x, y in (pf, pf[::-1]):
        rowsx = [c for c in comps if c.get("method") == "simple"
                 and c.get("factor") == x and set((c.get("within") or {})) == {y}
                 and c.get("b") == refs.get(x, c.get("b"))]
        if not rowsx:
            continue
        by_level: dict[str, list[dict]] = {}
        for c in rowsx:
            by_level.setdefault(c["a"], []).append(c)
            simple.append(_simple_finding(c, x, y, term_label(r), alpha))
        parts = []
        for lv, cs in by_level.items():
            each = "; ".join(f"{_simple_size(c)} when {y}={c['within'][y]}" for c in cs)
            parts.append(f"{x}={lv} against {x}={cs[0]['b']}: {each}")
        adj = rowsx[0].get("adjust")
        clauses.append(" | ".join(parts) + (f" ({adjusted_words(adj)} within each level of "
                                            f"{y})" if adj else ""))
    # called significant only when a stated simple effect agrees (no comparisons
    # made: the F test alone)
    agrees = not simple or any(x["significant"] for x in simple)
    if agrees:
        head = f"{pf[0]} and {pf[1]} interact ({term_label(r)}, {_p_text(r)})"
        statement = head + (": " + "; and ".join(clauses) if clauses else
                            ": the effect of each depends on the level of the other")
    else:
        statement = (f"{term_label(r)}: the F test gives {_p_text(r)}, but no simple "
                     f"effect is distinguishable at {conf} after adjustment"
                     + (" (" + "; and ".join(clauses) + ")" if clauses else ""))
    statement += alias_text
    return [{"kind": "interaction", "terms": [term_label(r)], "factors": list(pf),
             "significant": agrees, "ratio": None, "lower": None, "upper": None,
             "p": r.get("p_holm", r["p"]), "p_raw": r["p"], "statement": statement,
             "per_level": clauses, "aliased": [":".join(m) for m in aliased]}] + simple


def _main_findings(rows, factors, found, comps, effects, refs, alpha, conf) -> list[dict]:
    """Each factor's main effect, except one stated per level of its partner in ``found``."""
    inside: dict[str, list[str]] = {f: [] for f in factors}   # in a stated two-factor term
    higher: dict[str, list[str]] = {f: [] for f in factors}   # in a larger one
    unclear: dict[str, list[str]] = {f: [] for f in factors}  # F only, no simple effect
    for f in found:
        if f["kind"] == "interaction":
            where = (higher if len(f["factors"]) > 2 else inside if f["significant"]
                     else unclear)
            for x in f["factors"]:
                where[x].append(f["terms"][0])
    out = []
    for r in rows:
        members = term_members(r, factors)
        if not members or len(members[0]) != 1:
            continue
        f = members[0][0]
        if inside.get(f):
            continue        # stated per level of its partner above
        out.append(_main_finding(r, f, members[1:], comps, effects, refs, alpha, conf,
                                 higher.get(f) or [], unclear.get(f) or []))
    return out


def _best_with_unrun(best: dict, conf: str) -> dict:
    """The best-cell finding; a fraction's cell that did not run is said to be predicted."""
    found = _best_finding(best, conf)
    # a fraction's cell that did not run: its mean is a prediction (see fraction.py)
    unrun = [i for i in best.get("not_run") or []
             if i in (best.get("tied") or [0]) or i == 0]
    if unrun:
        found["not_run"] = [best["cells"][i]["levels"] for i in unrun]
        if 0 in unrun:      # the best cell was never measured: its mean is a prediction
            found["statement"] = (found["statement"]
                                  .replace("best measured ", "best predicted ", 1)
                                  .replace("Best measured: ", "Best predicted: ", 1))
        found["statement"] += (
            "; not run in this fraction: " + "; ".join(
                cell_text(best["cells"][i]["levels"]) for i in unrun[:TIED_NAMED])
            + " (a mean predicted from the alias chains, as if each acts through its "
              "first-named member: run it to confirm)")
    return found


def _not_adjusted_over_terms(found: dict, said: list[dict]) -> dict:
    """A best cell called ahead of the others, when the effect of a factor it differs by is
    detectable alone but not after Holm over the ANOVA's terms: the comparison with the best
    is not adjusted over those terms, and the statement says so rather than contradict the
    factor's finding silently."""
    if not found.get("significant"):
        return found
    alone = [f["factors"][0] for f in said if f.get("kind") == "main" and f.get("only_alone")
             and f["factors"][0] in (found.get("factors") or [])]
    if alone:
        found = dict(found, statement=found["statement"] + (
            f"; this comparison with the best is not adjusted over the model's terms: after "
            f"that adjustment the effect of {_and(alone)} is not detectable"))
    return found


def _p_text(r: dict) -> str:
    """The p of a term as stated: Holm-adjusted over the table's terms, with the F test's
    own p beside it when the two read differently."""
    p, ph = r.get("p"), r.get("p_holm")
    if ph is None or p is None or fmt_p(ph) == fmt_p(p):
        return fmt_p(p if ph is None else ph)
    alone = fmt_p(p).replace("p = ", "").replace("p < ", "< ")
    return f"{fmt_p(ph)} after Holm over the terms, {alone} alone"


def _simple_size(c: dict) -> str:
    """A simple effect's size in an interaction's statement: its ratio and interval, or,
    on the original scale (where the interaction is one of differences, and a ratio can
    be the same at every level while the differences grow), the difference with its
    interval in the response's unit, and the ratio beside it."""
    ratio = f"{fmt_ratio(c['ratio'])} {fmt_interval(c['lower'], c['upper'])}"
    if "difference" not in c or c.get("difference") is None:
        return ratio
    resp, unit = c.get("response") or "", c.get("unit")

    def val(x):
        text = fmt_value(abs(x), resp, unit)
        return text if x >= 0 else "-" + text

    lo, hi = c.get("difference_lower"), c.get("difference_upper")
    interval = (f" [{val(lo)} to {val(hi)}]" if lo is not None and hi is not None else "")
    d = c["difference"]
    return f"{'+' if d >= 0 else ''}{val(d)}{interval} ({fmt_ratio(c['ratio'])})"


def _simple_finding(c, x, y, term, alpha) -> dict:
    lo, hi = c.get("lower"), c.get("upper")
    agrees = lo is not None and hi is not None and (lo > 1 or hi < 1)
    sig = bool(c.get("p_adj") is not None and c["p_adj"] < alpha and agrees)
    words = "differs" if sig else "not distinguishable"
    return {"kind": "simple effect", "terms": [term], "factors": [x, y], "significant": sig,
            "factor": x, "level": c["a"], "reference": c["b"], "within": dict(c["within"]),
            "ratio": c.get("ratio"), "lower": lo, "upper": hi, "p": c.get("p_adj"),
            "difference": c.get("difference"),
            "adjusted": adjusted_words(c["adjust"]) if c.get("adjust") else None,
            "size": _simple_size(c),
            "statement": (f"{x}={c['a']} against {x}={c['b']} when {y}={c['within'][y]}: "
                          f"{_simple_size(c)} "
                          f"({_adjusted_prefix(c)}{fmt_p(c.get('p_adj'))}, {words})")}


def _adjusted_prefix(c: dict) -> str:
    """``Bonferroni-adjusted: `` before a comparison's p and interval when adjusted."""
    return f"{adjusted_words(c['adjust'])}: " if c.get("adjust") else ""


def _excludes_one(c: dict) -> bool:
    """Whether a comparison's interval lies wholly above or below 1×."""
    lo, hi = c.get("lower"), c.get("upper")
    return lo is not None and hi is not None and (lo > 1 or hi < 1)


def _qualifiers(aliased, higher, unclear):
    """The aliasing note after a term's name, and what its effect also depends on."""
    alias_text = ""
    if aliased:
        alias_text = " (aliased with " + _and(":".join(m) for m in aliased) + ")"
    also = ""
    if higher:
        also = f"; its effect also depends on the levels in {_and(higher)}"
    elif unclear:
        also = (f"; {_and(unclear)} passes its F test but shows no distinguishable simple "
                "effect")
    return alias_text, also


def _stated_comparisons(f, comps, effects, refs) -> list[dict]:
    """The level ratios a main finding states: Tukey's against the reference, else the
    effects table's, those with a ratio."""
    ref = refs.get(f)
    tk = [c for c in comps if c.get("method") == "tukey" and c.get("factor") == f
          and c.get("within") is None and (ref is None or c.get("b") == ref)]
    table = [{"a": e["level"], "b": e["reference"], "ratio": e.get("ratio"),
              "lower": e.get("lower"), "upper": e.get("upper"), "p_adj": None,
              **_where_keys(e)}
             for e in effects if e.get("factor") == f]
    if tk:
        # a level whose margin lacks a combination excluded by design has no Tukey
        # interval; the effects table compares it where both ran: say that one rather
        # than leave the level out of the finding
        mine = {c["a"]: c for c in table if c.get("ratio") is not None}
        tk = [mine.get(c["a"], c) if c.get("ratio") is None else
              {**c, **_where_keys(mine.get(c["a"]) or {})} for c in tk]
    stated = tk or table
    return [dict(c, factor_name=f) if c.get("nested_over") else c
            for c in stated if c.get("ratio") is not None]


def _family_label(stated: list[dict]) -> str:
    """``Tukey-adjusted`` when the stated ratios' intervals come from an adjusted family
    (the comparisons), '' when they are the effects table's own (unadjusted) intervals."""
    adj = {c.get("adjust") for c in stated if c.get("p_adj") is not None and c.get("adjust")}
    return adjusted_words(adj.pop()) if len(adj) == 1 else ""


def _where_keys(e: dict) -> dict:
    """What an effects-table ratio says about where it holds (``over``/``left_out``: the
    combinations where both levels ran; ``nested_over``: a nested factor's levels averaged
    over), to carry onto the Tukey comparison of the same levels."""
    out = {k: e.get(k) for k in ("over", "left_out")} if e.get("over") else {}
    if e.get("nested_over"):
        out["nested_over"] = e["nested_over"]
    return out


def _main_statement(r, f, alias_text, also, stated, comps, higher, alpha, conf, p):
    """(significant, statement) of a tested main effect, so that words and intervals agree."""
    label = term_label(r)
    ptext = _p_text(r)
    listing = "; ".join(f"{f}={c['a']} {fmt_ratio(c['ratio'])} "
                        f"{fmt_interval(c.get('lower'), c.get('upper'))}{_where_both(c)}"
                        for c in stated[:6]) + (" …" if len(stated) > 6 else "")
    against = f" against {f}={stated[0]['b']}" if stated else ""
    adj = _family_label(stated)
    against += f" ({adj} {conf} intervals)" if adj else ""
    if p < alpha:
        # pairs not involving the reference can carry the difference as well
        all_tk = [c for c in comps if c.get("method") == "tukey" and c.get("factor") == f]
        if any(_excludes_one(c) for c in (all_tk or stated)):
            return True, (f"{label} matters ({ptext}){alias_text}: "
                          f"{listing}{against}{also}")
        if not stated:
            # no ratio between its levels could be estimated (missing cells): the F test
            # stands, no interval contradicts it, and which levels differ is not said
            return True, (f"{label} matters ({ptext}){alias_text}; no ratio between its "
                          "levels could be estimated from these cells (some combinations "
                          f"have no runs), so which levels differ is not said{also}")
        return False, (f"{label}: the F test gives {ptext}{alias_text}, but no two "
                       f"of its levels are distinguishable at {conf} after adjustment "
                       f"({listing}{against}){also}")
    if higher:
        return None, (f"{label}: no detectable effect on average over the other "
                      f"factors ({ptext}){alias_text}, but it takes part in "
                      f"{_and(higher)}, so its effect differs between their levels")
    if stated and any(_excludes_one(c) for c in stated):
        # the term fails after Holm over the terms while a stated (per-term) interval
        # excludes 1×: say which holds, so the words and the interval do not contradict
        return False, (f"{label} made no difference detectable after adjusting over "
                       f"the model's terms ({ptext}){alias_text}: {listing}{against} "
                       f"(these {conf} intervals are not adjusted for the other terms)"
                       f"{also}")
    return False, (f"{label} made no detectable difference ({ptext}){alias_text}: "
                   f"{listing}{against}{also}" if stated else
                   f"{label} made no detectable difference ({ptext}){alias_text}")


def _where_both(c: dict) -> str:
    """`` (only rows=small, where both ran)`` after a ratio compared over part of the
    other factors' combinations (`benchharness.analysis.support.where_both_ran`), and
    `` (codec=lzma averaged over level=1, 6 only: level=9 did not run with every rows)``
    after one whose level averages over fewer levels of its nested factor than the
    other levels do (`benchharness.analysis.incomplete.mark_partial_effects`)."""
    said = []
    if c.get("over"):
        from benchharness.analysis.support import where_both_ran

        said.append(where_both_ran(c["over"], c.get("left_out")))
    said += [nested_over_text(c["factor_name"], m) for m in c.get("nested_over") or []
             if c.get("factor_name")]
    return f" ({'; '.join(said)})" if said else ""


def nested_over_text(f: str, m: dict) -> str:
    """``codec=lzma averaged over level=1, 6 only: level=9 did not run at every rows``:
    what one parent level's mean averages over when some of its nested levels are left
    out (the other levels of ``f`` average over all of theirs)."""
    across = " and ".join(m.get("across") or []) or "level of the other factors"
    return (f"{f}={m['at']} averaged over {m['factor']}=" + ", ".join(m["levels"])
            + f" only: {m['factor']}=" + ", ".join(m["left_out"])
            + f" did not run at every {across}")


def _main_finding(r, f, aliased, comps, effects, refs, alpha, conf, higher=(),
                  unclear=()) -> dict:
    alias_text, also = _qualifiers(aliased, higher, unclear)
    p = r.get("p_holm", r.get("p"))
    base = {"kind": "main", "terms": [term_label(r)], "factors": [f], "p": p,
            "p_raw": r.get("p"), "ratio": None, "lower": None, "upper": None}
    if p is None:
        why, short = untested_why(r)
        return {**base, "significant": None, "untested": True, "why_untested": short,
                "statement": f"{term_label(r)} could not be tested: {why}{alias_text}"}
    stated = _stated_comparisons(f, comps, effects, refs)
    big = max(stated, key=lambda c: abs(math.log(c["ratio"])) if c["ratio"] > 0 else 0.0,
              default=None)
    if big is not None:
        base.update(ratio=big["ratio"], lower=big.get("lower"), upper=big.get("upper"),
                    level=big["a"], reference=big["b"],
                    adjusted=_family_label([big]) or None)
        if big.get("nested_over"):      # the headline says what this ratio averages over
            base["qualifier"] = _where_both({**big, "over": None})[2:-1]
    significant, statement = _main_statement(r, f, alias_text, also, stated, comps, higher,
                                             alpha, conf, p)
    # detectable alone, not after Holm over the terms: the headline and the best cell say so
    alone = (not significant and r.get("p") is not None and r["p"] < alpha
             and "after adjusting over the model's terms" in statement)
    return {**base, "significant": significant, "statement": statement,
            **({"only_alone": True} if alone else {})}


def _named_cells(cells, idx) -> str:
    """Up to `TIED_NAMED` of the cells ``idx`` by their levels, then how many more."""
    named = "; ".join(cell_text(cells[i]["levels"]) for i in idx[:TIED_NAMED])
    more = f" and {len(idx) - TIED_NAMED} more" if len(idx) > TIED_NAMED else ""
    return named + more


def _untested_best_text(cells, tied, ru, where) -> str:
    """The best cell without a test of ties: the exactly equal cells and the runner-up."""
    text = f"Best measured: {where}; no test of ties was possible (no error estimate)"
    if len(tied) > 1:
        text += ("; exactly equal to it: "
                 + "; ".join(cell_text(cells[i]["levels"]) for i in tied[1:TIED_NAMED])
                 + (f" and {len(tied) - TIED_NAMED} more" if len(tied) > TIED_NAMED else ""))
    if ru is not None:
        text += f"; runner-up {cell_text(cells[ru['cell']]['levels'])} at {fmt_ratio(ru['ratio'])}"
    return text


#: the one phrase for settings whose difference from the best is not detectable, shared by
#: analyze's findings and report and by choose (`choose.render`, `choose._top_reasons`)
TIE_WORDS = "cannot be told apart from the best"
#: how the best-cell finding's intervals were adjusted (`critical_per_cell`)
ADJUSTED_WITH_BEST = "intervals adjusted for the comparisons with the best (Hsu, as in choose)"


def _settings_tail(best: dict) -> str:
    """What the settings were averaged over, and whether that split was guessed."""
    over = best.get("averaged_over") or []
    if not over:
        return ""
    guessed = " (taken as workloads or environments from their names; a roles: section " \
              "says otherwise)" if best.get("roles_source") == "guessed" else ""
    return f"; settings compared averaged over {_and(over)}{guessed}"


def _outside_summary(cells, outside: dict) -> dict:
    """The best cell outside the tied set as plain data."""
    return {"levels": cells[outside["cell"]]["levels"], "ratio": outside["ratio"],
            "lower": outside["lower"], "upper": outside["upper"]}


def _best_finding(best: dict, conf: str) -> dict:
    cells = best["cells"]
    resp = best.get("response") or ""
    higher = best.get("better") == "higher"
    is_time = seconds_per_unit(resp) is not None
    worse = "lower" if higher else ("slower" if is_time else "higher")
    top = cells[0]
    tied = best.get("tied") or [0]
    ru = best.get("runner_up")
    base = {"kind": "best", "terms": [], "factors": list(best.get("factors") or []),
            "significant": None, "cells": [cells[i]["levels"] for i in tied],
            "best": top["levels"], "mean": top["mean"], "ratio": None, "lower": None,
            "upper": None, "p": None}
    where = f"{cell_text(top['levels'])} ({fmt_value(top['mean'], resp, best.get('unit'))})"
    what = "time" if is_time else (resp or "value")
    if len(cells) == 1:
        return {**base, "statement": f"Only one cell could be estimated: {where}"}
    tail = _settings_tail(best)

    def ru_text(x, who):
        c = cells[x["cell"]]
        return (f"{who} {cell_text(c['levels'])} at {fmt_ratio(x['ratio'])} "
                f"{fmt_interval(x['lower'], x['upper'])} the best's {what}")

    if ru is not None:
        base.update(ratio=ru["ratio"], lower=ru["lower"], upper=ru["upper"],
                    runner_up=cells[ru["cell"]]["levels"])
    if not best.get("tested"):
        return {**base, "statement": _untested_best_text(cells, tied, ru, where) + tail}
    tail = "; " + ADJUSTED_WITH_BEST + tail
    if len(tied) == 1:
        base["significant"] = True
        return {**base, "statement": f"Best: {where}, ahead of every other cell at {conf}; "
                                     + ru_text(ru, "the runner-up") + f" ({worse})" + tail}
    if len(tied) == len(cells):
        base["significant"] = False
        return {**base, "statement": f"No cell can be told apart from the best at {conf}: "
                                     f"all {len(cells)} are tied; best measured {where}; "
                                     + ru_text(ru, "runner-up") + tail}
    text = (f"Tied for best at {conf} ({len(tied)} of {len(cells)} cells {TIE_WORDS}): "
            f"{_named_cells(cells, tied)}; best measured {where}; " + ru_text(ru, "runner-up"))
    if best.get("outside"):
        text += "; the best cell outside the tied set, " + ru_text(best["outside"], "")[1:]
        base["outside"] = _outside_summary(cells, best["outside"])
    return {**base, "significant": True, "statement": text + tail}


def _cautions(d: dict) -> list[dict]:
    """What limits the findings: no variation or error term, failed checks, disagreeing
    ranks, differing hosts, timeouts, missing cells."""
    return _fit_cautions(d) + _check_cautions(d) + _data_cautions(d)


def _caution(key, text, **extra) -> dict:
    return {"kind": "caution", "terms": [], "factors": [], "significant": None,
            "ratio": None, "lower": None, "upper": None, "p": extra.pop("p", None),
            "check": key, "statement": text, **extra}


def _fit_cautions(d: dict) -> list[dict]:
    out = []
    res_df = (d.get("counts") or {}).get("df_resid")
    still = (d.get("model") or {}).get("no_variation")
    if still:   # zero variance: a finding of its own (analysis/steps.py)
        out.append(_caution("no_variation", still["statement"]))
    lenth = any(r.get("test") for r in d.get("anova") or [])
    if res_df is not None and res_df <= 0 and lenth:
        out.append(_caution(
            "residual_df", "No replicates: each effect was judged by Lenth's method "
            "against the spread of the smaller effects, and the model's assumptions could "
            "not be checked; replicate the fraction to test against run-to-run noise"))
    elif res_df is not None and res_df <= 0:
        out.append(_caution("residual_df", "No residual degrees of freedom: nothing could be "
                            "tested; add replicates or fit fewer interactions"))
    return out


#: each diagnostic check's name, the same in a caution and in the reports' tables: a neutral
#: name, since a caution can be a departure the test does not confirm
DIAGNOSTIC_TITLES = {
    "normality": "Normality of residuals",
    "equal_variance": "Equal spread across cells",
    "drift": "Drift over the run order",
    "outliers": "Outlying runs",
    "runs_test": "Order of residual signs",
    "small_cells": "Cells with too few runs",
    "hosts": "Differences between hosts",
    "load": "Machine load and residuals",
}


def _check_cautions(d: dict) -> list[dict]:
    out = []
    dg = d.get("diagnostics") or {}
    for key in ("normality", "equal_variance", "drift", "load"):
        words = DIAGNOSTIC_TITLES[key]
        item = dg.get(key)
        if isinstance(item, dict) and item.get("ok") is False:
            out.append(_caution(key, f"{words}: {item.get('verdict')}", p=item.get("p")))
    if dg.get("outlier_count"):
        out.append(_caution("outliers", f"Outlying runs: {dg.get('outlier_verdict')}"))
    art = d.get("art") or {}
    dis = [t["term"] for t in art.get("terms") or [] if t.get("agrees") is False]
    if dis:
        out.append(_caution("rank_check", "The rank-based cross-check disagrees for "
                            + _and(dis) + ": treat those tests as uncertain", terms=dis))
    hosts = dg.get("hosts")
    if isinstance(hosts, dict) and hosts.get("differ"):
        out.append(_caution("hosts", f"Hosts differ: {hosts.get('verdict')}"))
    return out


def _data_cautions(d: dict) -> list[dict]:
    out = []
    fail = d.get("failures") or {}
    if fail.get("cells_with_timeouts"):
        out.append(_caution("timeouts", f"{fail.get('verdict')}"))
    c = d.get("counts") or {}
    expected = c.get("cells_planned") or c.get("cells_expected")   # a fraction plans fewer
    if c.get("cells") is not None and expected and c["cells"] < expected:
        out.append(_missing_cells_caution(d, c, expected))
    return out


def _missing_cells_caution(d: dict, c: dict, expected: int) -> dict:
    """The cells of a full factorial with no analysed runs, named as combinations with no
    runs (not a fraction's aliases), with the terms they leave estimable in part or not at
    all, in the incomplete-factorial words (`analysis.incomplete.estimability_statements`)."""
    from benchharness.analysis.incomplete import estimability_statements, term_states

    n = expected - c["cells"]
    text = f"{n} of {expected} cells {'has' if n == 1 else 'have'} no analysed runs"
    missing = c.get("missing_cells") or []
    if not missing:
        return _caution("missing_cells", text)
    named = "; ".join(cell_text(m) for m in missing[:TIED_NAMED])
    more = f" and {n - TIED_NAMED} more" if n > TIED_NAMED else ""
    text += (f" ({named}{more}): {'a combination' if n == 1 else 'combinations'} of the full "
             "factorial with no runs")
    states = term_states(d.get("anova") or [])
    said = estimability_statements(states)
    if said:
        text += "; " + "; ".join(said)
        if any(t["estimable"] == "none" for t in states):
            text += (" (left out of the model: an effect it has, if any, is counted in the "
                     "terms it overlaps)")
    return _caution("missing_cells", text, covers=["cells have no ok runs",
                                                   ": inestimable: completely confounded",
                                                   "degrees of freedom estimable (empty cells)"])


#: what each caution's check says that an analysis note says too (the note is not printed
#: beside it): the start or a part of the note's text
_COVERED = {"rank_check": ["the rank-based cross-check disagrees for "]}


def notes_not_said(d: dict, found: list[dict]) -> list[str]:
    """The analysis' notes that no finding already says: each note printed once (a caution
    that names the missing cells replaces the note listing them, for instance)."""
    covers = []
    for f in found:
        if f.get("kind") == "caution":
            covers += list(f.get("covers") or []) + _COVERED.get(f.get("check"), [])
    return [n for n in d.get("notes") or [] if not any(part in str(n) for part in covers)]
