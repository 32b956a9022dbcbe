"""The analysis stage: a runs table analysed as a designed factorial experiment.

``analyze(data, ...) -> Analysis`` runs the named steps of ``steps``
(``run_analysis``), which chain the modules of this package, each with one job:

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

``result.Analysis.to_dict()`` is exactly the content of ``analysis.json``.
"""

from __future__ import annotations

from pathlib import Path

from benchharness.analysis.result import Analysis
from benchharness.analysis.steps import ART_AUTO_MAX_ROWS  # noqa: F401  (a public figure)

__all__ = ["analyze", "Analysis", "analyze_results_folder", "write_analysis_json",
           "format_analysis"]


def analyze(data, response: str | None = None, factors=None, block=None, transform="auto",
            model=None, ss_type: int = 2, alpha: float = 0.05, reference=None,
            adjust: str = "bonferroni", compare=None, art="auto",
            comparisons=True, better=None) -> "Analysis":
    """Analyse a runs table (DataFrame, tidy CSV path or results folder).

    ``response``: the column analysed; default (None) the experiment file's
    ``response:`` key, else ``wall_s`` (``experiment.response``).

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
    from benchharness.analysis.steps import run_analysis
    from benchharness.analysis.threads import one_thread

    kwargs = dict(response=response, factors=factors, block=block, transform=transform,
                  model=model, ss_type=ss_type, alpha=alpha, reference=reference,
                  adjust=adjust, compare=compare, art=art, comparisons=comparisons,
                  better=better)
    with one_thread():  # every BLAS copy held to one thread (threads.py)
        return run_analysis(data, **kwargs)


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
