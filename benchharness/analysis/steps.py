"""The named steps of `benchharness.analysis.analyze`, in the order they run.

`run_analysis` reads as the table of contents of an analysis: check the options,
prepare the runs, lay out the model, choose the scale, fit, build the ANOVA
table (Holm over its terms), attach a fraction's alias chains, check hosts,
say which cells are missing, check the residuals, cross-check with ranks, then
effects, comparisons, failures and the best setting. Each step is a function
of plain values; the methods themselves live in the modules named in the
package docstring.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np

from benchharness.errors import UsageError

#: above this many analysed rows the rank-based cross-check runs only on request.
ART_AUTO_MAX_ROWS = 50_000


@dataclass(frozen=True)
class Layout:
    """The model's layout: the factors, then the block (if any) as the last column."""

    fnames: list          # factor names
    flevels: list         # level labels per factor
    names: list           # factors, then the block
    levels: list
    codes: list           # level code of every analysed row, per column
    sizes: list           # number of levels per column
    block_index: int | None

    @property
    def factor_idx(self) -> list[int]:
        return list(range(len(self.fnames)))

    @property
    def nf(self) -> int:
        return len(self.fnames)


@dataclass(frozen=True)
class Setup:
    """The model's terms and the cells they are fitted on."""

    model: Any            # "full" | "main" | N, after the default and any limit
    spec: str             # what the user asked for, as recorded in analysis.json
    terms: list
    aliased_out: list     # terms left out because a fraction aliases them
    cells: Any            # cells of the layout (factors and block)
    fcells: Any           # cells of the factors alone
    limit: Any            # model.TermLimit
    n_cells: np.ndarray   # runs per layout cell
    nested: Any = None    # nested factor index -> parent indices (analysis.incomplete)


@dataclass(frozen=True)
class Scale:
    """The analysis scale and the evidence behind it."""

    choice: Any           # transform.Choice
    tdict: dict           # analysis.json's ``transform``
    boxcox: Any           # transform.BoxCoxProfile (None when not computed)
    constant: bool        # every response equal
    within_zero: bool     # no spread inside any cell


@dataclass(frozen=True)
class Fitted:
    """The least-squares fit on the analysis scale."""

    z: np.ndarray
    fit: Any              # model.Fit
    ss_total: float
    no_variation: dict | None


def run_analysis(data, response=None, factors=None, block=None, transform="auto",
                 model=None, ss_type=2, alpha=0.05, reference=None, adjust="bonferroni",
                 compare=None, art="auto", comparisons=True, better=None):
    """The work of `analyze` (same arguments), step by step."""
    from benchharness.analysis.result import Analysis
    from benchharness.analysis import findings as fd
    from benchharness.analysis import fraction as fr
    from benchharness.analysis.prepare import prepare

    ss_type, methods = check_options(alpha, ss_type, adjust, transform, art, comparisons,
                                     better)
    prep = prepare(data, response=response, factors=factors, block=block)
    notes = list(prep.notes)
    lay = layout_of(prep)
    fdesign = fr.recognise(lay.fnames, lay.flevels, lay.codes[: lay.nf], prep.experiment)
    if better is None:
        better = better_of(data, prep.response)
    model = surface_cell_model(prep, model, notes)
    setup = model_setup(lay, prep, model, fdesign, notes)
    scale = choose_scale(prep, lay, setup, transform, ss_type, alpha)
    fitted = fit_on_scale(prep, setup, scale, ss_type, notes)
    anova_rows, anova_p = anova_table(fitted)
    notes += [f"{row.term}: {row.note}" for row in fitted.fit.table if row.note]
    fraction = attach_fraction(fdesign, lay, prep, fitted, scale, setup, alpha, anova_rows,
                               anova_p, notes)
    anova_p_holm = holm_over_terms(anova_rows, anova_p)
    hosts = host_check(prep, fitted, setup.model, ss_type, alpha, notes)
    expected_cells = coverage_notes(lay, setup.fcells, fdesign, fraction, fitted.fit.df_resid,
                                    anova_rows, notes)
    diagnostics, studentized = diagnose(prep, lay, setup, fitted, scale, hosts, alpha)
    art_result = cross_check(art, diagnostics["assumptions_ok"], lay, setup, fitted, scale,
                             ss_type, alpha, anova_p, notes)
    refs = parse_reference(reference, lay.fnames, lay.flevels)
    ifit, lenth = interval_fit(fitted.fit, fraction, anova_rows)
    means, effects = estimates(ifit, lay, refs, scale.choice, alpha)
    incomplete, effects = incomplete_part(setup, lay, prep, ifit, anova_rows, refs, scale,
                                          alpha, effects, notes)
    comps = default_comparisons(methods, ifit, lay, refs, scale.choice, alpha, adjust,
                                anova_p, anova_p_holm, lenth)
    comps += declared_comparisons(compare, methods, prep, ifit, lay, scale.choice, alpha,
                                  adjust)
    failures = failures_of(prep, notes)
    roles = roles_of(prep.experiment, lay.fnames, lay.flevels)
    best = best_setting(ifit, lay, prep, roles, fdesign, scale, alpha, better)
    if incomplete is not None and best:
        from benchharness.analysis.incomplete import unmatched

        notes += unmatched(ifit, lay, best["factors"], incomplete)
    surface = surface_fit(prep, lay, fitted, scale, alpha, better, notes)
    trends = numeric_trends(prep, alpha, anova_rows, roles, better)
    resid = fitted.z - fitted.fit.fitted[setup.cells.row_cell]
    an = Analysis(
        response=prep.response, factors=tuple(lay.fnames),
        levels={f: list(lv) for f, lv in zip(lay.fnames, lay.flevels)}, block=prep.block,
        model=model_dict(setup, fitted, ss_type, alpha, adjust, refs, lay),
        transform=scale.tdict, anova_rows=tuple(anova_rows), means=tuple(means),
        diagnostics=diagnostics, effects=tuple(effects), comparisons=tuple(comps),
        failures=failures, art=art_result, notes=tuple(dict.fromkeys(notes)),
        counts=counts_of(prep, setup, fdesign, expected_cells, fitted.fit.df_resid,
                         surface, lay),
        fraction=fraction, residuals=resid, fitted=fitted.fit.fitted[setup.cells.row_cell],
        studentized=studentized, position=prep.position, run=prep.run, fit=fitted.fit,
        roles=roles, better=better, best=best, rows=prep.rows, boxcox=scale.boxcox,
        incomplete=incomplete, surface=surface, trends=trends)
    return replace(an, findings=tuple(fd.derive(an.to_dict())))


# ---- options and layout -----------------------------------------------------------------

def check_options(alpha, ss_type, adjust, transform, art, comparisons, better):
    """Validate the options; returns (ss_type as 2 or 3, comparison methods)."""
    from benchharness.analysis import comparisons as cmp
    from benchharness.analysis import transform as tr

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
    methods = comparison_methods(comparisons)
    if better not in (None, "lower", "higher"):
        raise UsageError(f"better {better!r}: use lower or higher")
    return ss_type, methods


def comparison_methods(comparisons):
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


def layout_of(prep) -> Layout:
    """The factors of ``prep``, with the block appended as the last column."""
    fnames, flevels = list(prep.factors), list(prep.levels)
    names, levels, codes = list(fnames), list(flevels), list(prep.codes)
    block_index = None
    if prep.block is not None:
        block_index = len(names)
        names.append(prep.block)
        levels.append(prep.block_levels)
        codes.append(prep.block_codes)
    return Layout(fnames=fnames, flevels=flevels, names=names, levels=levels, codes=codes,
                  sizes=[len(lv) for lv in levels], block_index=block_index)


def better_of(data, response) -> str:
    """Direction of the response: a results folder's metrics.json, else lower."""
    from benchharness.results.source import is_folder_read

    folder = data.path if is_folder_read(data) else data   # a folder already read
    try:
        path = Path(folder)
    except TypeError:
        return "lower"
    if path.is_dir():
        from benchharness.measure.metrics import better_direction

        return better_direction(path, response)
    return "lower"


# ---- the model --------------------------------------------------------------------------

def default_model(model, fdesign, lay: Layout, n_rows: int, notes: list):
    """(model, spec): the user's model, else every alias chain of a fraction, else full.

    One run per cell (and no block) leaves the highest interaction out as the
    error term; a two-level design is judged by Lenth's method instead.
    """
    from benchharness.analysis import fraction as fr
    from benchharness.analysis.cells import index_cells

    if model is not None:
        return model, model
    if fdesign is not None and fdesign.is_fraction:
        return fr.chain_order(fdesign), "every alias chain"
    if fdesign is not None:
        return fr.chain_order(fdesign), "full"
    fc = index_cells(lay.codes[: lay.nf], lay.sizes[: lay.nf])
    if lay.nf >= 2 and fc.count == n_rows and lay.block_index is None:
        notes.append("one run per cell: the " + ":".join(lay.fnames) + " interaction is "
                     "left out of the model and serves as the error term (add "
                     "replicates to test it, or --model full to fit it without tests)")
        return lay.nf - 1, lay.nf - 1
    return "full", "full"


def model_setup(lay: Layout, prep, model, fdesign, notes: list) -> Setup:
    """The terms to fit (the default model, a fraction's chains, the size limit) and cells."""
    from benchharness.analysis import fraction as fr
    from benchharness.analysis import incomplete as inc
    from benchharness.analysis.cells import index_cells
    from benchharness.analysis.model import limit_terms, model_terms

    n_rows = len(prep.y)
    model, spec = default_model(model, fdesign, lay, n_rows, notes)
    terms = model_terms(lay.names, model, lay.block_index)
    aliased_out = []
    if fdesign is not None:
        terms, aliased_out = fr.chain_terms(terms, lay.names, fdesign)
    cells = index_cells(lay.codes, lay.sizes)
    fcells = cells if lay.block_index is None else index_cells(lay.codes[: lay.block_index],
                                                                lay.sizes[: lay.block_index])
    nested = None if fdesign is not None else inc.find_nesting(lay.fnames, lay.flevels,
                                                               fcells.levels, prep.experiment)
    terms = inc.nest_terms(terms, lay.names, nested or {})   # "level within codec"
    limit = limit_terms(terms, lay.sizes, cells.count, n_rows)   # cost follows what is estimable
    if limit.message:
        terms = limit.terms
        notes.append(limit.message)
        model = limit.order
    n_cells = np.bincount(cells.row_cell, minlength=cells.count).astype(float)
    return Setup(model=model, spec=str(spec), terms=terms, aliased_out=aliased_out,
                 cells=cells, fcells=fcells, limit=limit, n_cells=n_cells, nested=nested or {})


# ---- the scale --------------------------------------------------------------------------

def choose_scale(prep, lay: Layout, setup: Setup, transform, ss_type, alpha) -> Scale:
    """The analysis scale by the scale rule (transform.choose), with the Box-Cox evidence."""
    from benchharness.analysis import diagnostics as dg
    from benchharness.analysis import transform as tr
    from benchharness.analysis.cells import moments
    from benchharness.analysis.model import ZERO_SPREAD

    y, cells = prep.y, setup.cells
    N = len(y)
    constant = bool(N and float(np.ptp(y)) <= ZERO_SPREAD * float(np.max(np.abs(y))))
    ymom = moments(cells.row_cell, y, cells.count, n=setup.n_cells)
    within_zero = bool(float(ymom.ss_within.sum())
                       <= ZERO_SPREAD**2 * float((ymom.n * ymom.mean**2).sum()))
    positive = bool(np.all(y > 0))
    boxcox, profile, why = None, None, ""
    if positive:  # the Box-Cox profile is evidence on every scale (transform.py)
        boxcox, why = boxcox_profile(y, lay, setup, constant, within_zero)
        if boxcox is not None:
            profile = boxcox.profile(alpha=0.05)
    unit = tr.unit_of_response(prep.response, prep.experiment)
    choice = tr.choose(transform, profile, positive, why, tr.ratio_scaled(unit),
                       log_check=lambda: dg.scale_check(np.log(y), cells, setup.fcells,
                                                        setup.terms, ss_type, alpha))
    return Scale(choice=choice, tdict=tr.describe(choice, profile, transform, unit),
                 boxcox=boxcox, constant=constant, within_zero=within_zero)


def boxcox_profile(y, lay: Layout, setup: Setup, constant: bool, within_zero: bool):
    """(BoxCoxProfile, "") for the model's cell basis, or (None, why it cannot be had)."""
    from benchharness.analysis import transform as tr
    from benchharness.analysis.model import design, term_basis

    cells = setup.cells
    X, _ = design(cells.levels, setup.terms, lay.sizes)
    B = term_basis(X * np.sqrt(setup.n_cells)[:, None])
    df_res = len(y) - B.shape[1]
    if df_res <= 0:
        return None, "no residual degrees of freedom"
    if constant:
        return None, "all responses are equal"
    if within_zero and B.shape[1] >= cells.count:
        return None, "every run in a cell gave the same value"
    return tr.BoxCoxProfile(y, cells.row_cell, setup.n_cells,
                            None if B.shape[1] >= cells.count else B, df=df_res), ""


# ---- the fit and its table --------------------------------------------------------------

def fit_on_scale(prep, setup: Setup, scale: Scale, ss_type, notes: list) -> Fitted:
    """Least squares on the chosen scale; zero variation is stated, never tested."""
    from benchharness.analysis import incomplete as inc
    from benchharness.analysis import transform as tr
    from benchharness.analysis.cells import moments
    from benchharness.analysis.model import fit_model

    y, N = prep.y, len(prep.y)
    z = tr.forward(y, scale.choice)
    mom = moments(setup.cells.row_cell, z, setup.cells.count, n=setup.n_cells)
    fit = fit_model(setup.cells, mom, setup.terms, ss_type)
    notes += fit.notes
    if inc.is_incomplete(prep.experiment, setup.nested):
        fit = inc.attach_support(fit, setup.fcells.levels, setup.nested, len(prep.levels))
    grand = float((mom.n * mom.mean).sum() / N)
    ss_total = float(mom.ss_within.sum() + (mom.n * (mom.mean - grand) ** 2).sum())
    no_variation = None
    if scale.constant or fit.exact:
        # zero variance is a finding of its own, never an F test on round-off
        value = f"{float(y[0]):.6g}"
        if scale.constant:
            no_variation = {"kind": "constant", "statement": (
                f"Every run gave the same {prep.response} ({value}): no factor changed it in "
                "these runs, and with no variation there is nothing to test (no F tests)")}
        else:
            no_variation = {"kind": "within cells", "statement": (
                f"Every run in a cell gave the same {prep.response}: there is no run-to-run "
                "variation, so no F tests (they need an error term); the differences between "
                "cells are shown as measured, untested")}
        notes.append(no_variation["statement"])
    return Fitted(z=z, fit=fit, ss_total=ss_total, no_variation=no_variation)


def anova_table(fitted: Fitted):
    """(rows of analysis.json's ``anova``, {term: p}); the Residual row last."""
    from benchharness.analysis import dist as stats
    from benchharness.analysis import effects as ef

    fit, no_variation = fitted.fit, fitted.no_variation
    df_res, mse = fit.df_resid, fit.mse
    rows, anova_p = [], {}
    for row in fit.table:
        ms = row.sum_sq / row.df if row.df > 0 else float("nan")
        F = p = None
        if df_res > 0 and row.df > 0 and mse > 0 and math.isfinite(ms):
            F = ms / mse
            p = float(stats.f.sf(F, row.df, df_res))
            anova_p[row.term] = p
        peta, omega = ef.effect_sizes(row.sum_sq, row.df, fit.rss, fitted.ss_total, mse)
        if df_res <= 0 or no_variation:  # no error estimate: SS/(SS + 0) = 1 says nothing
            peta = omega = None
        rows.append({"term": row.term, "df": row.df, "sum_sq": row.sum_sq,
                     "mean_sq": ms, "F": F, "p": p, "partial_eta_sq": peta,
                     "omega_sq": omega, "kind": "block" if row.is_block else "effect",
                     "df_full": row.df_full, "note": row.note,
                     "aliases": list(row.aliases)})
    tested = df_res > 0 and not no_variation
    rows.append({"term": "Residual", "df": df_res,
                 "sum_sq": fit.rss if tested else 0.0,
                 "mean_sq": mse if tested else None,
                 "F": None, "p": None,   # (0.0 above: round-off only)
                 "partial_eta_sq": None, "omega_sq": None, "kind": "residual"})
    return rows, anova_p


def attach_fraction(fdesign, lay: Layout, prep, fitted: Fitted, scale: Scale, setup: Setup,
                    alpha, anova_rows, anova_p: dict, notes: list):
    """A two-level fraction's alias-chain table; its Lenth p-values join ``anova_p``."""
    from benchharness.analysis import fraction as fr

    if fdesign is None:
        return None
    fraction, fnotes = fr.attach(fdesign, lay.codes[: lay.nf], fitted.z, scale.choice.name,
                                 alpha, anova_rows, setup.terms, lay.names,
                                 fitted.fit.df_resid,
                                 prep.block_codes if prep.block is not None else None,
                                 prep.response)
    notes += fnotes
    if setup.aliased_out:
        notes.append("terms aliased with an estimated chain are named in its chain, not "
                     "fitted: " + ", ".join(t for t, _ in setup.aliased_out))
    for r in anova_rows:
        if r.get("p") is not None and r.get("test"):
            anova_p[r["term"]] = r["p"]
    return fraction


def holm_over_terms(anova_rows, anova_p: dict) -> dict:
    """Holm over the effect terms of the table: the terms the findings state.

    An ANOVA of many terms tests many hypotheses (Cramer et al. 2016, Psychon.
    Bull. Rev. 23:640); each effect row gets ``p_holm`` (Holm 1979).
    """
    from benchharness.analysis.comparisons import adjust_p

    eff_terms = [r["term"] for r in anova_rows
                 if r.get("kind") == "effect" and r["term"] in anova_p]
    adj = adjust_p([anova_p[t] for t in eff_terms], "holm")
    holm = {t: float(a) for t, a in zip(eff_terms, adj)}
    for r in anova_rows:
        if r["term"] in holm:
            r["p_holm"] = holm[r["term"]]
    return holm


def host_check(prep, fitted: Fitted, model, ss_type, alpha, notes: list):
    """Hosts as blocks: do they differ beyond the blocks within them? (analysis.hosts)."""
    from benchharness.analysis.hosts import host_split

    hosts = host_split(prep, fitted.z, model, ss_type, fitted.fit, alpha)
    if hosts and hosts["differ"]:
        notes.append("hosts differ significantly (F test of hosts against blocks within "
                     f"hosts, p {hosts['between_hosts']['p']:.3g}); the block term keeps this "
                     "out of the factor effects, but the hosts are not interchangeable")
    return hosts


def coverage_notes(lay: Layout, fcells, fdesign, fraction, df_res, anova_rows,
                   notes: list) -> int:
    """Say which cells have no runs and what an error term is missing; the cells expected."""
    expected_cells = math.prod(lay.sizes[f] for f in lay.factor_idx)
    if fcells.count < expected_cells:
        if fdesign is not None and fcells.count == fdesign.n_cells:
            notes.append(f"a two-level fraction {fraction['design'] if fraction else ''}: "
                         f"{fdesign.n_cells} of {expected_cells} cells, defining relation "
                         f"{fdesign.defining_relation_text()}; effects aliased with each other "
                         "are estimated together and named by their alias chain")
        else:
            missing = missing_cells(fcells, lay.sizes[: lay.nf], lay.fnames, lay.flevels)
            shown = "; ".join(", ".join(f"{k}={v}" for k, v in m.items()) for m in missing[:5])
            more = f" and {len(missing) - 5} more" if len(missing) > 5 else ""
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
    return expected_cells


def missing_cells(fcells, sizes, names, levels):
    """Up to 1,001 factor cells with no analysed run, as {factor: level}."""
    from itertools import product

    present = {tuple(r) for r in fcells.levels.tolist()}
    out = []
    for combo in product(*[range(k) for k in sizes]):
        if combo not in present:
            out.append({names[j]: levels[j][c] for j, c in enumerate(combo)})
            if len(out) > 1000:
                break
    return out


# ---- residual checks --------------------------------------------------------------------

def diagnose(prep, lay: Layout, setup: Setup, fitted: Fitted, scale: Scale, hosts, alpha):
    """(diagnostics dict, studentized residuals or None): the assumptions, checked."""
    from benchharness.analysis import diagnostics as dg
    from benchharness.analysis.cells import moments

    fit, fcells = fitted.fit, setup.fcells
    diagnostics: dict[str, Any] = {}
    if hosts is not None:
        diagnostics["hosts"] = hosts
    studentized = None
    if fit.df_resid > 0 and not fitted.no_variation:
        studentized = _residual_checks(diagnostics, prep, setup, fitted, scale, alpha)
    else:
        skipped = {"verdict": "not checked: " + ("no variation between runs"
                                                 if fitted.no_variation
                                                 else "no residual degrees of freedom")}
        diagnostics.update(normality=dict(skipped, test=None, statistic=None, p=None),
                           equal_variance=dict(skipped, test=None, statistic=None, p=None),
                           outliers=[], drift=dict(skipped, slope_per_100_runs=None, p=None),
                           outlier_verdict=skipped["verdict"])
    fmom = moments(fcells.row_cell, fitted.z, fcells.count)
    diagnostics["small_cells"] = dg.small_cells(
        fmom.n, fmom.ss_within, lambda c: {lay.fnames[j]: lay.flevels[j][fcells.levels[c, j]]
                                           for j in range(lay.nf)})
    if fitted.no_variation:    # zero spread everywhere is the finding itself, not a cell's
        diagnostics["small_cells"] = [c for c in diagnostics["small_cells"] if c["n"] < 2]
    assumptions_ok = (diagnostics["normality"].get("ok", True)
                      and diagnostics["equal_variance"].get("ok", True))
    diagnostics["assumptions_ok"] = bool(assumptions_ok)
    return diagnostics, studentized


def _residual_checks(diagnostics: dict, prep, setup: Setup, fitted: Fitted, scale: Scale,
                     alpha):
    """Normality, equal variances, outliers, drift and load into ``diagnostics``;
    returns the studentized residuals (None when df < 2)."""
    from benchharness.analysis import diagnostics as dg

    fit, cells, fcells = fitted.fit, setup.cells, setup.fcells
    resid = fitted.z - fit.fitted[cells.row_cell]
    lev_rows = fit.leverage[cells.row_cell]
    scale_f = np.sqrt(np.clip(1.0 - lev_rows, 0.0, None))
    use = scale_f > 1e-8
    diagnostics["normality"] = dg.normality(resid[use] / scale_f[use], alpha)
    diagnostics["equal_variance"] = dg.brown_forsythe(fcells.row_cell, resid, fcells.count,
                                                      alpha)
    out = dg.outliers(resid, lev_rows, fit.rss, fit.df_resid, prep.run, alpha)
    studentized = out.pop("studentized", None)  # absent when df < 2
    diagnostics["outliers"] = out["runs"]
    diagnostics["outlier_cutoff"] = out["cutoff"]
    diagnostics["outlier_count"] = out["count"]
    diagnostics["outlier_verdict"] = out["verdict"]
    diagnostics["drift"] = dg.drift(resid, prep.position, percent_unit(scale.choice, prep.y),
                                    alpha)
    if "load_1m" in prep.extra:
        diagnostics["load"] = load_check(resid, prep.extra["load_1m"], alpha)
    return studentized


def percent_unit(choice, y) -> float:
    """Percent of the typical response per unit of the analysis scale (for the drift)."""
    if choice.name == "log":
        return 100.0
    if choice.name == "none":
        mean_y = float(np.mean(y))
        return 100.0 / mean_y if mean_y else float("nan")
    return 100.0 * math.exp(-choice.lam * float(np.mean(np.log(y))))


def load_check(resid, load, alpha):
    """Do residuals follow the machine's load? (Spearman; ``benchharness.analysis.load_check``)."""
    from benchharness.analysis.load_check import load_correlation

    out = load_correlation(resid, load, alpha=alpha)
    return {"test": "spearman", "statistic": out.get("rho"), "p": out.get("p"),
            "n": out.get("n"), "relation": out.get("verdict"), "verdict": out.get("message"),
            "ok": out.get("verdict") != "related"}


def cross_check(art, assumptions_ok, lay: Layout, setup: Setup, fitted: Fitted, scale: Scale,
                ss_type, alpha, anova_p, notes: list):
    """The rank-based cross-check (aligned rank transform, Wobbrock et al. 2011), when due."""
    from benchharness.analysis.art import art_anova

    N = len(fitted.z)
    run_art = (art is True) or (art == "auto" and not assumptions_ok and N <= ART_AUTO_MAX_ROWS)
    if run_art and setup.nested:
        notes.append("the rank-based cross-check aligns crossed effects only; with a nested "
                     "factor it is not run")
        return None
    if run_art and fitted.fit.df_resid > 0 and not fitted.no_variation:
        rows = art_anova(lay.codes, lay.sizes, fitted.z, setup.terms, ss_type, alpha, anova_p,
                         fitted.fit.fitted[setup.cells.row_cell])
        disagree = [r["term"] for r in rows if r["agrees"] is False]
        if disagree:
            notes.append("the rank-based cross-check disagrees for " + ", ".join(disagree)
                         + "; treat those F tests with caution")
        return {"reason": "requested" if art is True else
                "assumptions fail on the analysis scale", "scale": scale.choice.name,
                "terms": rows}
    if art == "auto" and not assumptions_ok and N > ART_AUTO_MAX_ROWS:
        notes.append(f"assumptions fail, but with more than {ART_AUTO_MAX_ROWS:,} rows the "
                     "rank-based cross-check runs only on request (--art)")
    return None


def incomplete_part(setup: Setup, lay: Layout, prep, fit, anova_rows, refs, scale: Scale,
                    alpha, effects, notes: list):
    """(analysis.json's ``incomplete`` or None, the effects): for cells missing by design or
    a nested factor, what is estimable, and a nested factor's ratios within its parent in
    place of its undefined overall ones (analysis.incomplete)."""
    from benchharness.analysis import incomplete as inc

    if fit.support is None:
        return None, effects
    d = inc.describe(lay, fit, setup.fcells, setup.nested, anova_rows, prep.experiment, alpha)
    nested_terms = [t for t in setup.terms if t.parts is not None]
    notes[:] = inc.clean_notes(notes, anova_rows, nested_terms)
    d["terms"] = inc.nested_term_states(d["terms"], nested_terms, setup.nested,
                                        fit.support.cells, lay.sizes)
    if setup.nested or d["cells_planned"] == setup.fcells.count:   # missing by design
        notes[:] = [n for n in notes if "cells have no ok runs" not in n]
    notes.extend(d["statements"])
    within = inc.within_ratios(fit, lay, setup.nested, refs, scale.choice, alpha)
    d["within_ratios"] = within
    shown = [dict(e, factor=f"{e['factor']} within "
                  + ", ".join(f"{k}={v}" for k, v in e["within"].items()), nested=e["factor"])
             for e in within]
    nested_names = {lay.fnames[f] for f in setup.nested}
    effects = [e for e in effects if e["factor"] not in nested_names] + shown
    return d, inc.mark_partial_effects(effects, fit, lay, setup.nested)


# ---- effects and comparisons ------------------------------------------------------------

def parse_reference(reference, names, levels):
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


def interval_fit(fit, fraction, anova_rows):
    """(fit for the intervals, whether it is Lenth's): an unreplicated fraction's intervals
    come from Lenth's (1989) pseudo standard error."""
    from benchharness.analysis import fraction as fr

    lenth = bool(fraction and fraction.get("lenth") and fit.df_resid <= 0
                 and any(r.get("test") for r in anova_rows))
    return (fr.lenth_fit(fit, fraction) if lenth else fit), lenth


def estimates(fit, lay: Layout, refs, choice, alpha):
    """(estimated marginal means, level ratios against the references)."""
    from benchharness.analysis import effects as ef

    means = ef.marginal_means(fit, lay.names, lay.levels, choice, alpha)
    effects = ef.level_ratios(fit, lay.names, lay.levels, lay.factor_idx, refs, choice, alpha)
    return means, effects


def default_comparisons(methods, fit, lay: Layout, refs, choice, alpha, adjust, anova_p,
                        anova_p_holm, lenth: bool) -> list:
    """Tukey HSD, pairwise and simple effects as ``methods`` asks (None: none)."""
    from benchharness.analysis import comparisons as cmp

    if methods is None:
        return []
    names, levels, factor_idx = lay.names, lay.levels, lay.factor_idx
    tk_idx = factor_idx
    if methods == "default":
        tk_idx = tukey_factors(fit, anova_p_holm, alpha, factor_idx)
    if lenth:
        tk_idx = []   # two levels each: the level ratio is the comparison
    comps = []
    if methods == "default" or "tukey" in methods:
        comps += cmp.tukey(fit, names, levels, tk_idx, choice, alpha, refs)
    if methods != "default" and "pairwise" in methods:
        comps += cmp.pairwise(fit, names, levels, factor_idx, choice, alpha, adjust, refs)
    if methods == "default" or "simple" in methods:
        comps += cmp.simple_effects(fit, names, levels,
                                    anova_p_holm if methods == "default" else anova_p,
                                    choice, alpha, adjust, refs)
    return comps


def tukey_factors(fit, anova_p, alpha, factor_idx):
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


def declared_comparisons(compare, methods, prep, fit, lay: Layout, choice, alpha,
                         adjust) -> list:
    """The comparisons given, else the experiment's ``compare:`` section (errors at its line)."""
    from benchharness.analysis import comparisons as cmp

    node = None
    if methods is None:
        compare = []
    elif compare is None:
        compare, node = declared_from_experiment(prep.experiment)
    try:
        items = cmp.parse_declared(compare, lay.fnames, lay.flevels)
    except UsageError as exc:
        if node is None:
            raise
        from benchharness.experiment.yamlnodes import node_error

        k = getattr(exc, "item", None)
        raise node_error(_item_node(node, k) if k else node, str(exc),
                         getattr(prep.experiment, "path", None)) from None
    return cmp.declared(fit, lay.names, lay.levels, items, choice, alpha, adjust)


def declared_from_experiment(exp):
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


# ---- failures, the summary and the best setting -----------------------------------------

def failures_of(prep, notes: list) -> dict:
    """Runs that did not finish, per cell; cells with timeouts are named (biased low)."""
    sc = prep.status_counts
    flagged = [c for c in sc if c["flag"]]
    lost = sum(c["runs"] - c["ok"] for c in sc)
    from benchharness.numbers import plural

    if flagged:
        notes.append(f"{plural(len(flagged), 'cell')} had timeouts: their means describe only "
                     "the runs that finished and so look faster than the configuration is")
    return {
        "runs": sum(c["runs"] for c in sc), "not_ok": lost,
        "cells": [c for c in sc if c["runs"] > c["ok"]],
        "cells_with_timeouts": [c["levels"] for c in flagged],
        "verdict": ("every run finished" if lost == 0 else
                    f"{plural(lost, 'run')} did not finish; means of cells with timeouts are "
                    "biased low (only the runs that finished are analysed)" if flagged else
                    f"{plural(lost, 'run')} failed; the failure rate per cell is listed"),
    }


def surface_cell_model(prep, model, notes: list):
    """A response surface's cell table: main effects by default (its few points leave
    interactions of the values-as-labels inestimable; the surface fit has the curvature
    and the interaction)."""
    if model is not None or prep.experiment is None:
        return model
    from benchharness.design.spec import design_of

    if design_of(prep.experiment).surface is None:
        return model
    notes.append("a response-surface design: the cell table treats the values as labels and "
                 "fits main effects only; the second-order fit (surface) is the analysis of "
                 "the settings as quantities")
    return "main"


def surface_fit(prep, lay: Layout, fitted: Fitted, scale: Scale, alpha, better, notes: list):
    """A response-surface design's second-order fit (analysis/surface.py), or None; its
    unrun combinations of setting values are by plan, not missing."""
    from benchharness.analysis.surface import from_analysis

    surface = from_analysis(prep, lay.fnames, lay.flevels, lay.codes[: lay.nf], fitted.z,
                            scale.choice, alpha, better)
    if surface is not None:
        expected = math.prod(lay.sizes[f] for f in lay.factor_idx)
        notes[:] = [n for n in notes if f"of {expected} cells have no ok runs" not in n]
        notes.append(f"a response-surface design: {lay.nf} settings run at "
                     f"{surface.get('lack_of_fit', {}).get('points', '?')} of the {expected} "
                     "combinations of their values, by plan; the second-order fit "
                     "(surface) uses every run, the cell table only the cells run")
    return surface


#: most cells with no runs that ``counts["missing_cells"]`` lists
MISSING_LISTED = 20


def counts_of(prep, setup: Setup, fdesign, expected_cells, df_res, surface=None,
              lay: Layout | None = None) -> dict:
    """analysis.json's ``counts``; ``missing_cells`` lists (up to `MISSING_LISTED`) the
    combinations of a full factorial with no analysed runs, when they are missing by
    accident (not a fraction's, an exclusion's or a response surface's by plan)."""
    from benchharness.analysis.incomplete import planned_cells

    planned = planned_cells(prep.experiment, prep.factors)   # exclude: / only_when:
    if planned is None and setup.nested:    # a table with a nested factor: its cells are
        planned = setup.fcells.count        # what its design can have, as far as is known
    if fdesign is not None:
        planned = fdesign.n_cells
    if surface is not None and surface.get("fitted"):
        planned = surface["lack_of_fit"]["points"]     # the design's distinct points
    missing = []
    if lay is not None and planned is None and setup.fcells.count < expected_cells:
        missing = missing_cells(setup.fcells, lay.sizes[: lay.nf], lay.fnames,
                                lay.flevels)[:MISSING_LISTED]
    return {"rows": len(prep.y), "cells": setup.fcells.count, "cells_expected": expected_cells,
            **({"cells_planned": planned} if planned is not None else {}),
            **({"missing_cells": missing} if missing else {}),
            "model_cells": setup.cells.count, "df_resid": df_res,
            "level_order": prep.order_source}


def model_dict(setup: Setup, fitted: Fitted, ss_type, alpha, adjust, refs, lay: Layout) -> dict:
    """analysis.json's ``model``: the terms fitted and how."""
    fit, limit = fitted.fit, setup.limit
    tested = fit.df_resid > 0 and not fitted.no_variation
    return {"spec": setup.spec, "terms": [t.name for t in setup.terms],
            "ss_type": fit.ss_type, "ss_type_requested": ss_type, "alpha": alpha,
            "adjust": adjust, "rank": fit.rank, "mse": fit.mse if tested else None,
            "no_variation": fitted.no_variation,
            "limited": ({"reason": limit.reason, "order": limit.order,
                         "parameters_requested": limit.requested,
                         "parameters_fitted": limit.fitted, "message": limit.message}
                        if limit.message else None),
            "references": {lay.fnames[i]: lay.flevels[i][j] for i, j in refs.items()}}


def roles_of(experiment, names, levels) -> dict:
    """Each factor's role: declared in the experiment file, else guessed (experiment.roles)."""
    from benchharness.experiment.roles import factor_roles

    return factor_roles(experiment, factors=list(names),
                        levels={f: list(lv) for f, lv in zip(names, levels)}).to_dict()


def numeric_trends(prep, alpha, anova_rows, roles, better):
    """The trend over every numeric factor, and scaling over parallel ones (numeric.py)."""
    from benchharness.analysis.numeric import trends

    return trends(prep, alpha, anova_rows, roles, better)


def setting_factors(roles: dict | None, fnames) -> list[int]:
    """Indices of the factors a recommendation chooses: the settings (experiment.roles).

    Workloads and environments are averaged over, so the best cell is a setting
    that holds up across them; without any setting every factor counts.
    """
    settings = set((roles or {}).get("setting") or [])
    idx = [i for i, f in enumerate(fnames) if f in settings]
    return idx or list(range(len(fnames)))


def best_setting(fit, lay: Layout, prep, roles, fdesign, scale: Scale, alpha, better):
    """The best cell or tied set of the settings (findings.best_cells), or None."""
    from benchharness.analysis import findings as fd

    if not lay.nf or scale.constant:     # every cell equal: nothing to choose between
        return None
    setting = setting_factors(roles, lay.fnames)
    from benchharness.analysis.numeric import response_surface

    ran = None
    if response_surface(prep.experiment):
        # a response surface runs a few of its values' combinations: choose among those
        ran = {tuple(int(lay.codes[f][i]) for f in setting) for i in range(len(prep.y))}
    best = fd.best_cells(fit, lay.names, lay.levels, setting, scale.choice, alpha, better,
                         prep.response, ran=ran)
    if best is None:
        return None
    if fdesign is not None and fdesign.is_fraction:
        # A fraction: a cell that did not run has a mean predicted from the alias
        # chains (as if each acts through its first-named member); say so.
        flevels, codes = lay.flevels, lay.codes
        ran = {tuple(flevels[f][int(codes[f][i])] for f in setting)
               for i in range(len(prep.y))}
        best["not_run"] = [j for j, c in enumerate(best["cells"])
                           if tuple(c["levels"][lay.fnames[f]] for f in setting) not in ran]
    best["unit"] = (scale.tdict or {}).get("unit")   # a metric's declared unit, if any
    best["averaged_over"] = [f for f in lay.fnames if f not in best["factors"]]
    best["roles_source"] = roles.get("source")
    return best
