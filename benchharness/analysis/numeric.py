"""The numeric-factor step of the analysis: a trend for every quantity, scaling for parallel ones.

Finds the quantities among the factors (`benchharness.experiment.quantities`:
levels that are all numbers, or declared in ``numeric:``), and for each adds
analysis.json's ``trends`` entry (`trend`: the log-log exponent, per level of
the other factors, lack of fit, polynomial contrasts, the figure's points) and,
for a parallelism setting, its ``scaling`` (`scaling`: speed-up, efficiency,
Amdahl's serial fraction).
"""

from __future__ import annotations

import numpy as np

from benchharness.analysis import trend as tn
from benchharness.analysis.scaling import scaling


#: more observed cells than this: the trend is not computed (it fits the cell-means model)
MAX_CELLS = 1000


def trends(prep, alpha: float, anova_rows, roles: dict | None = None,
           better: str = "lower") -> list[dict] | None:
    """The trend of every numeric factor of a prepared runs table, or None when none.

    ``anova_rows`` gives the other factors' importance (partial η²) for the
    figure's lines; ``roles`` marks which trends lead the headline (quantities
    that are workloads, parallel factors, and declared ones).
    """
    from benchharness.experiment.quantities import numeric_factors

    names = list(prep.factors)
    levels = {f: list(lv) for f, lv in zip(names, prep.levels)}
    quantities = numeric_factors(prep.experiment, names, levels)
    if not quantities or response_surface(prep.experiment):
        return None     # a response surface has its own second-order analysis
    y = np.asarray(prep.y, dtype=float)
    if not len(y) or not np.all(y > 0):
        return [{"factor": f, "skipped": "the log-log trend needs a positive response",
                 "source": q["source"]} for f, q in quantities.items()]
    cd = tn.cell_data(prep.codes, prep.block_codes, y)
    if len(cd.n) > MAX_CELLS:
        return [{"factor": f, "skipped": f"more than {MAX_CELLS:,} cells: the trend is fitted "
                 "only on smaller experiments", "source": q["source"]}
                for f, q in quantities.items()]
    return _fitted_trends(prep, cd, quantities, names, levels, alpha, anova_rows, roles,
                          better) or None


def _fitted_trends(prep, cd, quantities: dict, names, levels: dict, alpha: float, anova_rows,
                   roles: dict | None, better: str) -> list[dict]:
    """The trend (and, for a parallel factor, the scaling) of each quantity that varies
    over the observed cells ``cd``, its level codes replaced by labels."""
    sizes = [len(lv) for lv in prep.levels]
    sat = tn.saturated(cd)
    importance = {r["term"]: r.get("partial_eta_sq") for r in anova_rows or []}
    workloads = set((roles or {}).get("workload") or [])
    out = []
    for name, q in quantities.items():
        j = names.index(name)
        if len(np.unique(cd.codes[:, j])) < 2:
            continue
        if tn.confounded_with_block(cd, j, q["values"]):
            out.append({"factor": name, "source": q["source"], "skipped": (
                "each block ran one level of it, so its trend cannot be told apart from "
                "the differences between blocks")})
            continue
        t = tn.trend_of(cd, j, name, levels[name], q["values"], names, sizes, alpha, sat,
                        importance)
        t["source"] = q["source"]
        t["parallel"] = q["parallel"]
        t["headline"] = bool(q["parallel"] or q["source"] == "declared" or name in workloads)
        _label_levels(t, names, levels)
        if q["parallel"] and t["log_log"]:
            t["scaling"] = scaling(cd, j, q["values"], names, levels, sizes, alpha, sat,
                                   t["line_by"], better)
        out.append(t)
    return out


def response_surface(experiment) -> bool:
    """Whether the experiment file asks for a response-surface design (design/spec.py)."""
    if experiment is None or "design" not in (getattr(experiment, "sections", None) or {}):
        return False
    from benchharness.design.spec import design_of

    return design_of(experiment).surface is not None


def _label_levels(t: dict, names, levels) -> None:
    """Level codes in the result replaced by their labels (plain data for analysis.json)."""
    for by in t["by"]:
        labels = levels[by["factor"]]
        for s in by["slopes"]:
            s["level"] = labels[s["level"]]
    own = levels[t["factor"]]
    line = levels[t["line_by"]] if t["line_by"] else None
    for p in t["points"]:
        p["level"] = own[p["level"]]
        p["by"] = line[p["by"]] if line is not None and p["by"] is not None else None
