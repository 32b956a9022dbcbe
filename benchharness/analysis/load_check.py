"""Do the residuals of a model follow the machine's load?

Each run records the 1-minute load average when it started (``load_1m``).
If the residuals of the fitted model rise with load, other work on the
machine disturbed the timings and the effects may be blurred or biased.  The
test is Spearman's rank correlation (Spearman 1904) — rank-based, because
load is coarse and residual spread is skewed — with scipy's p-value.
"""

from __future__ import annotations

import math

ALPHA = 0.05


def load_correlation(residuals, load_1m, alpha: float = ALPHA) -> dict:
    """``{rho, p, n, verdict, message}``; pairs with a missing value are dropped.

    ``verdict`` is ``related`` (p < alpha), ``unrelated``, ``no variation``
    (load or residuals constant) or ``too few runs`` (n < 5).
    """
    import numpy as np
    from benchharness.analysis import dist as stats

    r = np.asarray(residuals, dtype=float)
    x = np.asarray(load_1m, dtype=float)
    if r.shape != x.shape:
        raise ValueError(f"residuals ({r.size}) and load ({x.size}) differ in length")
    keep = np.isfinite(r) & np.isfinite(x)
    r, x = r[keep], x[keep]
    n = int(r.size)
    base = {"rho": None, "p": None, "n": n, "alpha": alpha}
    if n < 5:
        return {**base, "verdict": "too few runs",
                "message": f"only {n} runs with a recorded load; no test"}
    if np.ptp(x) == 0 or np.ptp(r) == 0:
        return {**base, "verdict": "no variation",
                "message": "the load average did not vary between runs; no test"
                if np.ptp(x) == 0 else "the residuals do not vary; no test"}
    res = stats.spearmanr(r, x)
    rho, p = float(res.statistic), float(res.pvalue)
    if math.isnan(rho):
        return {**base, "verdict": "no variation", "message": "no test possible"}
    if p < alpha:
        direction = "rise" if rho > 0 else "fall"
        verdict = "related"
        msg = (f"residuals {direction} with the machine's load (Spearman rho {rho:.2f}, "
               f"p = {p:.3g}, {n} runs): other work disturbed the timings; rerun on a quieter "
               "machine or add load as a blocking factor")
    else:
        verdict = "unrelated"
        msg = (f"no evidence that load affected the residuals (Spearman rho {rho:.2f}, "
               f"p = {p:.3g}, {n} runs)")
    return {"rho": rho, "p": p, "n": n, "alpha": alpha, "verdict": verdict, "message": msg}


def load_check(analysis, runs, alpha: float = ALPHA) -> dict:
    """`load_correlation` for a fitted analysis and its runs table.

    ``analysis`` is a `benchharness.analysis.Analysis` (its ``residuals`` and
    ``run`` ids per analysed row); ``runs`` the runs table with ``run`` and
    ``load_1m`` columns. Residuals are on the analysis scale (log for times),
    which is where the model's noise assumption lives.
    """
    import numpy as np

    base = {"rho": None, "p": None, "n": 0, "alpha": alpha}
    if runs is None or "load_1m" not in getattr(runs, "columns", ()):
        return {**base, "verdict": "not recorded",
                "message": "the runs carry no load_1m column; load was not recorded"}
    resid = getattr(analysis, "residuals", None)
    run_ids = getattr(analysis, "run", None)
    if resid is None or run_ids is None:
        return {**base, "verdict": "not recorded",
                "message": "the analysis has no per-run residuals to compare with load"}
    import pandas as pd

    load_by_run = dict(zip(pd.to_numeric(runs["run"], errors="coerce"),
                           pd.to_numeric(runs["load_1m"], errors="coerce")))
    load = np.array([load_by_run.get(float(r), np.nan) for r in np.asarray(run_ids, float)])
    return load_correlation(np.asarray(resid, float), load, alpha)
