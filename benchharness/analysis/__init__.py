"""The analysis stage: a runs table analysed as a designed factorial experiment.

``analyze(data, ...) -> Analysis`` chains the modules of this package, each
with one job:

* ``prepare``      — load, keep ``ok`` runs, count failures per cell, code levels;
* ``cells``        — per-cell sufficient statistics in one O(N) pass;
* ``transform``    — Box-Cox profile likelihood (Box & Cox 1964) and the scale rule;
* ``model``        — exact least-squares fit from cell statistics, Type II / III SS;
* ``diagnostics``  — normality, equal variances, outliers, drift, with verdicts;
* ``effects``      — estimated marginal means, level ratios, partial η², ω²;
* ``comparisons``  — Tukey HSD, simple effects, declared; pairwise (Bonferroni / Holm);
* ``art``          — aligned rank transform cross-check (Wobbrock et al. 2011);
* ``findings``     — the best cell or tied set, and the structured findings that
                     every headline and report renders (``derive``);
* ``render_text``  — plain terminal layout (``format_analysis``).

``Analysis.to_dict()`` is exactly the content of ``analysis.json``.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np

from benchharness.errors import UsageError

__all__ = ["analyze", "Analysis", "analyze_results_folder", "write_analysis_json",
           "format_analysis"]

#: above this many analysed rows the rank-based cross-check runs only on request.
ART_AUTO_MAX_ROWS = 50_000


@dataclass(frozen=True)
class Analysis:
    """Result of `analyze`. Plain data; `to_dict` gives analysis.json."""

    response: str
    factors: tuple[str, ...]
    levels: dict
    block: str | None
    model: dict
    transform: dict
    anova_rows: tuple[dict, ...]
    means: tuple[dict, ...]
    diagnostics: dict
    effects: tuple[dict, ...]
    comparisons: tuple[dict, ...]
    failures: dict
    art: dict | None
    notes: tuple[str, ...]
    counts: dict
    fraction: dict | None = None    # two-level fraction: the alias-chain table (fraction.py)
    better: str = "lower"
    best: dict | None = None
    findings: tuple[dict, ...] = ()
    # arrays for figures (not serialised): per analysed row, in input order
    residuals: Any = field(default=None, repr=False, compare=False)
    fitted: Any = field(default=None, repr=False, compare=False)
    studentized: Any = field(default=None, repr=False, compare=False)
    position: Any = field(default=None, repr=False, compare=False)
    run: Any = field(default=None, repr=False, compare=False)
    fit: Any = field(default=None, repr=False, compare=False)
    #: the role of every factor (setting, workload, environment), see benchharness.experiment.roles
    roles: dict | None = None

    @property
    def anova(self):
        """The ANOVA table as a DataFrame (one row per term, then Residual)."""
        import pandas as pd

        cols = ["term", "df", "sum_sq", "mean_sq", "F", "p", "partial_eta_sq", "omega_sq"]
        return pd.DataFrame([{k: r.get(k) for k in cols} for r in self.anova_rows], columns=cols)

    def to_dict(self) -> dict:
        return _clean({
            "response": self.response,
            "alpha": self.model.get("alpha"),
            "confidence": 1.0 - self.model.get("alpha", 0.05),
            "ss_type": self.model.get("ss_type"),
            "factors": [{"name": f, "levels": list(self.levels[f])} for f in self.factors],
            "block": self.block,
            "model": self.model,
            "counts": self.counts,
            "transform": self.transform,
            "anova": list(self.anova_rows),
            "means": list(self.means),
            "diagnostics": self.diagnostics,
            "effects": list(self.effects),
            "comparisons": list(self.comparisons),
            "failures": self.failures,
            "art": self.art,
            "notes": list(self.notes),
            **({"fraction": self.fraction} if self.fraction is not None else {}),
            "roles": self.roles,
            "better": self.better,
            "best": self.best,
            "findings": list(self.findings),
        })

    def to_json(self) -> str:
        return json.dumps(self.to_dict(), indent=2, ensure_ascii=False, allow_nan=False)


def _clean(x):
    """JSON-safe copy: numpy scalars to Python, NaN/inf to None, tuples to lists."""
    if isinstance(x, dict):
        return {str(k): _clean(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_clean(v) for v in x]
    if isinstance(x, np.ndarray):
        return [_clean(v) for v in x.tolist()]
    if isinstance(x, (bool, np.bool_)):
        return bool(x)
    if isinstance(x, (int, np.integer)):
        return int(x)
    if isinstance(x, (float, np.floating)):
        x = float(x)
        return x if math.isfinite(x) else None
    return x


def _parse_reference(reference, names, levels):
    """{factor: level} | ["F=L", ...] | "F=L" -> {factor index: level index}."""
    refs = {i: 0 for i in range(len(names))}
    if reference is None:
        return refs
    if isinstance(reference, str):
        reference = [reference]
    if isinstance(reference, (list, tuple)):
        pairs = {}
        for item in reference:
            if "=" not in str(item):
                raise UsageError(f"reference {item!r}: write FACTOR=LEVEL")
            k, v = str(item).split("=", 1)
            pairs[k] = v
        reference = pairs
    for k, v in dict(reference).items():
        if k not in names:
            raise UsageError(f"reference names {k!r}, which is not a factor of the analysis "
                             f"({', '.join(names)})")
        i = names.index(k)
        if str(v) not in levels[i]:
            raise UsageError(f"reference level {v!r} is not a level of {k!r} "
                             f"(levels: {', '.join(levels[i])})")
        refs[i] = levels[i].index(str(v))
    return refs


def _declared_from_experiment(exp):
    """(plain value, yaml node) of the experiment's ``compare:`` section, or (None, None)."""
    sections = getattr(exp, "sections", None) or {}
    node = sections.get("compare") if hasattr(sections, "get") else None
    if node is None:
        return None, None
    from benchharness.experiment.yamlnodes import to_plain

    return to_plain(node), node


def _item_node(node, k):
    """The YAML node of item k (1-based) of a sequence node, for error positions."""
    try:
        return node.value[k - 1]
    except (AttributeError, IndexError, TypeError):
        return node


def analyze(data, response: str = "wall_s", factors=None, block=None, transform="auto",
            model=None, ss_type: int = 2, alpha: float = 0.05, reference=None,
            adjust: str = "bonferroni", compare=None, art="auto",
            comparisons=True, better=None) -> "Analysis":
    """Analyse a runs table (DataFrame, tidy CSV path or results folder).

    ``block``: a column name; None (or "auto") for the default (``block`` for
    blocked experiments, ``host`` when it has more than one value); False for none.
    ``model``: "full", "main" or N (interactions up to order N); default (None) "full",
    or for a two-level fraction every estimable alias chain (``analysis.fraction``:
    terms aliased with an earlier one are left out and named in its chain, Lenth's
    method gives the p-values when there are no replicates). ``ss_type``: 2 or 3.
    ``reference``: {factor: level} or ["factor=level", ...] for the ratios
    (default: the first level). ``adjust``: "bonferroni" or "holm" for the
    simple-effect, declared and pairwise families (interval and p always from
    the same adjustment). ``compare``: declared comparisons (see
    ``comparisons.parse_declared``); default: the experiment's ``compare:``.
    ``art``: the rank-based cross-check on the analysed scale, following ``model``:
    "auto" (run when normality or equal variances is not ``ok`` and at most 50,000
    rows), True (always), False (never; the CLI's ``--no-cross-check``).
    ``transform``: "auto" (the log scale for a positive, ratio-scaled response
    unless the Box-Cox evidence and the log-scale checks both argue against it;
    see ``transform.choose``), "log", "none" or "boxcox".
    ``comparisons``: True (default family: Tukey HSD for each significant main
    effect outside significant interactions, simple effects inside significant
    two-factor interactions, declared comparisons), False (none; faster in
    simulations), "all" or a list of method names (``tukey``, ``pairwise``,
    ``simple``) to run those for every factor.
    ``better``: "lower" or "higher" (which direction of the response is better;
    default: the results folder's metrics.json, else lower).

    Linear algebra here works on small matrices (cells × parameters), where
    multi-threaded BLAS only adds overhead on a busy machine, so every BLAS copy is
    held to one thread for the call when threadpoolctl is available (threads.py).
    """
    kwargs = dict(response=response, factors=factors, block=block, transform=transform,
                  model=model, ss_type=ss_type, alpha=alpha, reference=reference,
                  adjust=adjust, compare=compare, art=art, comparisons=comparisons,
                  better=better)
    from benchharness.analysis.threads import one_thread

    with one_thread():  # every BLAS copy held to one thread (threads.py)
        return _analyze(data, **kwargs)


def _analyze(data, response: str = "wall_s", factors=None, block=None, transform="auto",
            model=None, ss_type: int = 2, alpha: float = 0.05, reference=None,
            adjust: str = "bonferroni", compare=None, art="auto",
            comparisons=True, better=None) -> Analysis:
    """The work of `analyze` (same arguments)."""
    from benchharness.analysis import dist as stats

    from benchharness.analysis import comparisons as cmp
    from benchharness.analysis import diagnostics as dg
    from benchharness.analysis import effects as ef
    from benchharness.analysis import transform as tr
    from benchharness.analysis.cells import index_cells, moments
    from benchharness.analysis.model import (ZERO_SPREAD, term_basis, design, fit_model, limit_terms,
                                             model_terms)
    from benchharness.analysis.prepare import prepare

    if not (isinstance(alpha, (int, float)) and 0 < alpha < 1):
        raise UsageError(f"alpha must be between 0 and 1, not {alpha!r}")
    try:
        ss_type = int(ss_type)
    except (TypeError, ValueError):
        raise UsageError(f"sums of squares type {ss_type!r}: use 2 or 3") from None
    if ss_type not in (2, 3):
        raise UsageError(f"sums of squares type {ss_type!r}: use 2 or 3")
    if adjust not in cmp.ADJUST:
        raise UsageError(f"adjustment {adjust!r} is not one of {', '.join(cmp.ADJUST)}")
    if transform not in tr.TRANSFORMS:
        raise UsageError(f"transform {transform!r} is not one of {', '.join(tr.TRANSFORMS)}")
    if art not in ("auto", True, False):
        raise UsageError("art must be 'auto', True or False")
    methods = _methods(comparisons)
    if better not in (None, "lower", "higher"):
        raise UsageError(f"better {better!r}: use lower or higher")

    prep = prepare(data, response=response, factors=factors, block=block)
    notes = list(prep.notes)
    fnames = list(prep.factors)
    flevels = list(prep.levels)
    names, levels, codes = list(fnames), list(flevels), list(prep.codes)
    block_index = None
    if prep.block is not None:
        block_index = len(names)
        names.append(prep.block)
        levels.append(prep.block_levels)
        codes.append(prep.block_codes)
    sizes = [len(lv) for lv in levels]
    factor_idx = list(range(len(fnames)))
    # A two-level fraction: by default every estimable alias chain, named by its chain.
    from benchharness.analysis import fraction as fr

    fdesign = fr.recognise(fnames, flevels, codes[: len(fnames)], prep.experiment)
    spec = model
    if better is None:
        better = _better_of(data, prep.response)
    if model is None and fdesign is not None and fdesign.is_fraction:
        model = fr.chain_order(fdesign)
        spec = "every alias chain"
    elif model is None:
        model = fr.chain_order(fdesign) if fdesign is not None else "full"
        spec = "full"
        fc = index_cells(codes[: len(fnames)], sizes[: len(fnames)])
        if (fdesign is None and len(fnames) >= 2 and fc.count == len(prep.y)
                and block_index is None):   # two-level designs: Lenth's method instead
            model = spec = len(fnames) - 1
            notes.append("one run per cell: the " + ":".join(fnames) + " interaction is "
                         "left out of the model and serves as the error term (add "
                         "replicates to test it, or --model full to fit it without tests)")
    terms = model_terms(names, model, block_index)
    aliased_out = []
    if fdesign is not None:
        terms, aliased_out = fr.chain_terms(terms, names, fdesign)
    cells = index_cells(codes, sizes)
    fcells = cells if block_index is None else index_cells(codes[:block_index], sizes[:block_index])
    y = prep.y
    N = len(y)
    limit = limit_terms(terms, sizes, cells.count, N)   # cost follows what is estimable
    if limit.message:
        terms = limit.terms
        notes.append(limit.message)
        model = limit.order
    n_cells = np.bincount(cells.row_cell, minlength=cells.count).astype(float)

    # ---- no variation at all, or none within cells ------------------------------------------
    constant = bool(N and float(np.ptp(y)) <= ZERO_SPREAD * float(np.max(np.abs(y))))
    ymom = moments(cells.row_cell, y, cells.count, n=n_cells)
    within_zero = bool(float(ymom.ss_within.sum())
                       <= ZERO_SPREAD**2 * float((ymom.n * ymom.mean**2).sum()))

    # ---- scale -----------------------------------------------------------------------------
    positive = bool(np.all(y > 0))
    profile = None
    why = ""
    if positive:  # the Box-Cox profile is evidence on every scale (transform.py)
        X, _ = design(cells.levels, terms, sizes)
        B = term_basis(X * np.sqrt(n_cells)[:, None])
        df_res = N - B.shape[1]
        if df_res <= 0:
            why = "no residual degrees of freedom"
        elif constant:
            why = "all responses are equal"
        elif within_zero and B.shape[1] >= cells.count:
            why = "every run in a cell gave the same value"
        else:
            prof = tr.BoxCoxProfile(y, cells.row_cell, n_cells,
                                    None if B.shape[1] >= cells.count else B, df=df_res)
            profile = prof.profile(alpha=0.05)
    unit = tr.unit_of_response(prep.response, prep.experiment)
    choice = tr.choose(transform, profile, positive, why, tr.ratio_scaled(unit),
                       log_check=lambda: dg.scale_check(np.log(y), cells, fcells, terms,
                                                        ss_type, alpha))
    tdict = tr.describe(choice, profile, transform, unit)

    # ---- model -----------------------------------------------------------------------------
    z = tr.forward(y, choice)
    mom = moments(cells.row_cell, z, cells.count, n=n_cells)
    fit = fit_model(cells, mom, terms, ss_type)
    notes += fit.notes
    df_res = fit.df_resid
    mse = fit.mse
    grand = float((mom.n * mom.mean).sum() / N)
    ss_total = float(mom.ss_within.sum() + (mom.n * (mom.mean - grand) ** 2).sum())
    no_variation = None
    if constant or fit.exact:
        # zero variance is a finding of its own, never an F test on round-off
        value = f"{float(y[0]):.6g}"
        if constant:
            no_variation = {"kind": "constant", "statement": (
                f"Every run gave the same {prep.response} ({value}): no factor changed it in "
                "these runs, and with no variation there is nothing to test (no F tests)")}
        else:
            no_variation = {"kind": "within cells", "statement": (
                f"Every run in a cell gave the same {prep.response}: there is no run-to-run "
                "variation, so no F tests (they need an error term); the differences between "
                "cells are shown as measured, untested")}
        notes.append(no_variation["statement"])
    anova_rows, anova_p = [], {}
    for row in fit.table:
        ms = row.sum_sq / row.df if row.df > 0 else float("nan")
        F = p = None
        if df_res > 0 and row.df > 0 and mse > 0 and math.isfinite(ms):
            F = ms / mse
            p = float(stats.f.sf(F, row.df, df_res))
            anova_p[row.term] = p
        peta, omega = ef.effect_sizes(row.sum_sq, row.df, fit.rss, ss_total, mse)
        if df_res <= 0 or no_variation:  # no error estimate: SS/(SS + 0) = 1 says nothing
            peta = omega = None
        anova_rows.append({"term": row.term, "df": row.df, "sum_sq": row.sum_sq,
                           "mean_sq": ms, "F": F, "p": p, "partial_eta_sq": peta,
                           "omega_sq": omega, "kind": "block" if row.is_block else "effect",
                           "df_full": row.df_full, "note": row.note,
                           "aliases": list(row.aliases)})
    anova_rows.append({"term": "Residual", "df": df_res,
                       "sum_sq": fit.rss if df_res > 0 and not no_variation else 0.0,
                       "mean_sq": mse if df_res > 0 and not no_variation else None,
                       "F": None, "p": None,   # (0.0 above: round-off only)
                       "partial_eta_sq": None, "omega_sq": None, "kind": "residual"})
    for row in fit.table:
        if row.note:
            notes.append(f"{row.term}: {row.note}")
    fraction = None
    if fdesign is not None:
        fraction, fnotes = fr.attach(fdesign, codes[: len(fnames)], z, choice.name,
                                     alpha, anova_rows, terms, names, df_res,
                                     prep.block_codes if prep.block is not None else None,
                                     prep.response)
        notes += fnotes
        if aliased_out:
            notes.append("terms aliased with an estimated chain are named in its chain, not "
                         "fitted: " + ", ".join(t for t, _ in aliased_out))
        for r in anova_rows:
            if r.get("p") is not None and r.get("test"):
                anova_p[r["term"]] = r["p"]
    # Holm over the effect terms of the table: the terms the findings state (an ANOVA of
    # many terms tests many hypotheses; Cramer et al. 2016, Psychon. Bull. Rev. 23:640)
    eff_terms = [r["term"] for r in anova_rows
                 if r.get("kind") == "effect" and r["term"] in anova_p]
    adj = cmp.adjust_p([anova_p[t] for t in eff_terms], "holm")
    anova_p_holm = {t: float(a) for t, a in zip(eff_terms, adj)}
    for r in anova_rows:
        if r["term"] in anova_p_holm:
            r["p_holm"] = anova_p_holm[r["term"]]
    from benchharness.analysis.hosts import host_split

    hosts = host_split(prep, z, model, ss_type, fit, alpha)
    if hosts and hosts["differ"]:
        notes.append("hosts differ significantly (F test of hosts against blocks within "
                     f"hosts, p {hosts['between_hosts']['p']:.3g}); the block term keeps this "
                     "out of the factor effects, but the hosts are not interchangeable")
    expected_cells = math.prod(sizes[f] for f in factor_idx)
    if fcells.count < expected_cells:
        missing = _missing_cells(fcells, sizes[: len(fnames)], fnames, flevels)
        shown = "; ".join(", ".join(f"{k}={v}" for k, v in m.items()) for m in missing[:5])
        more = f" and {len(missing) - 5} more" if len(missing) > 5 else ""
        if fdesign is not None and fcells.count == fdesign.n_cells:
            notes.append(f"a two-level fraction {fraction['design'] if fraction else ''}: "
                         f"{fdesign.n_cells} of {expected_cells} cells, defining relation "
                         f"{fdesign.defining_relation_text()}; effects aliased with each other "
                         "are estimated together and named by their alias chain")
        else:
            notes.append(f"{len(missing)} of {expected_cells} cells have no ok runs "
                         f"({shown}{more}); effects that need them are inestimable and their "
                         "means are left out")
    if df_res <= 0 and any(r.get("test") for r in anova_rows):
        notes.append("no replicates, so no residual degrees of freedom: the diagnostics cannot "
                     "be checked; replicate the fraction for F tests and intervals")
    elif df_res <= 0:
        notes.append("no residual degrees of freedom (one run per cell for this model): sums of "
                     "squares are shown without F tests, intervals or diagnostics; add replicates "
                     "or fit fewer interactions (--model main or --model N)")

    # ---- residuals and diagnostics -------------------------------------------------------
    resid = z - fit.fitted[cells.row_cell]
    lev_rows = fit.leverage[cells.row_cell]
    diagnostics: dict[str, Any] = {}
    if hosts is not None:
        diagnostics["hosts"] = hosts
    studentized = None
    if df_res > 0 and not no_variation:
        scale = np.sqrt(np.clip(1.0 - lev_rows, 0.0, None))
        use = scale > 1e-8
        diagnostics["normality"] = dg.normality(resid[use] / scale[use], alpha)
        diagnostics["equal_variance"] = dg.brown_forsythe(fcells.row_cell, resid, fcells.count,
                                                          alpha)
        out = dg.outliers(resid, lev_rows, fit.rss, df_res, prep.run, alpha)
        studentized = out.pop("studentized", None)  # absent when df < 2
        diagnostics["outliers"] = out["runs"]
        diagnostics["outlier_cutoff"] = out["cutoff"]
        diagnostics["outlier_count"] = out["count"]
        diagnostics["outlier_verdict"] = out["verdict"]
        if choice.name == "log":
            pct_unit = 100.0
        elif choice.name == "none":
            mean_y = float(np.mean(y))
            pct_unit = 100.0 / mean_y if mean_y else float("nan")
        else:
            pct_unit = 100.0 * math.exp(-choice.lam * float(np.mean(np.log(y))))
        diagnostics["drift"] = dg.drift(resid, prep.position, pct_unit, alpha)
        if "load_1m" in prep.extra:
            diagnostics["load"] = _load_check(resid, prep.extra["load_1m"], alpha)
    else:
        skipped = {"verdict": "not checked: " + ("no variation between runs" if no_variation
                                                 else "no residual degrees of freedom")}
        diagnostics.update(normality=dict(skipped, test=None, statistic=None, p=None),
                           equal_variance=dict(skipped, test=None, statistic=None, p=None),
                           outliers=[], drift=dict(skipped, slope_per_100_runs=None, p=None),
                           outlier_verdict=skipped["verdict"])
    fmom = moments(fcells.row_cell, z, fcells.count)
    diagnostics["small_cells"] = dg.small_cells(
        fmom.n, fmom.ss_within, lambda c: {fnames[j]: flevels[j][fcells.levels[c, j]]
                                           for j in range(len(fnames))})
    if no_variation:    # zero spread everywhere is the finding itself, not a cell's problem
        diagnostics["small_cells"] = [c for c in diagnostics["small_cells"] if c["n"] < 2]
    assumptions_ok = (diagnostics["normality"].get("ok", True)
                      and diagnostics["equal_variance"].get("ok", True))
    diagnostics["assumptions_ok"] = bool(assumptions_ok)

    # ---- rank-based cross-check ----------------------------------------------------------
    art_result = None
    run_art = (art is True) or (art == "auto" and not assumptions_ok and N <= ART_AUTO_MAX_ROWS)
    if run_art and df_res > 0 and not no_variation:
        rows = _run_art(codes, sizes, z, terms, ss_type, alpha, anova_p,
                        fit.fitted[cells.row_cell])
        art_result = {"reason": "requested" if art is True else
                      "assumptions fail on the analysis scale", "scale": choice.name,
                      "terms": rows}
        disagree = [r["term"] for r in rows if r["agrees"] is False]
        if disagree:
            notes.append("the rank-based cross-check disagrees for " + ", ".join(disagree)
                         + "; treat those F tests with caution")
    elif art == "auto" and not assumptions_ok and N > ART_AUTO_MAX_ROWS:
        notes.append(f"assumptions fail, but with more than {ART_AUTO_MAX_ROWS:,} rows the "
                     "rank-based cross-check runs only on request (--art)")

    # ---- effects, means, comparisons -----------------------------------------------------
    refs = _parse_reference(reference, fnames, flevels)
    fit_ls = fit   # the least-squares fit itself (Analysis.fit)
    lenth_error = bool(fraction and fraction.get("lenth") and df_res <= 0
                       and any(r.get("test") for r in anova_rows))
    if lenth_error:
        # An unreplicated fraction: intervals from Lenth's pseudo standard error.
        fit = fr.lenth_fit(fit, fraction)
    means = ef.marginal_means(fit, names, levels, choice, alpha)
    effects = ef.level_ratios(fit, names, levels, factor_idx, refs, choice, alpha)
    comps = []
    if methods is None:
        compare = []
    else:
        tk_idx, pw_idx = factor_idx, factor_idx
        if methods == "default":
            tk_idx = _tukey_factors(fit, anova_p_holm, alpha, factor_idx)
        if lenth_error:
            tk_idx = []   # two levels each: the level ratio is the comparison
        if methods == "default" or "tukey" in methods:
            comps += cmp.tukey(fit, names, levels, tk_idx, choice, alpha, refs)
        if methods != "default" and "pairwise" in methods:
            comps += cmp.pairwise(fit, names, levels, pw_idx, choice, alpha, adjust, refs)
        if methods == "default" or "simple" in methods:
            comps += cmp.simple_effects(fit, names, levels,
                                        anova_p_holm if methods == "default" else anova_p,
                                        choice, alpha, adjust, refs)
    node = None
    if compare is None:
        compare, node = _declared_from_experiment(prep.experiment)
    try:
        items = cmp.parse_declared(compare, fnames, flevels)
    except UsageError as exc:
        if node is None:
            raise
        from benchharness.experiment.yamlnodes import node_error

        k = getattr(exc, "item", None)
        raise node_error(_item_node(node, k) if k else node, str(exc),
                         getattr(prep.experiment, "path", None)) from None
    comps += cmp.declared(fit, names, levels, items, choice, alpha, adjust)

    # ---- failures ------------------------------------------------------------------------
    sc = prep.status_counts
    flagged = [c for c in sc if c["flag"]]
    lost = sum(c["runs"] - c["ok"] for c in sc)
    failures = {
        "runs": sum(c["runs"] for c in sc), "not_ok": lost,
        "cells": [c for c in sc if c["runs"] > c["ok"]],
        "cells_with_timeouts": [c["levels"] for c in flagged],
        "verdict": ("every run finished" if lost == 0 else
                    f"{lost} run(s) did not finish; means of cells with timeouts are biased "
                    "low (only the runs that finished are analysed)" if flagged else
                    f"{lost} run(s) failed; the failure rate per cell is listed"),
    }
    if flagged:
        notes.append(f"{len(flagged)} cell(s) had timeouts: their means describe only the runs "
                     "that finished and so look faster than the configuration is")

    counts = {"rows": N, "cells": fcells.count, "cells_expected": expected_cells,
              **({"cells_planned": fdesign.n_cells} if fdesign is not None else {}),
              "model_cells": cells.count, "df_resid": df_res, "level_order": prep.order_source}
    model_dict = {"spec": str(spec), "terms": [t.name for t in terms], "ss_type": fit.ss_type,
                  "ss_type_requested": ss_type, "alpha": alpha, "adjust": adjust,
                  "rank": fit.rank, "mse": mse if df_res > 0 and not no_variation else None,
                  "no_variation": no_variation,
                  "limited": ({"reason": limit.reason, "order": limit.order,
                               "parameters_requested": limit.requested,
                               "parameters_fitted": limit.fitted, "message": limit.message}
                              if limit.message else None),
                  "references": {fnames[i]: flevels[i][j] for i, j in refs.items()}}
    from benchharness.analysis import findings as fd

    roles = _roles_of(prep.experiment, fnames, flevels)
    best = None
    if len(fnames) and not constant:     # every cell equal: nothing to choose between
        setting = _setting_factors(roles, fnames)
        best = fd.best_cells(fit, names, levels, setting, choice, alpha, better,
                             prep.response)
        if best is not None and fdesign is not None and fdesign.is_fraction:
            # A fraction: a cell that did not run has a mean predicted from the alias
            # chains (as if each acts through its first-named member); say so.
            ran = {tuple(flevels[f][int(codes[f][i])] for f in setting) for i in range(N)}
            best["not_run"] = [j for j, c in enumerate(best["cells"])
                               if tuple(c["levels"][fnames[f]] for f in setting) not in ran]
        if best is not None:
            best["averaged_over"] = [f for f in fnames if f not in best["factors"]]
            best["roles_source"] = roles.get("source")
    an = Analysis(
        response=prep.response, factors=tuple(fnames),
        levels={f: list(lv) for f, lv in zip(fnames, flevels)}, block=prep.block,
        model=model_dict, transform=tdict, anova_rows=tuple(anova_rows), means=tuple(means),
        diagnostics=diagnostics, effects=tuple(effects), comparisons=tuple(comps),
        failures=failures, art=art_result, notes=tuple(dict.fromkeys(notes)), counts=counts,
        fraction=fraction,
        residuals=resid, fitted=fit.fitted[cells.row_cell], studentized=studentized,
        position=prep.position, run=prep.run, fit=fit_ls, roles=roles, better=better, best=best)
    return replace(an, findings=tuple(fd.derive(an.to_dict())))


def _roles_of(experiment, names, levels) -> dict:
    """Each factor's role: declared in the experiment file, else guessed (benchharness.experiment.roles)."""
    from benchharness.experiment.roles import factor_roles

    return factor_roles(experiment, factors=list(names),
                        levels={f: list(lv) for f, lv in zip(names, levels)}).to_dict()


def _methods(comparisons):
    """"default", None (no comparisons) or a set of method names."""
    from benchharness.analysis.comparisons import METHODS

    if comparisons is True or comparisons == "default":
        return "default"
    if comparisons is False or comparisons is None:
        return None
    if comparisons == "all":
        return set(METHODS)
    items = [comparisons] if isinstance(comparisons, str) else list(comparisons)
    bad = [m for m in items if m not in METHODS]
    if bad:
        raise UsageError(f"comparison method {bad[0]!r} is not one of "
                         f"{', '.join(METHODS)} (or all)")
    return set(items)


def _tukey_factors(fit, anova_p, alpha, factor_idx):
    """Factors whose main effect is significant and which are in no significant interaction."""
    sig = {t.name for t in fit.terms if (anova_p.get(t.name) is not None
                                          and anova_p[t.name] < alpha)}
    inside = set()
    for t in fit.terms:
        if not t.is_block and len(t.factors) >= 2 and t.name in sig:
            inside |= set(t.factors)
    out = []
    for f in factor_idx:
        main = next((t for t in fit.terms if t.factors == (f,) and not t.is_block), None)
        if main is not None and main.name in sig and f not in inside:
            out.append(f)
    return out


def _setting_factors(roles: dict | None, fnames) -> list[int]:
    """Indices of the factors a recommendation chooses: the settings (``benchharness.experiment.roles``).

    Workloads and environments are averaged over, so the best cell is a setting
    that holds up across them; without any setting every factor counts.
    """
    settings = set((roles or {}).get("setting") or [])
    idx = [i for i, f in enumerate(fnames) if f in settings]
    return idx or list(range(len(fnames)))


def _better_of(data, response) -> str:
    """Direction of the response: a results folder's metrics.json, else lower."""
    try:
        path = Path(data)
    except TypeError:
        return "lower"
    if path.is_dir():
        from benchharness.measure.metrics import better_direction

        return better_direction(path, response)
    return "lower"


def _load_check(resid, load, alpha):
    """Do residuals follow the machine's load? (Spearman; ``benchharness.analysis.load_check``)."""
    from benchharness.analysis.load_check import load_correlation

    out = load_correlation(resid, load, alpha=alpha)
    return {"test": "spearman", "statistic": out.get("rho"), "p": out.get("p"),
            "n": out.get("n"), "relation": out.get("verdict"), "verdict": out.get("message"),
            "ok": out.get("verdict") != "related"}


def _run_art(codes, sizes, z, terms, ss_type, alpha, anova_p, fitted):
    from benchharness.analysis.art import art_anova

    return art_anova(codes, sizes, z, terms, ss_type, alpha, anova_p, fitted)


def _missing_cells(fcells, sizes, names, levels):
    from itertools import product

    present = {tuple(r) for r in fcells.levels.tolist()}
    out = []
    for combo in product(*[range(k) for k in sizes]):
        if combo not in present:
            out.append({names[j]: levels[j][c] for j, c in enumerate(combo)})
            if len(out) > 1000:
                break
    return out


def analyze_results_folder(folder, **kwargs) -> Analysis:
    """Analyse a results folder with its experiment's defaults (used by ``benchharness run``)."""
    return analyze(Path(folder), **kwargs)


def write_analysis_json(analysis: Analysis, path) -> Path:
    """Write ``analysis.json`` (never over an existing file of another name: caller's choice)."""
    path = Path(path)
    tmp = path.with_name(path.name + ".tmp")
    try:
        tmp.write_text(analysis.to_json() + "\n", encoding="utf-8")
        tmp.replace(path)
    except BaseException:
        tmp.unlink(missing_ok=True)  # a full disk leaves no half file behind
        raise
    return path


def format_analysis(analysis: Analysis) -> str:
    from benchharness.analysis.render_text import format_analysis as _fmt

    return _fmt(analysis)
