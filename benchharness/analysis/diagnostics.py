"""Residual diagnostics of the fitted model, each with a plain verdict.

Owns, on the analysis scale:

* normality of residuals: Shapiro-Wilk (Shapiro & Wilk 1965; scipy's
  implementation, valid up to 5,000 values) and beyond that Anderson-Darling
  (Anderson & Darling 1954) with the p-value approximation of D'Agostino &
  Stephens (1986, *Goodness-of-Fit Techniques*, table 4.9) for a normal with
  estimated mean and variance; residuals are scaled by 1/√(1−h) so that cells
  of different sizes are comparable;
* equal variances across cells: Brown-Forsythe (Brown & Forsythe 1974), the
  one-way ANOVA of absolute deviations from the cell median;
* outliers: externally studentized residuals against the Bonferroni cut-off
  t(1 − α/2N; df − 1) (Cook & Weisberg 1982, *Residuals and Influence in
  Regression*, §2.2);
* drift over the run order: least-squares slope of residuals on ``position``
  and the Wald-Wolfowitz runs test of residual signs (Wald & Wolfowitz 1940);
* cells with fewer than two runs or zero spread.

With many residuals every test rejects, and with few it rejects nothing, so
each verdict also weighs the size of the departure (skewness and excess
kurtosis, largest/smallest cell variance, drift in % per 100 runs). Each check
carries ``level``: ``ok`` (green), ``caution`` (a large departure the test
could not confirm, or a clustering of residual signs) or ``fail`` (the test
rejects and the departure is not small); ``ok`` is true only for ``ok``. A
departure above the "large" threshold — |skewness| above 1, largest/smallest
cell variance above 10×, drift above 5% per 100 runs — is never ``ok``,
whatever the p-value, and its verdict states the size. The thresholds are
common practice, stated in docs/analysis.md.
"""

from __future__ import annotations

import math

import numpy as np

SHAPIRO_MAX = 5000
#: common practice: |skewness| < 0.5 and |excess kurtosis| < 1 is a mild departure.
SKEW_MILD, KURT_MILD = 0.5, 1.0
#: common practice: largest/smallest cell variance below 3 is tolerable for F tests.
VAR_RATIO_MILD = 3.0
#: drift smaller than 1 % per 100 runs is treated as negligible.
DRIFT_MILD_PCT = 1.0
#: common practice: beyond these sizes a departure matters whatever a test's p-value says
#: (|skewness| above 1 is "highly skewed"; a variance ratio above 10 upsets F tests and
#: intervals of unbalanced comparisons; our threshold for drift).
SKEW_LARGE, VAR_RATIO_LARGE, DRIFT_LARGE_PCT = 1.0, 10.0, 5.0
#: our threshold: fewer than 80 % of the expected runs of residual signs is a clear clustering.
RUNS_MILD_SHARE = 0.8


def anderson_darling_p(a2: float, n: int) -> float:
    """p-value of A² for normality with estimated parameters (D'Agostino & Stephens 1986)."""
    a = a2 * (1.0 + 0.75 / n + 2.25 / n**2)
    if a >= 150.0:  # the fitted curve turns up past its minimum near 153; p is ~1e-190 here
        return 0.0
    if a >= 0.6:
        p = math.exp(1.2937 - 5.709 * a + 0.0186 * a * a)
    elif a >= 0.34:
        p = math.exp(0.9177 - 4.279 * a - 1.38 * a * a)
    elif a >= 0.2:
        p = 1.0 - math.exp(-8.318 + 42.796 * a - 59.938 * a * a)
    else:
        p = 1.0 - math.exp(-13.436 + 101.14 * a - 223.73 * a * a)
    return min(max(p, 0.0), 1.0)


def anderson_darling_stat(x: np.ndarray) -> float:
    from scipy.special import log_ndtr

    x = np.sort(np.asarray(x, dtype=float))
    n = len(x)
    z = (x - x.mean()) / x.std(ddof=1)
    logcdf = log_ndtr(z)
    logsf = log_ndtr(-z)
    i = np.arange(1, n + 1)
    return float(-n - np.sum((2 * i - 1) * (logcdf + logsf[::-1])) / n)


def normality(r: np.ndarray, alpha: float) -> dict:
    from benchharness.analysis import dist as stats

    n = len(r)
    if n < 3:
        return {"test": None, "statistic": None, "p": None, "n": n,
                "verdict": "too few residuals to judge normality", "ok": True}
    sd = r.std()
    if sd == 0:
        return {"test": None, "statistic": None, "p": None, "n": n,
                "verdict": "all residuals are zero; normality cannot be judged", "ok": True}
    zc = (r - r.mean()) / sd
    z2 = zc * zc
    skew = float(np.mean(z2 * zc))
    kurt = float(np.mean(z2 * z2) - 3.0)
    del zc, z2
    if n <= SHAPIRO_MAX:
        res = stats.shapiro(r)
        test, stat, p = "shapiro-wilk", float(res.statistic), float(res.pvalue)
    else:
        stat = anderson_darling_stat(r)
        test, p = "anderson-darling", anderson_darling_p(stat, n)
    size = f"skewness {skew:+.2f}, excess kurtosis {kurt:+.2f}"
    mild = abs(skew) < SKEW_MILD and abs(kurt) < KURT_MILD
    large = abs(skew) > SKEW_LARGE
    if p >= alpha and large:
        level = "caution"
        verdict = (f"residuals are strongly skewed (skewness {skew:+.2f}, beyond ±{SKEW_LARGE:g}; "
                   f"excess kurtosis {kurt:+.2f}), although the test does not reject with "
                   f"{n} residuals; another transform may suit, and the rank-based "
                   "cross-check is the safer guide")
    elif p >= alpha:
        level, verdict = "ok", f"consistent with a normal distribution ({size})"
    elif mild:
        level, verdict = "ok", (f"a departure from normal is detectable but small ({size}); "
                                "the F tests are robust to this")
    else:
        level = "fail"
        verdict = (f"residuals are clearly not normal ({size}); look at the outliers, try "
                   "another transform, and trust the rank-based cross-check where it "
                   "disagrees")
    return {"test": test, "statistic": stat, "p": p, "n": n, "skewness": skew,
            "excess_kurtosis": kurt, "size": _size(abs(skew), SKEW_MILD, SKEW_LARGE),
            "verdict": verdict, "level": level, "ok": level == "ok"}


def group_medians(row_group: np.ndarray, values: np.ndarray, count: int) -> np.ndarray:
    """Median of ``values`` within each group (one sort, no Python loop over rows)."""
    o1 = np.argsort(values)
    g = row_group[o1]
    if count < 32768:  # stable radix sort on small integers
        g = g.astype(np.int16)
    order = o1[np.argsort(g, kind="stable")]
    g_sorted = row_group[order]
    v_sorted = values[order]
    starts = np.searchsorted(g_sorted, np.arange(count), side="left")
    ends = np.searchsorted(g_sorted, np.arange(count), side="right")
    n = ends - starts
    med = np.full(count, np.nan)
    has = n > 0
    lo = starts + (n - 1) // 2
    hi = starts + n // 2
    med[has] = 0.5 * (v_sorted[lo[has]] + v_sorted[hi[has]])
    return med


def brown_forsythe(row_group, values, count, alpha: float) -> dict:
    """Median-centred Levene test across groups with at least two values."""
    from benchharness.analysis import dist as stats

    n = np.bincount(row_group, minlength=count).astype(float)
    use_g = n >= 2
    g = int(use_g.sum())
    if g < 2:
        return {"test": "brown-forsythe", "statistic": None, "p": None,
                "verdict": "fewer than two cells with two or more runs; not tested", "ok": True}
    med = group_medians(row_group, values, count)
    keep = use_g[row_group]
    rg = row_group[keep]
    z = np.abs(values[keep] - med[rg])
    N = len(z)
    zs = np.bincount(rg, weights=z, minlength=count)
    zbar_g = np.divide(zs, n, out=np.zeros(count), where=use_g)
    zbar = z.mean()
    between = float((n[use_g] * (zbar_g[use_g] - zbar) ** 2).sum())
    dev = z - zbar_g[rg]
    within = float(dev @ dev)
    df1, df2 = g - 1, N - g
    # size of the departure: ratio of largest to smallest cell variance (cells with spread;
    # cells without any are listed by `small_cells`)
    s1 = np.bincount(row_group, weights=values, minlength=count)
    s2 = np.bincount(row_group, weights=values * values, minlength=count)
    var = np.divide(s2 - s1 * s1 / np.maximum(n, 1), n - 1, out=np.full(count, np.nan),
                    where=use_g)
    var = var[use_g]
    var = var[var > 0]
    ratio = float(var.max() / var.min()) if len(var) >= 2 else float("nan")
    size = f"the largest cell variance is {ratio:.3g}× the smallest"
    runs = int(np.median(n[use_g]))
    if within <= 0 or df2 <= 0:
        why = ("with two runs per cell both deviations from the median are equal, so the "
               "test is degenerate" if n[use_g].max() <= 2 else "no spread within cells")
        if ratio > VAR_RATIO_LARGE:
            return {"test": "brown-forsythe", "statistic": None, "p": None,
                    "variance_ratio": ratio, "size": "large", "level": "caution", "ok": False,
                    "verdict": f"{size}, beyond {VAR_RATIO_LARGE:g}×; {why}, hence not tested; "
                               "comparisons between the noisiest cells deserve caution"}
        return {"test": "brown-forsythe", "statistic": None, "p": None,
                "variance_ratio": ratio if math.isfinite(ratio) else None,
                "verdict": f"{why}; not tested", "level": "ok", "ok": True}
    F = (between / df1) / (within / df2)
    p = float(stats.f.sf(F, df1, df2))
    if p >= alpha and ratio > VAR_RATIO_LARGE:
        level = "caution"
        verdict = (f"{size}, beyond {VAR_RATIO_LARGE:g}×; the test does not confirm unequal "
                   f"variances (with about {runs} runs per cell it has little power, and such "
                   "spreads also arise by chance), so comparisons between the noisiest cells "
                   "deserve caution")
    elif p >= alpha and ratio < VAR_RATIO_MILD:
        level, verdict = "ok", f"cell variances are consistent with being equal ({size})"
    elif p >= alpha:
        level, verdict = "ok", (f"no clear evidence of unequal variances, though {size}; with "
                                "few runs per cell the test has little power")
    elif ratio < VAR_RATIO_MILD:
        level, verdict = "ok", (f"unequal variances are detectable but small ({size}); "
                                "the F tests are robust to this")
    else:
        level = "fail"
        verdict = (f"cell variances differ a lot ({size}); a transform may even them out, "
                   "and comparisons between the noisiest cells deserve caution")
    return {"test": "brown-forsythe", "statistic": float(F), "p": p, "df": [df1, df2],
            "variance_ratio": ratio, "size": _size(ratio, VAR_RATIO_MILD, VAR_RATIO_LARGE),
            "verdict": verdict, "level": level, "ok": level == "ok"}


def outliers(r, leverage_rows, rss, df_resid, run_ids, alpha: float, limit: int = 50) -> dict:
    """Externally studentized residuals beyond the Bonferroni cut-off."""
    from benchharness.analysis import dist as stats

    n = len(r)
    if df_resid < 2:
        return {"cutoff": None, "count": 0, "runs": [],
                "verdict": "not enough residual degrees of freedom to look for outliers",
                "studentized": None}
    one_minus_h = 1.0 - leverage_rows
    ok = one_minus_h > 1e-12
    t = np.zeros(n)
    e2 = np.where(ok, r * r / np.where(ok, one_minus_h, 1.0), 0.0)
    s2_i = (rss - e2) / (df_resid - 1)
    good = ok & (s2_i > 0)
    t[good] = r[good] / np.sqrt(s2_i[good] * one_minus_h[good])
    cutoff = float(stats.t.ppf(1 - alpha / (2 * n), df_resid - 1))
    idx = np.flatnonzero(np.abs(t) > cutoff)
    idx = idx[np.argsort(-np.abs(t[idx]), kind="stable")]
    listed = [{"run": (int(run_ids[i]) if run_ids is not None else int(i)),
               "studentized": float(t[i])} for i in idx[:limit]]
    if len(idx) == 0:
        verdict = "no run stands out from its cell"
    else:
        who = ("1 run stands out from its cell" if len(idx) == 1 else
               f"{len(idx)} runs stand out from their cells")
        verdict = (f"{who} (studentized residuals beyond ±{cutoff:.2f}, the Bonferroni "
                   "cut-off); check them for interference (other load, a cold cache) before "
                   "trusting means")
    return {"cutoff": cutoff, "count": int(len(idx)), "runs": listed, "verdict": verdict,
            "studentized": t}


def runs_test(signs_in_order: np.ndarray) -> tuple[int, float | None, float | None]:
    """Wald-Wolfowitz runs test on a sequence of booleans; returns (runs, z, p)."""
    from benchharness.analysis import dist as stats

    s = np.asarray(signs_in_order, dtype=bool)
    n = len(s)
    n1 = int(s.sum())
    n2 = n - n1
    if n1 == 0 or n2 == 0:
        return (1 if n else 0), None, None
    runs = 1 + int(np.count_nonzero(s[1:] != s[:-1]))
    mu = 2.0 * n1 * n2 / n + 1.0
    var = 2.0 * n1 * n2 * (2.0 * n1 * n2 - n) / (n * n * (n - 1.0))
    if var <= 0:
        return runs, None, None
    z = (runs - mu) / math.sqrt(var)
    return runs, float(z), float(2 * stats.norm.sf(abs(z)))


def _order_slope(r, x):
    """Least-squares slope of the residuals ``r`` on the positions ``x``, its two-sided
    t-test p value and its standard error (Nones when every position is the same)."""
    from benchharness.analysis import dist as stats

    xc = x - x.mean()
    sxx = float(xc @ xc)
    n = len(r)
    if sxx == 0:
        return None, None, None
    rc = r - r.mean()
    slope = float(xc @ rc) / sxx
    resid = rc - slope * xc
    s2 = float(resid @ resid) / (n - 2)
    se = math.sqrt(s2 / sxx) if s2 > 0 else 0.0
    p = float(2 * stats.t.sf(abs(slope / se), n - 2)) if se > 0 else (0.0 if slope else 1.0)
    return slope, p, se


def _slope_verdict(pct: float, p: float, alpha: float, interval=None):
    """(level, verdict) of the slope: its size against the mild and large limits and its
    significance.

    A large slope that is not significant is a caution, and it is worded by its
    interval (``interval``: the slope's ``1 - alpha`` confidence interval in % per 100
    runs): the data hold both no drift and a drift beyond the limit, so the verdict
    says a drift that large cannot be ruled out, not that the response moves.
    """
    size = f"{_signed(pct)}% per 100 runs"
    level = "ok"
    if p >= alpha and abs(pct) > DRIFT_LARGE_PCT:
        from benchharness.numbers import fmt_confidence

        level = "caution"
        within = ""
        if interval is not None and all(map(math.isfinite, interval)):
            lo, hi = interval
            within = (f"; its {fmt_confidence(alpha)} interval, {_signed(lo)}% to {_signed(hi)}% "
                      "per 100 runs, holds both no drift and a larger one")
        verdict = (f"a drift beyond ±{DRIFT_LARGE_PCT:g}% per 100 runs cannot be ruled out: the "
                   f"slope over the run order, {size}, is not significant ({_p(p)}){within}. "
                   "More runs would tell; check for warm-up, throttling or background load "
                   "before trusting small effects")
    elif p >= alpha:
        verdict = f"no clear drift over the run order (slope {size}, not significant)"
    elif abs(pct) < DRIFT_MILD_PCT:
        verdict = f"a trend over the run order is detectable but small ({size})"
    else:
        level = "fail"
        verdict = (f"timings drift over the run order ({size}); the machine may be warming up or "
                   "throttling: add warm-up runs, use blocks, or check for background load")
    return level, verdict


def _runs_clause(nz, nruns, z, p_runs, alpha: float, level: str):
    """What the runs test of residual signs (in run order, zeros left out) adds to the
    verdict, and the level it leaves."""
    if p_runs is not None and p_runs < alpha and z is not None and z < 0:
        # Size of the clustering: observed runs of signs against the number expected.
        n1 = int(np.count_nonzero(nz > 0))
        expected = 2.0 * n1 * (len(nz) - n1) / len(nz) + 1.0
        share = nruns / expected
        text = (f"; residual signs cluster in time ({nruns} runs of signs where about "
                f"{expected:.0f} are expected; runs test p {p_runs:.2g}), so neighbouring "
                "runs are not independent and intervals may be too narrow")
        if share < RUNS_MILD_SHARE and level == "ok":
            level = "caution"
        return text, level
    if p_runs is not None and p_runs < alpha:
        return ("; residual signs alternate more often than chance (runs test p "
                f"{p_runs:.2g})"), level
    return "", level


def drift(r, position, pct_per_unit: float, alpha: float) -> dict:
    """Slope of residuals on run order (per 100 runs) and the runs test."""
    if position is None or len(r) < 3:
        return {"slope_per_100_runs": None, "percent_per_100_runs": None, "p": None,
                "runs_test": None, "verdict": "run order unknown; drift not checked"}
    x = np.asarray(position, dtype=float)
    slope, p, se = _order_slope(r, x)
    if slope is None:
        return {"slope_per_100_runs": None, "percent_per_100_runs": None, "p": None,
                "runs_test": None, "verdict": "all runs share one position; drift not checked"}
    order = np.argsort(x, kind="stable") if np.any(np.diff(x) < 0) else None
    ro = r if order is None else r[order]
    nz = ro[ro != 0]
    nruns, z, p_runs = runs_test(nz > 0)
    per100 = slope * 100.0
    pct = per100 * pct_per_unit
    interval = None
    if se > 0 and len(r) > 2:
        from benchharness.analysis import dist as stats

        half = float(stats.t.ppf(1 - alpha / 2, len(r) - 2)) * se * 100.0 * pct_per_unit
        interval = sorted((pct - half, pct + half))
    level, verdict = _slope_verdict(pct, p, alpha, interval)
    runs_info = {"runs": nruns, "z": z, "p": p_runs}
    clause, level = _runs_clause(nz, nruns, z, p_runs, alpha, level)
    verdict += clause
    return {"slope_per_100_runs": per100, "percent_per_100_runs": pct, "p": p,
            "runs_test": runs_info, "size": _size(abs(pct), DRIFT_MILD_PCT, DRIFT_LARGE_PCT),
            "verdict": verdict, "level": level, "ok": level == "ok"}


def _signed(x: float) -> str:
    """A signed number in three significant figures, as every output writes one
    (``numbers.fmt_num``): ``+92.8``, ``-3.46``."""
    from benchharness.numbers import fmt_num

    return ("+" if x > 0 else "") + fmt_num(x)


def _p(p: float) -> str:
    """A p-value in a sentence: ``p = 0.078``, ``p < 0.001`` (``numbers.fmt_p``)."""
    from benchharness.numbers import fmt_p_said

    return fmt_p_said(p)


def _size(x: float, mild: float, large: float) -> str:
    """small | moderate | large by the thresholds of a check."""
    if not math.isfinite(x):
        return "large"
    return "small" if x < mild else "large" if x > large else "moderate"


def scale_check(z, cells, fcells, terms, ss_type: int, alpha: float) -> str | None:
    """Do the residuals of the model on the scale ``z`` fail a check? None, or which and how.

    Used by the scale rule: ``auto`` may leave the log scale only when these
    checks *fail* there (the test rejects and the departure is not small), not
    on a caution alone.
    """
    from benchharness.analysis.cells import moments
    from benchharness.analysis.model import fit_model

    mom = moments(cells.row_cell, z, cells.count)
    fit = fit_model(cells, mom, terms, ss_type)
    if fit.df_resid <= 0:
        return None
    resid = z - fit.fitted[cells.row_cell]
    scale = np.sqrt(np.clip(1.0 - fit.leverage[cells.row_cell], 0.0, None))
    use = scale > 1e-8
    failing = []
    nm = normality(resid[use] / scale[use], alpha)
    if nm.get("level") == "fail":
        failing.append(f"the residuals are clearly not normal (skewness {nm['skewness']:+.2f}, "
                       f"p {nm['p']:.2g})")
    ev = brown_forsythe(fcells.row_cell, resid, fcells.count, alpha)
    if ev.get("level") == "fail":
        failing.append(f"the cell variances differ a lot ({ev['variance_ratio']:.3g}× between "
                       f"largest and smallest, p {ev['p']:.2g})")
    return " and ".join(failing) or None


def small_cells(n, ss_within, labels_of_cell) -> list[dict]:
    out = []
    for c in np.flatnonzero((n < 2) | (ss_within <= 0)):
        why = "fewer than two runs" if n[c] < 2 else "zero spread (all runs identical)"
        out.append({"levels": labels_of_cell(int(c)), "n": int(n[c]), "problem": why})
    return out
