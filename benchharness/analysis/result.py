"""The result of an analysis: `Analysis`, plain data whose `to_dict` is analysis.json.

Besides what analysis.json holds, an `Analysis` carries the per-row arrays the
report's figures draw (residuals, fitted values, run ids, positions, the rows
analysed) and the Box-Cox profile likelihood, so that the report renders the
analysis and never fits the model again.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np


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
    #: cells missing by design, nested factors, what is estimable (analysis.incomplete)
    incomplete: dict | None = None
    #: a response-surface design: the second-order fit and its findings (analysis/surface.py)
    surface: dict | None = None
    #: numeric factors: log-log trend, lack of fit, contrasts, scaling (analysis/numeric.py)
    trends: list | None = None

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
            **({"incomplete": self.incomplete} if self.incomplete is not None else {}),
            **({"surface": self.surface} if self.surface is not None else {}),
            "roles": self.roles,
            "better": self.better,
            "best": self.best,
            "findings": list(self.findings),
            **({"trends": self.trends} if self.trends else {}),
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
