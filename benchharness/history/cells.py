"""Per-cell summaries of one results folder: the numbers the history keeps.

Owns: grouping the timed runs (status ``ok``) of a results folder by cell and
summarising one response per cell as the mean of its logarithm (reported back
as the geometric mean), the standard deviation of the logs (the run-to-run
noise, a relative spread: 0.02 is about 2 %), the standard error and a
Student-t confidence interval mapped back to the original scale. Timings are
right-skewed and multiplicative effects are the norm (common practice), which is
why the log scale is the default for positive, ratio-scaled responses — the same
scale the analysis records for the response; a response with any value <= 0, a
unit that is a difference, or another recorded scale is summarised on its own
scale (arithmetic mean, SD, t interval) instead, and the row says so.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass

from benchharness.errors import DataError


def cell_key(levels: dict[str, str]) -> str:
    """Canonical JSON of a cell's levels: keys sorted, no spaces, text kept exact."""
    return json.dumps({str(k): str(v) for k, v in levels.items()}, sort_keys=True,
                      separators=(",", ":"), ensure_ascii=False)


@dataclass(frozen=True)
class CellSummary:
    levels: dict               # factor -> level label, in experiment factor order
    key: str                   # cell_key(levels)
    response: str
    scale: str                 # "log" or "linear"
    n: int
    center: float              # geometric mean (log scale) or arithmetic mean (linear)
    ci_low: float | None
    ci_high: float | None
    mean: float                # mean of log(response) or of the response
    se: float | None           # standard error of `mean`
    noise_sd: float | None     # SD of log(response) (or of the response on linear scale)
    conf_level: float


def summarize_cells(runs, factors, response: str = "wall_s", conf_level: float = 0.95,
                    level_order: dict | None = None, folder=None) -> list[CellSummary]:
    """Summaries of `response` per cell over the runs with status ``ok``.

    ``runs`` is a DataFrame shaped like runs.csv; ``factors`` the factor names.
    Cells in the order of ``level_order`` (factor -> labels as listed in the
    experiment) when given, else in order of first appearance. The scale is the
    one the analysis uses for the response (``benchharness.analysis.transform.
    scale_for``: what ``folder``'s analysis.json records, else log for a
    positive, ratio-scaled response); a Box-Cox scale is summarised as measured.
    """
    import numpy as np
    import pandas as pd
    from scipy import stats

    if response not in runs.columns:
        raise DataError(f"response `{response}` is not a column of the runs table "
                        f"(columns: {', '.join(map(str, runs.columns))})")
    ok = runs[runs["status"].astype(str) == "ok"]
    values = pd.to_numeric(ok[response], errors="coerce")
    ok = ok.assign(_y=values)
    ok = ok[np.isfinite(ok["_y"])]
    if ok.empty:
        return []
    from benchharness.analysis.transform import scale_for

    log_scale = scale_for(response, ok["_y"].to_numpy(dtype=float), folder)[0] == "log"
    ok = ok.assign(_x=np.log(ok["_y"]) if log_scale else ok["_y"])
    out: list[CellSummary] = []
    groups = (ok.groupby(list(factors), sort=False, dropna=False) if factors
              else [((), ok)])        # no factor left (all fixed by a selection): one cell
    for levels_tuple, grp in groups:
        if not isinstance(levels_tuple, tuple):
            levels_tuple = (levels_tuple,)
        levels = {f: str(v) for f, v in zip(factors, levels_tuple)}
        x = grp["_x"].to_numpy(dtype=float)
        n = len(x)
        m = float(x.mean())
        if n >= 2:
            sd = float(x.std(ddof=1))
            se = sd / math.sqrt(n)
            half = float(stats.t.ppf(0.5 + conf_level / 2, n - 1)) * se
            lo, hi = m - half, m + half
        else:
            sd = se = lo = hi = None
        back = math.exp if log_scale else (lambda v: v)
        out.append(CellSummary(
            levels=levels, key=cell_key(levels), response=response,
            scale="log" if log_scale else "linear", n=n, center=back(m),
            ci_low=None if lo is None else back(lo), ci_high=None if hi is None else back(hi),
            mean=m, se=se, noise_sd=sd, conf_level=conf_level))
    if level_order:
        def rank(c: CellSummary):
            return tuple(level_order[f].index(c.levels[f])
                         if c.levels[f] in level_order.get(f, [])
                         else len(level_order.get(f, [])) for f in factors)
        out.sort(key=rank)
    return out
