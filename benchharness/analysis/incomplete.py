"""Incomplete factorials: cells missing by design, conditional and nested factors.

When some combinations of levels do not exist (``exclude:``), or a factor
applies only under a condition (``only_when:``), or a factor's levels exist
only within one level of another (nesting), the full crossed model has
parameters no data can estimate. This module makes the analysis estimate what
the data can, and say what it cannot:

* **Nesting.** A conditional factor is nested within the factors of its
  condition, and a factor whose every level occurs with only one level of
  another is nested within it (Montgomery, *Design and Analysis of
  Experiments*, ch. 14, the two-stage nested design). The nested factor has no
  main-effect term of its own: its term is ``level within codec``, made of the
  columns of ``level`` and ``codec:level`` (`nest_terms`), so it measures how
  ``level`` matters inside each ``codec`` where it applies.
* **The largest estimable hierarchical model.** The model is fitted on the
  cells that exist; a term keeps the degrees of freedom those cells can
  estimate. Type II sums of squares are then the model comparisons of each term
  against the terms that do not contain it (Searle, *Linear Models for
  Unbalanced Data*, 1987, ch. 4 and 9: the R( | ) reductions for data with
  empty cells). `describe` says which terms are estimable in full, in part or
  not at all.
* **Margins over the cells that exist** (`benchharness.analysis.support`). An
  estimated marginal mean averages the model's cell means over the other
  factors' combinations that exist for most levels of the margin, and over a
  nested factor's own levels within its parent; a margin combination that
  lacks some of those is not given a mean (so a ratio is given only where it is
  defined, never extrapolated into a missing cell). The ratios of a nested
  factor are given within each level of its parent (`within_ratios`).
"""

from __future__ import annotations

import math
import re
from dataclasses import replace

import numpy as np

from benchharness.analysis.support import Support, margin_plan, pair_rows, where_both_ran

#: the word between a nested factor and its parents in a term name
WITHIN = "within"


# ---- nesting ------------------------------------------------------------------------------

def find_nesting(names, levels, fcell_levels: np.ndarray, experiment=None) -> dict:
    """{nested factor index: parent indices}: conditional factors of the experiment, then
    factors whose runs carry ``-`` exactly for some levels of another factor, then factors
    whose every observed level occurs with exactly one level of another factor (and that
    have more levels than it, so they are not a relabelling of it)."""
    out = _declared_nesting(names, experiment)
    for f in range(len(names)):
        if f not in out and _marker() in levels[f]:
            p = _marker_parent(f, levels, fcell_levels)
            if p is not None:
                out[f] = (p,)
    for f in range(len(names)):
        if f not in out and len(levels[f]) >= 2:
            p = _level_parent(f, out, fcell_levels)
            if p is not None:
                out[f] = (p,)
    return out


def _declared_nesting(names, experiment) -> dict:
    """The experiment's conditional factors (``only_when:``) within their condition's factors."""
    out: dict[int, tuple[int, ...]] = {}
    space = getattr(experiment, "space", None)
    for f, cond in (space.conditions.items() if space is not None else ()):
        if f in names and all(p in names for p in cond.factors):
            out[names.index(f)] = tuple(sorted(names.index(p) for p in cond.factors))
    return out


def _marker_parent(f, levels, fcell_levels):
    """The factor whose levels tell exactly where factor ``f`` carries ``-``, or None."""
    off = fcell_levels[:, f] == levels[f].index(_marker())
    if not off.any() or off.all():
        return None
    for p in range(len(levels)):
        if p != f and _marker() not in levels[p] and not (
                set(fcell_levels[off, p].tolist()) & set(fcell_levels[~off, p].tolist())):
            return p
    return None


def _level_parent(f, found, fcell_levels):
    """A factor with at least two levels that each level of ``f`` occurs with only one of,
    when ``f`` has more levels than it; else None."""
    for p in range(fcell_levels.shape[1]):
        if p == f or (p in found and f in found[p]):
            continue
        pairs = {(int(a), int(b)) for a, b in fcell_levels[:, [f, p]].tolist()}
        f_levels = {a for a, _ in pairs}
        p_levels = {b for _, b in pairs}
        if len(p_levels) >= 2 and len(f_levels) > len(p_levels) and len(pairs) == len(f_levels):
            return p
    return None


def nested_name(names, nested: dict, factors) -> str:
    """``level within codec``, ``(level within codec):rows``: the term of ``factors``."""
    fs = set(factors)
    kids = [f for f in sorted(fs) if f in nested and set(nested[f]) <= fs]
    used = set()
    parts = []
    for f in sorted(fs):
        if f in used:
            continue
        if f in kids:
            ps = nested[f]
            parts.append((f, f"{names[f]} {WITHIN} " + ":".join(names[p] for p in ps)))
            used |= {f, *ps}
    rest = [f for f in sorted(fs) if f not in used]
    if not parts:
        return ":".join(names[f] for f in sorted(fs))
    if not rest and len(parts) == 1:
        return parts[0][1]
    items = [(f, f"({text})") for f, text in parts] + [(f, names[f]) for f in rest]
    return ":".join(text for _f, text in sorted(items))


def closure(factors, nested: dict) -> tuple[int, ...]:
    """A term's factors with the parents of every nested factor in it added."""
    out = set(factors)
    for f in list(out):
        out |= set(nested.get(f, ()))
    return tuple(sorted(out))


def nest_terms(terms, names, nested: dict) -> list:
    """The terms of a crossed model rewritten for nesting: each term becomes the term of its
    closure (its factors and their parents); terms with the same closure merge into one,
    made of every product of factors whose closure it is (so the column space is the same
    as the crossed model's, divided among fewer terms)."""
    from itertools import combinations

    from benchharness.analysis.model import Term

    if not nested:
        return list(terms)
    out: dict[tuple, object] = {}
    for t in terms:
        if t.is_block:
            out[("block", t.factors)] = t
            continue
        c = closure(t.factors, nested)
        if c in out:
            continue
        parts = tuple(sub for r in range(1, len(c) + 1) for sub in combinations(c, r)
                      if closure(sub, nested) == c)
        if parts == (c,):
            out[c] = Term(c, ":".join(names[f] for f in c))
        else:
            out[c] = Term(c, nested_name(names, nested, c), parts=parts)
    blocks = [t for k, t in out.items() if k[0] == "block"]
    rest = sorted((t for k, t in out.items() if k[0] != "block"), key=lambda t: len(t.factors))
    return blocks + rest


# ---- the fit, and what it can estimate ------------------------------------------------------

def attach_support(fit, fcell_levels, nested: dict, nf: int):
    """The fit with its `Support` (margins then average over the cells that exist)."""
    return replace(fit, support=Support(cells=np.asarray(fcell_levels, dtype=np.int64),
                                        nested=dict(nested), nf=nf))


def is_incomplete(experiment, nested: dict) -> bool:
    """Cells missing by design (the experiment's ``exclude:``/``only_when:``) or a nested
    factor: margins then average over the cells that exist (`Support`). Cells missing from
    a full grid for other reasons (failed runs) keep the crossed margins, which leave out
    every mean that needs them."""
    return bool(nested) or getattr(experiment, "space", None) is not None


def planned_cells(experiment, names=None, what: str = "cells") -> int | None:
    """How many cells the experiment planned (its space), or with ``what="combinations"``
    how many its full grid has; None when it has no space."""
    if getattr(experiment, "space", None) is None:
        return None
    from benchharness.design.exclude import space_cells

    try:
        _cells, info = space_cells(experiment)
    except Exception:  # noqa: BLE001 - an experiment with a design of its own: unknown
        return None
    return int(info[what])


def describe(lay, fit, fcells, nested: dict, anova_rows, experiment, alpha) -> dict:
    """analysis.json's ``incomplete``: the nesting, the cells, each term's estimability, and
    what cannot be said, as plain data with one sentence per item."""
    names = lay.fnames
    grid = planned_cells(experiment, what="combinations") or math.prod(lay.sizes[: lay.nf])
    planned = planned_cells(experiment, names)
    nest = {names[f]: [names[p] for p in ps] for f, ps in nested.items()}
    why = {f: _why_nested(f, ps, lay, experiment) for f, ps in nest.items()}
    terms = term_states(anova_rows)
    statements = [f"{f} is analysed within {', '.join(ps)} ({why[f]}): it has no main effect "
                  f"of its own, and its ratios are given within each level of {', '.join(ps)} "
                  f"where it applies; each level of {', '.join(ps)} is compared averaged over "
                  f"its own levels of {f}" + _partial_levels(fit, lay, nested, names.index(f))
                  for f, ps in nest.items()]
    if fcells.count < grid:
        what = (f"{planned} cells planned of the {grid} combinations"
                if planned is not None else f"{fcells.count} cells ran" if nested else
                f"{fcells.count} of the {grid} combinations ran")
        statements.append(f"{what}: each term is estimated from the cells that exist, Type II "
                          "sums of squares by model comparison; means and ratios average over "
                          "the combinations that exist, never over missing ones")
    statements += estimability_statements(terms)
    return {"nested": nest, "why": why, "cells": int(fcells.count), "combinations": grid,
            "cells_planned": planned, "terms": terms, "statements": statements}


def _why_nested(f: str, ps, lay, experiment) -> str:
    """Why ``f`` is analysed within ``ps``: its condition, its ``-`` runs, or its levels."""
    space = getattr(experiment, "space", None)
    cond = space.conditions.get(f) if space is not None else None
    if cond is not None:
        return f"{f} applies only where {cond.text} (only_when)"
    if _marker() in lay.flevels[lay.fnames.index(f)]:
        return (f"its runs carry {_marker()!r} (it does not apply) for some levels of "
                f"{', '.join(ps)} only")
    return f"each level of {f} occurs with one level of {', '.join(ps)} only"


def term_states(anova_rows) -> list[dict]:
    """Each effect term with its df, its df on the full grid, and full | part | none."""
    terms = []
    for r in anova_rows:
        if r.get("kind") != "effect":
            continue
        df, full = int(r.get("df") or 0), int(r.get("df_full") or 0)
        terms.append({"term": r["term"], "df": df, "df_full": full,
                      "estimable": _estimable(df, full)})
    return terms


def _estimable(df: int, full: int) -> str:
    """``full``, ``part`` or ``none``: a term's df against those of its full grid."""
    return "full" if df >= full else ("none" if df == 0 else "part")


def estimability_statements(terms) -> list[str]:
    """The crossed terms estimable only in part, and those not at all (nested terms have no
    grid to fall short of)."""
    out = []
    part = [t for t in terms if t["estimable"] == "part" and WITHIN not in t["term"]]
    none = [t for t in terms if t["estimable"] == "none"]
    if part:
        out.append("estimable in part (the missing cells carry the rest): "
                   + ", ".join(f"{t['term']} ({t['df']} of {t['df_full']} df)" for t in part))
    if none:
        out.append("not estimable from these cells: " + ", ".join(t["term"] for t in none))
    return out


def partial_levels(fit, lay, nested: dict, f: int) -> dict:
    """{parent levels (a tuple of labels): (the levels of ``f`` its mean averages over, those
    that ran with it but are left out)} for the parents whose mean averages over fewer
    levels of the nested factor ``f`` than ran with them (the others lack a combination)."""
    plan = margin_plan(fit.support, nested[f])
    if plan is None or f not in plan["kids"]:
        return {}
    levels = lay.flevels
    out = {}
    for m, cells in zip(plan["combos"], plan["cells"]):
        sel = np.all(fit.support.cells[:, list(nested[f])] == np.asarray(m), axis=1)
        ran = sorted(set(fit.support.cells[sel, f].tolist()))
        used = sorted({int(r[f]) for r in cells}) if cells is not None else []
        if cells is not None and len(used) < len(ran):
            key = tuple(levels[p][c] for p, c in zip(nested[f], m))
            out[key] = ([levels[f][c] for c in used],
                        [levels[f][c] for c in ran if c not in used])
    return out


def _partial_levels(fit, lay, nested: dict, f: int) -> str:
    """`` (codec=lzma over level 1, 6 only)``: parents whose mean averages over fewer levels
    of the nested factor than ran with them (the others lack a combination)."""
    plan = margin_plan(fit.support, nested[f])
    names = lay.fnames
    parts = []
    for key, (used, _left) in partial_levels(fit, lay, nested, f).items():
        where = ", ".join(f"{names[p]}={v}" for p, v in zip(nested[f], key))
        parts.append(f"{where} over {names[f]} " + ", ".join(used) + " only, the levels it "
                     "ran with every level of " + (", ".join(names[g] for g in plan["cross"])
                                                   or "the other factors"))
    return f" ({'; '.join(parts)})" if parts else ""


def mark_partial_effects(effects: list[dict], fit, lay, nested: dict) -> list[dict]:
    """Each ratio of a parent level whose mean averages over only some levels of its nested
    factor, marked ``nested_over`` (a list of ``{"at", "factor", "levels", "left_out",
    "across"}``: the parent level, its nested factor, the levels averaged over, those left
    out, and the factors they did not run at every level of;
    the ratio's level and its reference each when partial), so the sentence
    that states it says what it averages over when that differs from the other levels'."""
    marks = {}
    for f, ps in nested.items():
        if len(ps) != 1:
            continue
        plan = margin_plan(fit.support, ps)
        cross = [lay.fnames[g] for g in plan["cross"]] if plan is not None else []
        for key, (used, left) in partial_levels(fit, lay, nested, f).items():
            marks[(lay.fnames[ps[0]], key[0])] = {"factor": lay.fnames[f], "levels": used,
                                                  "left_out": left, "across": cross}
    out = []
    for e in effects:
        said = [dict(marks[(e.get("factor"), v)], at=v) for v in (e.get("level"),
                                                                e.get("reference"))
                if (e.get("factor"), v) in marks]
        out.append(dict(e, nested_over=said) if said else e)
    return out


def nested_full_df(factors, nested: dict, cells: np.ndarray, sizes) -> int:
    """The degrees of freedom a nested term has when every cell of its nested grid ran.

    A nested factor ``f`` within parents ``P`` spans, inside each parent combination
    that ran, one fewer df than the levels of ``f`` that ran there (Montgomery, *Design
    and Analysis of Experiments*, ch. 14: a(b − 1) for ``b`` within ``a``, summed over the
    parents when their counts differ); a crossed factor of the term adds its own
    ``levels − 1``. So ``level within codec`` is full when it has one df fewer than its
    levels inside each codec where it applies, whatever the crossed grid would count.
    """
    factors = tuple(factors)
    parents = {p for f in factors if f in nested for p in nested[f]}
    df = 1
    for f in factors:
        if f in nested:
            ps = list(nested[f])
            combos = {tuple(r) for r in cells[:, ps].tolist()}
            df *= sum(len(set(cells[np.all(cells[:, ps] == np.asarray(c), axis=1), f]
                              .tolist())) - 1 for c in combos)
        elif f not in parents:
            df *= int(sizes[f]) - 1
    return int(df)


def nested_term_states(terms: list[dict], nested_terms, nested: dict, cells,
                       sizes) -> list[dict]:
    """``describe``'s term states with each nested term judged against its nested grid
    (`nested_full_df`), not the crossed grid it has no part in."""
    own = {t.name: t.factors for t in nested_terms}
    out = []
    for t in terms:
        if t["term"] not in own:
            out.append(t)
            continue
        full = nested_full_df(own[t["term"]], nested, cells, sizes)
        out.append(dict(t, df_full=max(full, t["df"]), estimable=_estimable(t["df"], full)))
    return out


def clean_notes(notes: list, anova_rows, nested_terms) -> list:
    """Row notes of nested terms count the columns of a grid that does not exist: drop them."""
    names = {t.name for t in nested_terms}
    for r in anova_rows:
        if r["term"] in names:
            r["df_full"] = r["df"]
            r["note"] = None
    return [n for n in notes if not any(n.startswith(f"{t}: ") for t in names)]


def within_ratios(fit, lay, nested: dict, refs, choice, alpha) -> list[dict]:
    """Each level of a nested factor against its reference, within each parent combination
    where both exist, averaged over the other factors' combinations that exist for both
    (``over`` names them when some are missing)."""
    from benchharness.analysis.effects import t_quantile

    q = t_quantile(fit, alpha)
    out = []
    for f, ps in nested.items():
        M = tuple(sorted((*ps, f)))
        pos = {g: j for j, g in enumerate(M)}
        present = {tuple(r) for r in fit.support.cells[:, list(M)].tolist()}
        for pc in sorted({tuple(c[pos[p]] for p in ps) for c in present}):
            keys = {j: _key(M, pos, ps, pc, f, j) for j in range(len(lay.flevels[f]))}
            have = [j for j, lv in enumerate(lay.flevels[f])
                    if lv != _marker() and keys[j] in present]
            if len(have) < 2:
                continue
            ref = refs.get(f, 0) if refs.get(f, 0) in have else have[0]
            within = {lay.fnames[p]: lay.flevels[p][pc[i]] for i, p in enumerate(ps)}
            for j in have:
                e = None if j == ref else _within_entry(fit, lay, f, M, keys[j], keys[ref],
                                                        within, choice, q)
                if e is not None:
                    out.append(e)
    return out


def _within_entry(fit, lay, f, M, ca, cb, within, choice, q) -> dict | None:
    """One ratio of a nested factor's level ``ca`` over ``cb`` (codes of ``M``) inside
    ``within``, over the other factors' combinations where both ran."""
    from benchharness.analysis.effects import contrast_result, ratio_wording

    names, levels = lay.fnames, lay.flevels
    la, lb, common, others = pair_rows(fit, M, ca, cb)
    if la is None:
        return None
    r = contrast_result(fit, la, lb, choice, q)
    e = {"factor": names[f], "level": levels[f][ca[M.index(f)]],
         "reference": levels[f][cb[M.index(f)]], "within": within, "ratio": r["ratio"],
         "lower": r["lower"], "upper": r["upper"], "estimable": r["estimable"]}
    e.update({k: r[k] for k in ("difference", "difference_lower", "difference_upper",
                                "approximate") if k in r})
    n_other = len({tuple(x) for x in fit.support.cells[:, others].tolist()})
    if others and len(common) < n_other:
        e["over"] = [{names[g]: levels[g][c[i]] for i, g in enumerate(others)} for c in common]
    where = ", ".join(f"{k}={v}" for k, v in within.items())
    only = f" ({where_both_ran(e['over'])})" if "over" in e else ""
    e["wording"] = f"within {where}{only}: " + ratio_wording(e, names[f])
    e["where"] = where + only
    return e


def unmatched(fit, lay, factors, incomplete: dict) -> list[str]:
    """Sentences naming the combinations of ``factors`` left out of a comparison averaged
    over the other factors, because they lack some of the combinations the others have."""
    idx = tuple(lay.fnames.index(f) for f in factors if f in lay.fnames)
    plan = margin_plan(fit.support, idx) if idx else None
    if not plan or not plan["lacking"]:
        return []
    names, levels = lay.fnames, lay.flevels
    cross = [names[g] for g in plan["cross"]]
    shown = "; ".join(", ".join(f"{names[f]}={levels[f][c]}" for f, c in zip(idx, m))
                      for m in plan["lacking"])
    text = (f"{shown} not compared with the other settings averaged over "
            f"{', '.join(cross) or 'the other factors'}: it lacks combinations the others "
            "ran (excluded or missing); its cell means are in the table of means")
    incomplete["not_compared"] = [{names[f]: levels[f][c] for f, c in zip(idx, m)}
                                  for m in plan["lacking"]]
    return [text]


def _marker() -> str:
    from benchharness.experiment import NOT_APPLIED

    return NOT_APPLIED


def _key(M, pos, ps, pc, f, j) -> tuple:
    c = [0] * len(M)
    for i, p in enumerate(ps):
        c[pos[p]] = pc[i]
    c[pos[f]] = j
    return tuple(c)


# ---- findings -------------------------------------------------------------------------------

def findings(d: dict) -> list[dict]:
    """Findings for nested terms (``level within codec``), which name no plain factor
    product and so get no finding of the crossed kind: whether the nested factor matters
    within its parent, with its ratios per parent level; for a nested term crossed with
    other factors, whether its effect depends on them."""
    inc = d.get("incomplete") or {}
    if not inc.get("nested"):
        return []
    alpha = float(d.get("alpha") or (d.get("model") or {}).get("alpha") or 0.05)
    out = []
    for r in d.get("anova") or []:
        parsed = _parse_nested(str(r.get("term")))
        if parsed is None or r.get("kind") != "effect":
            continue
        f, parents, partners = parsed
        p = r.get("p_holm", r.get("p"))
        sig = p is not None and p < alpha
        if p is None:
            head = f"{r['term']}: untested ({r.get('note') or 'no error term'})"
        elif partners:
            head = (f"the effect of {f} within {parents} "
                    + ("depends" if sig else "does not depend detectably")
                    + f" on {partners} ({r['term']}, {_p_stated(r)})")
        elif sig:
            head = f"{f} matters within {parents} ({r['term']}, {_p_stated(r)})"
            detail = _within_detail(f, inc.get("within_ratios") or [])
            head += f": {detail}" if detail else ""
        else:
            head = (f"{f} made no detectable difference within {parents} ({r['term']}, "
                    f"{_p_stated(r)})")
        out.append({"kind": "main", "terms": [r["term"]], "factors": [f],
                    "significant": bool(sig), "ratio": None, "lower": None, "upper": None,
                    "p": p, "p_raw": r.get("p"), "statement": head, "within": True})
    return out


_NESTED_CROSSED = re.compile(r"\(([^():]+) " + WITHIN + r" ([^()]+)\)")
_NESTED_ALONE = re.compile(r"^([^():]+) " + WITHIN + r" ([^()]+)$")


def _parse_nested(term: str):
    """``(level within codec):rows`` -> ("level", "codec", "rows"), ``level within codec``
    -> ("level", "codec", ""); None for a crossed term."""
    m = _NESTED_CROSSED.search(term) or _NESTED_ALONE.search(term)
    if m is None:
        return None
    rest = (term[: m.start()] + term[m.end():]).strip(":")
    return m.group(1), m.group(2), rest


def _p_stated(r: dict) -> str:
    """The p of a nested term as its finding states it, worded as the crossed terms' are:
    Holm-adjusted over the table's terms, with the F test's own p (the ANOVA table's)
    beside it when the two read differently, so the finding never contradicts the table."""
    p, ph = r.get("p"), r.get("p_holm")
    if ph is None or p is None or fmt_p(ph) == fmt_p(p):
        return fmt_p(p if ph is None else ph)
    alone = fmt_p(p).replace("p = ", "").replace("p < ", "< ")
    return f"{fmt_p(ph)} after Holm over the terms, {alone} alone"


def fmt_p(p) -> str:
    """A p-value in a sentence (``p = 0.013``, ``p < 0.001``: `numbers.fmt_p_said`)."""
    from benchharness.numbers import fmt_p_said

    return fmt_p_said(p)


def _within_detail(f: str, ratios) -> str:
    """``within codec=zlib: level=6 1.30× [1.2× to 1.4×] against level=1, ...; within ...``."""
    from benchharness.numbers import fmt_ratio, fmt_ratio_interval

    by_parent: dict[str, list[str]] = {}
    for e in ratios:
        if e["factor"] != f:
            continue
        where = e.get("where") or ", ".join(f"{k}={v}" for k, v in e["within"].items())
        if e["ratio"] is None:
            text = f"{f}={e['level']} not estimable"
        else:
            iv = ("[no interval]" if e["lower"] is None or e["upper"] is None
                  else f"[{fmt_ratio_interval(e['lower'], e['upper'])}]")
            text = f"{f}={e['level']} {fmt_ratio(e['ratio'])} {iv} against {f}={e['reference']}"
        by_parent.setdefault(where, []).append(text)
    return "; ".join(f"within {w}: " + ", ".join(items) for w, items in by_parent.items())
