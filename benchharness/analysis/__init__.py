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

``Analysis.to_dict()`` is exactly the content of ``analysis.json``.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np


__all__ = ["analyze", "Analysis", "analyze_results_folder", "write_analysis_json",
           "format_analysis"]

from benchharness.analysis.steps import ART_AUTO_MAX_ROWS  # noqa: E402,F401  (public figure)


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
    #: index of every analysed row in the table analysed (its ok rows with a value)
    rows: Any = field(default=None, repr=False, compare=False)
    #: the Box-Cox profile likelihood of the model (transform.BoxCoxProfile), if computed
    boxcox: Any = field(default=None, repr=False, compare=False)
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

    def profile_curve(self, points: int = 81):
        """(λ grid, log-likelihood) of the Box-Cox profile for the report's figure, or None.

        The grid spans [−2, 2], widened to half a unit past λ̂, the chosen λ and
        the interval; each point is one evaluation of the analysis' own profile
        likelihood (Box & Cox 1964), from cell statistics.
        """
        from benchharness.analysis.transform import profile_curve

        return profile_curve(self.boxcox, self.transform, points)

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
