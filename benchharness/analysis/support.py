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
    present = _presence(sup.cells, M, cross, kids)
    combos = sorted(present)
    common = _common_cross(present, combos)
    parent_pos = [j for j, f in enumerate(M) if any(f in sup.nested.get(kf, ()) for kf in kids)]
    groups = _kid_levels(present, combos, common, parent_pos)
    out_cells, lacking = [], []
    for m in combos:
        ks = groups.get(tuple(m[j] for j in parent_pos))
        if not common or not common <= set(present[m]) or not ks:
            out_cells.append(None)
            lacking.append(m)
        else:
            out_cells.append(_cell_rows(sup.nf, M, m, cross, sorted(common), kids, sorted(ks)))
    return {"combos": combos, "cells": out_cells, "lacking": lacking, "cross": cross,
            "kids": kids, "common": sorted(common), "groups": groups}


def _presence(cells, M, cross, kids) -> dict:
    """{margin combination: {cross combination: {nested-factor combinations}}} that exist."""
    present: dict[tuple, dict[tuple, set]] = {}
    for m, x, k in zip(map(tuple, cells[:, list(M)].tolist()),
                       map(tuple, cells[:, cross].tolist()),
                       map(tuple, cells[:, kids].tolist())):
        present.setdefault(m, {}).setdefault(x, set()).add(k)
    return present


def _common_cross(present, combos) -> set:
    """The cross combinations present for more than half of the margin's combinations (else
    those present for all)."""
    count: dict[tuple, int] = {}
    for m in combos:
        for x in present[m]:
            count[x] = count.get(x, 0) + 1
    common = {x for x, n in count.items() if 2 * n > len(combos)}
    if not common and combos:
        common = set.intersection(*(set(present[m]) for m in combos))
    return common


def _kid_levels(present, combos, common, parent_pos) -> dict:
    """A nested factor's levels per parent combination: those every margin combination of
    that parent has with every common cross combination."""
    groups: dict[tuple, set] = {}
    for m in combos:
        if not common or not common <= set(present[m]):
            continue
        gk = tuple(m[j] for j in parent_pos)
        ks = set.intersection(*(present[m][x] for x in common))
        groups[gk] = ks if gk not in groups else groups[gk] & ks
    return groups


def _cell_rows(nf, M, m, cross, common, kids, ks) -> np.ndarray:
    """The level codes of the cells one margin combination averages over."""
    rows = []
    for x in common:
        for k in ks:
            r = np.zeros(nf, dtype=np.int64)
            r[list(M)] = m
            r[cross] = x
            r[kids] = k
            rows.append(r)
    return np.array(rows)


def pair_rows(fit, factors, ca, cb):
    """Averaging rows of two combinations ``ca``, ``cb`` of ``factors`` over the other
    factors' combinations that exist for both (None when there is none), those combinations
    (codes of the other factors) and the other factors' indices, so a ratio is never
    extrapolated. A factor nested in ``factors`` is not matched between the two: each side
    averages over its own levels of it (``transport=udp``, where ``ack`` does not apply,
    against ``transport=tcp`` averaged over its acks), as `margin_plan` does for a mean."""
    sup: Support = fit.support
    M = list(factors)
    others = [f for f in range(sup.nf) if f not in M]
    kids = [f for f in others if f in sup.nested and set(sup.nested[f]) <= set(M)]
    cross = [f for f in others if f not in kids]
    have = {c: _ran_with(sup.cells, M, cross, kids, c) for c in (tuple(ca), tuple(cb))}
    common = sorted(set(have[tuple(ca)]) & set(have[tuple(cb)]))
    if not common:
        return None, None, [], cross
    out = []
    for c in (ca, cb):
        row = _side_row(fit, M, cross, kids, c, common, have[tuple(c)])
        if row is None:
            return None, None, [], cross
        out.append(row)
    return out[0], out[1], common, cross


def _ran_with(cells, M, cross, kids, c) -> dict[tuple, set]:
    """For the combination ``c`` of the factors ``M``: the crossed factors' combinations it
    ran with, each with the set of nested factors' combinations it ran at."""
    have: dict[tuple, set] = {}
    rows = cells[np.all(cells[:, M] == np.asarray(c), axis=1)]
    for x, k in zip(map(tuple, rows[:, cross].tolist()), map(tuple, rows[:, kids].tolist())):
        have.setdefault(x, set()).add(k)
    return have


def _side_row(fit, M, cross, kids, c, common, have_c):
    """The averaging row of one side ``c`` over the ``common`` crossed combinations and
    the nested levels it has with every one of them (block columns zeroed); None when it
    has no nested level in common with them all."""
    from benchharness.analysis.model import design

    # the nested factor's levels this side has with every common combination
    ks = sorted(set.intersection(*(have_c[x] for x in common)))
    if not ks:
        return None
    pairs = [(x, k) for x in common for k in ks]
    lv = np.zeros((len(pairs), len(fit.sizes)), dtype=np.int64)
    lv[:, M] = c
    lv[:, cross] = np.asarray([x for x, _ in pairs], dtype=np.int64).reshape(len(pairs), -1)
    lv[:, kids] = np.asarray([k for _, k in pairs], dtype=np.int64).reshape(len(pairs), -1)
    X, _ = design(lv, fit.terms, fit.sizes)
    row = X.mean(axis=0)
    for sl in (fit.slices[t.name] for t in fit.terms if t.is_block):
        row[sl] = 0.0
    return row


def where_both_ran(over, left_out=None) -> str:
    """``only rows=small, where both ran``: the factors that stay at one level over the
    combinations a pairwise ratio averages over; else, when fewer, the combinations it
    leaves out (``not at transport=udp, payload=big, where only one of them ran``); else up
    to four of the combinations."""
    keys = list(over[0]) if over else []
    fixed = [k for k in keys if len({o[k] for o in over}) == 1]
    if fixed:
        return "only " + ", ".join(f"{k}={over[0][k]}" for k in fixed) + ", where both ran"
    if left_out and len(left_out) < len(over) and len(left_out) <= 4:
        text = "; ".join(", ".join(f"{k}={v}" for k, v in o.items()) for o in left_out)
        return f"not at {text}, where only one of them ran"
    text = "; ".join(", ".join(f"{k}={v}" for k, v in o.items()) for o in over[:4])
    text += f" and {len(over) - 4} more" if len(over) > 4 else ""
    return f"only {text}, where both ran"
