"""Helpers for the report tests: a real results folder from a planted-answer executor.

The executor stands in for processes (the runner accepts any `Executor`): each run's
wall time is drawn from a lognormal model whose effects are known by construction
(invented data for a planted-answer test, as the brief allows), so a test can check
that the report's verdict names the factor that was planted.
"""

from __future__ import annotations

import datetime as dt
import math

import numpy as np

from benchharness.execute.base import Measurement

HOSTILE = "<script>alert(1)</script>"

EXPERIMENT = f"""\
experiment: nap-planted
about: Does a longer nap take longer, and does <b>doubling</b> it double the time?
command: [python3, -c, "pass", "{{nap}}", "{{scale}}"]
factors:
  nap: ["short", "long", "{HOSTILE}"]
  scale: ["1", "2"]
replicates: 6
seed: 11
"""

# Planted multiplicative effects on wall time (ratios to the first level).
PLANTED = {"nap": {"short": 1.0, "long": 2.0, HOSTILE: 1.25}, "scale": {"1": 1.0, "2": 1.5}}


class PlantedExecutor:
    """Draws ``wall_s = 0.02 s × Π effect × lognormal(σ)``; optional failures by run id."""

    def __init__(self, planted=PLANTED, sigma=0.08, seed=3, fail_runs=(), timeout_runs=(),
                 base_s=0.02, drift_per_run=0.0):
        self.planted = planted
        self.sigma = sigma
        self.rng = np.random.default_rng(seed)
        self.fail_runs = set(fail_runs)
        self.timeout_runs = set(timeout_runs)
        self.base_s = base_s
        self.drift = drift_per_run
        self.count = 0

    def execute(self, spec, on_start=None):
        if on_start:
            on_start(12345, 12345)
        self.count += 1
        now = dt.datetime.now(dt.timezone.utc).isoformat(timespec="microseconds")
        if spec.run_id in self.fail_runs:
            return Measurement(status="failed", exit_code=1, wall_s=0.001, started_at=now,
                               message="planted failure")
        if spec.run_id in self.timeout_runs:
            return Measurement(status="timeout", exit_code=None, wall_s=60.0, started_at=now,
                               message="planted timeout")
        mult = 1.0
        for f, lv in spec.levels.items():
            mult *= self.planted.get(f, {}).get(lv, 1.0)
        wall = self.base_s * mult * math.exp(self.rng.normal(0, self.sigma)
                                            + self.drift * self.count)
        return Measurement(status="ok", exit_code=0, wall_s=wall, user_s=wall * 0.9,
                           sys_s=wall * 0.05, max_rss_kib=9000 + int(self.rng.integers(0, 50)),
                           minor_faults=100, major_faults=0, voluntary_switches=2,
                           involuntary_switches=1, in_blocks=0, out_blocks=0, started_at=now)

    def close(self):
        pass


def make_results(tmp_path, text=EXPERIMENT, executor=None, name="out"):
    """Run ``text`` with the planted executor into ``tmp_path/name``; returns the folder."""
    from benchharness.experiment import Experiment
    from benchharness.runner import run_experiment

    exp = Experiment.from_text(text, path=str(tmp_path / "experiment.yaml"))
    (tmp_path / "experiment.yaml").write_text(text)
    out = run_experiment(exp, out=tmp_path / name, executor=executor or PlantedExecutor())
    return out.folder


def hand_analysis(runs, factors, response="wall_s", alpha=0.05):
    """An analysis.json-shaped dict (issue-3 shapes) built directly with statsmodels/scipy.

    Stand-in used only while the analysis stage is not merged; log scale, full model,
    Type II sums of squares from `statsmodels` ``anova_lm``.
    """
    from itertools import combinations

    import pandas as pd
    import statsmodels.formula.api as smf
    from scipy import stats
    from statsmodels.stats.anova import anova_lm

    ok = runs[runs["status"].astype(str) == "ok"].copy()
    safe = {f: f"f{i}" for i, f in enumerate(factors)}
    d = pd.DataFrame({safe[f]: ok[f].astype(str).to_numpy() for f in factors})
    d["z"] = np.log(ok[response].to_numpy(dtype=float))
    terms = []
    for k in range(1, len(factors) + 1):
        for combo in combinations(factors, k):
            terms.append(combo)
    formula = "z ~ " + " * ".join(f"C({safe[f]})" for f in factors)
    fit = smf.ols(formula, d).fit()
    tab = anova_lm(fit, typ=2)
    mse = float(fit.mse_resid)
    df_res = float(fit.df_resid)
    ss_tot = float(((d["z"] - d["z"].mean()) ** 2).sum())
    rows = []
    for combo in terms:
        key = ":".join(f"C({safe[f]})" for f in combo)
        r = tab.loc[key]
        ss = float(r["sum_sq"])
        rows.append({"term": ":".join(combo), "df": float(r["df"]), "sum_sq": ss,
                     "mean_sq": ss / float(r["df"]), "F": float(r["F"]), "p": float(r["PR(>F)"]),
                     "partial_eta_sq": ss / (ss + float(tab.loc["Residual", "sum_sq"])),
                     "omega_sq": (ss - float(r["df"]) * mse) / (ss_tot + mse)})
    rows.append({"term": "Residual", "df": df_res, "sum_sq": float(tab.loc["Residual", "sum_sq"]),
                 "mean_sq": mse, "F": None, "p": None, "partial_eta_sq": None, "omega_sq": None})
    tcrit = float(stats.t.ppf(1 - alpha / 2, df_res))
    means, effects, comps = [], [], []
    for combo in terms:
        cols = [safe[f] for f in combo]
        for key, g in d.groupby(cols):
            key = key if isinstance(key, tuple) else (key,)
            m, n = float(g["z"].mean()), len(g)
            half = tcrit * math.sqrt(mse / n)
            means.append({"term": ":".join(combo), "levels": dict(zip(combo, key)),
                          "mean": math.exp(m), "lower": math.exp(m - half),
                          "upper": math.exp(m + half), "n": n})
    for f in factors:
        levels = list(dict.fromkeys(ok[f].astype(str)))
        ref = levels[0]
        gm = d.groupby(safe[f])["z"].agg(["mean", "size"])
        for lv in levels[1:]:
            diff = gm.loc[lv, "mean"] - gm.loc[ref, "mean"]
            se = math.sqrt(mse * (1 / gm.loc[lv, "size"] + 1 / gm.loc[ref, "size"]))
            effects.append({"factor": f, "level": lv, "reference": ref, "ratio": math.exp(diff),
                            "lower": math.exp(diff - tcrit * se),
                            "upper": math.exp(diff + tcrit * se)})
        pairs = list(combinations(levels, 2))
        ps = []
        for a, b in pairs:
            diff = gm.loc[b, "mean"] - gm.loc[a, "mean"]
            se = math.sqrt(mse * (1 / gm.loc[a, "size"] + 1 / gm.loc[b, "size"]))
            ps.append(2 * stats.t.sf(abs(diff / se), df_res))
        from statsmodels.stats.multitest import multipletests

        padj = multipletests(ps, method="holm")[1] if ps else []
        for (a, b), p in zip(pairs, padj):
            diff = gm.loc[b, "mean"] - gm.loc[a, "mean"]
            se = math.sqrt(mse * (1 / gm.loc[a, "size"] + 1 / gm.loc[b, "size"]))
            comps.append({"method": "pairwise", "factor": f, "within": None, "a": a, "b": b,
                          "ratio": math.exp(diff), "lower": math.exp(diff - tcrit * se),
                          "upper": math.exp(diff + tcrit * se), "p_adj": float(p)})
    resid = fit.resid.to_numpy()
    sw = stats.shapiro(resid)
    groups = [g["z"].to_numpy() - g["z"].mean() for _k, g in d.groupby([safe[f] for f in factors])]
    bf = stats.levene(*[g["z"].to_numpy() for _k, g in d.groupby([safe[f] for f in factors])],
                      center="median")
    lr = stats.linregress(ok["position"].to_numpy(dtype=float), resid)
    del groups
    return {
        "response": response, "factors": list(factors), "alpha": alpha,
        "transform": {"name": "log", "lambda": 0.0, "lambda_hat": 0.1, "lambda_ci": [-0.6, 0.8],
                      "reason": "the 95% interval for λ contains 0 (log scale)"},
        "anova": rows, "means": means, "effects": effects, "comparisons": comps,
        "diagnostics": {
            "normality": {"test": "shapiro-wilk", "statistic": float(sw.statistic),
                          "p": float(sw.pvalue), "verdict": "residuals look normal"
                          if sw.pvalue >= alpha else "residuals depart from normal",
                          "ok": bool(sw.pvalue >= alpha)},
            "equal_variance": {"test": "brown-forsythe", "statistic": float(bf.statistic),
                               "p": float(bf.pvalue), "verdict": "spread similar across cells",
                               "ok": bool(bf.pvalue >= alpha)},
            "outliers": [],
            "drift": {"slope_per_100_runs": float(lr.slope * 100), "p": float(lr.pvalue),
                      "verdict": "no trend over the run order" if lr.pvalue >= alpha
                      else "residuals trend over the run order"},
        },
    }
