"""Margins of an incomplete factorial: averaging over the cells that exist.

An estimated marginal mean (Searle, Speed & Milliken 1980) averages the model's
cell means over the other factors' levels. When cells are missing by design
that average would reach into cells that do not exist, which no data can
estimate. Here a margin averages instead over the other factors' combinations
that exist for more than half of the margin's combinations (and, for a nested
factor, over its own levels within its parent); a margin combination that
lacks some of them gets no mean (`margin_plan` says which). `pair_rows` does
the same for one pair of combinations, over what exists for both, so a ratio
is given wherever it is defined and never extrapolated. Used by
`benchharness.analysis.effects.margin_rows` when the fit carries a `Support`
(`benchharness.analysis.incomplete`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Support:
    """The factor cells that exist (level codes, one row per cell) and the nesting."""

    cells: np.ndarray                 # (C, nf) level codes of the observed factor cells
    nested: dict                      # nested factor index -> tuple of parent indices
    nf: int                           # number of factors (a block, if any, comes after)


def support_rows(fit, factors, combos=None):
    """Averaging rows L (G, p) of every combination of ``factors`` (or the given ``combos``)
    over the cells that exist; NaN rows where a combination has no defined mean."""
    from benchharness.analysis.model import design

    sup: Support = fit.support
    factors = tuple(factors)
    if combos is None:
        sizes = [fit.sizes[f] for f in factors]
        combos = np.stack(np.unravel_index(np.arange(int(np.prod(sizes, dtype=np.int64))),
                                           tuple(sizes)), axis=1) if sizes else \
            np.zeros((1, 0), dtype=np.int64)
    combos = np.asarray(combos, dtype=np.int64).reshape(-1, len(factors))
    p = fit.X.shape[1]
    L = np.full((len(combos), p), np.nan)
    plan = margin_plan(sup, factors)
    if plan is None:
        return combos, L
    index = {tuple(c): g for g, c in enumerate(plan["combos"])}
    block_cols = [fit.slices[t.name] for t in fit.terms if t.is_block]
    n_cols = len(fit.sizes)
    for g, c in enumerate(combos.tolist()):
        j = index.get(tuple(c))
        if j is None or plan["cells"][j] is None:
            continue
        cells = plan["cells"][j]
        lv = np.zeros((len(cells), n_cols), dtype=np.int64)
        lv[:, : sup.nf] = cells
        X, _ = design(lv, fit.terms, fit.sizes)
        row = X.mean(axis=0)
        for sl in block_cols:
            row[sl] = 0.0        # sum-to-zero block columns average to zero over the blocks
        L[g] = row
    return combos, L


def margin_plan(sup: Support, factors) -> dict | None:
    """For each existing combination of ``factors``: the factor cells its mean averages over
    (None where the combination lacks some of them), and what was left out, for the words."""
    M = tuple(factors)
    if any(f >= sup.nf for f in M):
        return None
    others = [f for f in range(sup.nf) if f not in M]
    kids = [f for f in others if f in sup.nested and set(sup.nested[f]) <= set(M)]
    cross = [f for f in others if f not in kids]
    cells = sup.cells
    keyM = [tuple(r) for r in cells[:, list(M)].tolist()]
    keyX = [tuple(r) for r in cells[:, cross].tolist()]
    keyK = [tuple(r) for r in cells[:, kids].tolist()]
    present: dict[tuple, dict[tuple, set]] = {}
    for m, x, k in zip(keyM, keyX, keyK):
        present.setdefault(m, {}).setdefault(x, set()).add(k)
    combos = sorted(present)
    # cross combinations present for more than half of the margin's combinations
    count: dict[tuple, int] = {}
    for m in combos:
        for x in present[m]:
            count[x] = count.get(x, 0) + 1
    common = {x for x, n in count.items() if 2 * n > len(combos)}
    if not common:
        common = set.intersection(*(set(present[m]) for m in combos)) if combos else set()
    # a nested factor's levels: those every combination of its group (same parents) has
    parent_pos = [j for j, f in enumerate(M) if any(f in sup.nested.get(kf, ()) for kf in kids)]
    groups: dict[tuple, set] = {}
    for m in combos:
        if not common <= set(present[m]):
            continue
        gk = tuple(m[j] for j in parent_pos)
        ks = set.intersection(*(present[m][x] for x in common)) if common else set()
        groups[gk] = ks if gk not in groups else groups[gk] & ks
    out_cells, lacking = [], []
    for m in combos:
        gk = tuple(m[j] for j in parent_pos)
        if not common or not common <= set(present[m]) or not groups.get(gk):
            out_cells.append(None)
            lacking.append(m)
            continue
        rows = []
        for x in sorted(common):
            for k in sorted(groups[gk]):
                r = np.zeros(sup.nf, dtype=np.int64)
                r[list(M)] = m
                r[cross] = x
                r[kids] = k
                rows.append(r)
        out_cells.append(np.array(rows))
    return {"combos": combos, "cells": out_cells, "lacking": lacking, "cross": cross,
            "kids": kids, "common": sorted(common), "groups": groups}


def pair_rows(fit, factors, ca, cb):
    """Averaging rows of two combinations ``ca``, ``cb`` of ``factors`` over the other
    factors' combinations that exist for both (None when there is none), and those
    combinations (codes of the other factors), so a ratio is never extrapolated."""
    from benchharness.analysis.model import design

    sup: Support = fit.support
    M = list(factors)
    others = [f for f in range(sup.nf) if f not in M]
    cells = sup.cells
    have = {}
    for c in (tuple(ca), tuple(cb)):
        rows = cells[np.all(cells[:, M] == np.asarray(c), axis=1)]
        have[c] = {tuple(r) for r in rows[:, others].tolist()}
    common = sorted(have[tuple(ca)] & have[tuple(cb)])
    if not common:
        return None, None, []
    block_cols = [fit.slices[t.name] for t in fit.terms if t.is_block]
    out = []
    for c in (ca, cb):
        lv = np.zeros((len(common), len(fit.sizes)), dtype=np.int64)
        lv[:, M] = c
        lv[:, others] = np.asarray(common, dtype=np.int64).reshape(len(common), -1)
        X, _ = design(lv, fit.terms, fit.sizes)
        row = X.mean(axis=0)
        for sl in block_cols:
            row[sl] = 0.0
        out.append(row)
    return out[0], out[1], common


def where_both_ran(over) -> str:
    """``only rows=small, where both ran``: the factors that stay at one level over the
    combinations a pairwise ratio averages over (else up to four of the combinations)."""
    keys = list(over[0]) if over else []
    fixed = [k for k in keys if len({o[k] for o in over}) == 1]
    if fixed:
        text = ", ".join(f"{k}={over[0][k]}" for k in fixed)
    else:
        text = "; ".join(", ".join(f"{k}={v}" for k, v in o.items()) for o in over[:4])
        text += f" and {len(over) - 4} more" if len(over) > 4 else ""
    return f"only {text}, where both ran"
