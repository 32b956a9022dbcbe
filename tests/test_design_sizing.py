"""Replicate sizing: noncentral F power (Montgomery, Design and Analysis of Experiments, §5.3)."""

from __future__ import annotations

import json
import math
import re

import numpy as np
import pytest
from scipy import stats

from benchharness.design import sizing


def direct_power(n, a, cells, detect, cv, alpha):
    # Direct scipy.stats.ncf computation of Montgomery §5.3's operating characteristic:
    # lambda = n b D^2 / (2 sigma^2), df = (a - 1, cells (n - 1)).
    D = math.log(1 + detect)
    sigma = math.sqrt(math.log(1 + cv * cv))
    b = cells / a
    lam = n * b * D * D / (2 * sigma * sigma)
    df1, df2 = a - 1, cells * (n - 1)
    return stats.ncf.sf(stats.f.ppf(1 - alpha, df1, df2), df1, df2, lam)


@pytest.mark.parametrize("n, a, cells", [(2, 3, 24), (3, 4, 24), (5, 2, 2), (4, 3, 9)])
def test_power_matches_scipy_ncf(n, a, cells):
    s = sizing.sigma_from_cv(0.02)
    got = sizing.f_power(n, a, cells, sizing.log_difference(0.03), s, 0.05)
    assert got == pytest.approx(direct_power(n, a, cells, 0.03, 0.02, 0.05), rel=1e-10)


def test_size_answers_the_largest_per_factor_n():
    ans = sizing.size_design([("codec", 3), ("level", 2), ("corpus", 4)], 0.03,
                             sizing.sigma_from_cv(0.02), 0.05, 0.9)
    assert ans.replicates == max(ans.per_factor.values())
    for name, a in [("codec", 3), ("level", 2), ("corpus", 4)]:
        n = ans.per_factor[name]
        assert direct_power(n, a, 24, 0.03, 0.02, 0.05) >= 0.9
        if n > 2:
            assert direct_power(n - 1, a, 24, 0.03, 0.02, 0.05) < 0.9
    assert ans.runs == ans.replicates * 24
    assert ans.power == pytest.approx(min(ans.per_factor_power.values()))


def test_two_factor_example_single_factor_of_interest():
    # One factor, a = 2, b = 1: the F test is the two-sample t test; compare with the
    # noncentral t power of scipy.stats.nct (t^2 = F).
    n = sizing.replicates_needed(2, 2, math.log(1.05), 0.04, 0.05, 0.8)
    delta = math.log(1.05) / (0.04 * math.sqrt(2 / n))
    df = 2 * (n - 1)
    crit = stats.t.ppf(0.975, df)
    p_t = stats.nct.sf(crit, df, delta) + stats.nct.cdf(-crit, df, delta)
    assert sizing.f_power(n, 2, 2, math.log(1.05), 0.04, 0.05) == pytest.approx(p_t, rel=1e-6)
    assert p_t >= 0.8


def test_pairwise_needs_at_least_as_many_and_equals_F_for_two_levels():
    s = sizing.sigma_from_cv(0.03)
    D = sizing.log_difference(0.02)
    assert sizing.pairwise_power(4, 2, 8, D, s, 0.05) == pytest.approx(
        sizing.f_power(4, 2, 8, D, s, 0.05), rel=1e-6)
    anova = sizing.size_design([("a", 5), ("b", 2)], 0.02, s)
    pair = sizing.size_design([("a", 5), ("b", 2)], 0.02, s, method="pairwise")
    assert pair.per_factor["a"] > anova.per_factor["a"]


def _simulate_detection(levels, focus, n, detect, cv, alpha, sims, seed):
    """Fraction of simulated experiments whose main-effect F test on `focus` rejects.

    Worst case of the sizing: two levels of `focus` D apart, the others midway, on the
    log scale; lognormal noise with the given CV; full-interaction cell-means model.
    """
    rng = np.random.default_rng(seed)
    cells = int(np.prod(levels))
    a = levels[focus]
    grid = np.indices(levels).reshape(len(levels), -1).T     # cell -> level indices
    D = math.log(1 + detect)
    sigma = math.sqrt(math.log(1 + cv * cv))
    shift = np.zeros(a)
    shift[0], shift[1] = -D / 2, D / 2
    mu = shift[grid[:, focus]]
    crit = stats.f.ppf(1 - alpha, a - 1, cells * (n - 1))
    hits = 0
    for _ in range(sims):
        y = mu[:, None] + rng.normal(0, sigma, size=(cells, n))
        cm = y.mean(axis=1)
        sse = ((y - cm[:, None]) ** 2).sum()
        grand = cm.mean()
        lm = np.array([cm[grid[:, focus] == i].mean() for i in range(a)])
        ss_a = n * (cells // a) * ((lm - grand) ** 2).sum()
        F = (ss_a / (a - 1)) / (sse / (cells * (n - 1)))
        hits += F > crit
    return hits / sims


def test_simulation_detects_at_the_stated_power():
    levels = (3, 2, 2)
    ans = sizing.size_design([("a", 3), ("b", 2), ("c", 2)], 0.04,
                             sizing.sigma_from_cv(0.05), 0.05, 0.8)
    n = ans.per_factor["a"]
    p = sizing.f_power(n, 3, 12, sizing.log_difference(0.04), sizing.sigma_from_cv(0.05), 0.05)
    got = _simulate_detection(levels, 0, n, 0.04, 0.05, 0.05, sims=600, seed=20261201)
    # 600 simulations: binomial SD about 0.017; allow 3.5 SD.
    assert abs(got - p) < 0.06


@pytest.mark.slow
def test_simulation_detects_at_the_stated_power_large():
    for levels, focus, detect, cv in [((4, 3), 0, 0.03, 0.04), ((2, 2, 2, 2), 2, 0.02, 0.03)]:
        fac = [(str(i), a) for i, a in enumerate(levels)]
        ans = sizing.size_design(fac, detect, sizing.sigma_from_cv(cv), 0.05, 0.9)
        n = ans.replicates
        p = sizing.f_power(n, levels[focus], int(np.prod(levels)), sizing.log_difference(detect),
                           sizing.sigma_from_cv(cv), 0.05)
        got = _simulate_detection(levels, focus, n, detect, cv, 0.05, sims=6000, seed=7)
        assert abs(got - p) < 0.02


def test_pilot_noise_is_pooled_within_cell_sd():
    import pandas as pd

    rng = np.random.default_rng(3)
    rows = []
    for a in ("x", "y"):
        for r in range(30):
            rows.append({"f": a, "status": "ok",
                         "wall_s": math.exp((0.5 if a == "y" else 0) + rng.normal(0, 0.1))})
    rows.append({"f": "x", "status": "failed", "wall_s": 99.0})
    df = pd.DataFrame(rows)
    pn = sizing.pilot_noise(df, ["f"])
    # Pooled within-cell SD equals sqrt of the residual mean square of a one-way
    # ANOVA on ln(wall_s) (statsmodels ols + anova_lm as the reference).
    import statsmodels.formula.api as smf
    from statsmodels.stats.anova import anova_lm

    ok = df[df.status == "ok"].assign(ly=lambda d: np.log(d.wall_s))
    table = anova_lm(smf.ols("ly ~ C(f)", data=ok).fit())
    assert pn.sigma_log == pytest.approx(math.sqrt(table.loc["Residual", "mean_sq"]), rel=1e-9)
    assert pn.df == 58


def test_size_command_json_and_text(cli, main_cli):
    # the first command in a new process (the console script), the rest in this one
    r = cli("size", "--detect", "3%", "--noise-cv", "2%", "--levels", "3,2,4", "--json")
    assert r.returncode == 0, r.stderr
    d = json.loads(r.stdout)
    assert set(d) >= {"replicates", "power", "runs", "per_factor"}
    assert d["runs"] == d["replicates"] * 24
    assert d["power"] == pytest.approx(direct_power(d["replicates"], 4, 24, 0.03, 0.02, 0.05))
    r = main_cli("size", "--detect", "3%", "--noise-cv", "2%", "--levels", "3,2,4", "--for",
            "pairwise")
    assert r.returncode == 0 and "replicates per cell" in r.stdout
    r = main_cli("size", "--detect", "3%", "--levels", "3,2")
    assert r.returncode == 2 and "--noise-cv" in r.stderr


def test_size_command_with_pilot(main_cli, tmp_path):
    import pandas as pd

    rng = np.random.default_rng(5)
    rows = []
    t0 = pd.Timestamp("2026-01-01T00:00:00Z")
    clock = 0.0
    for rep in range(3):
        for codec in ("zlib", "lzma"):
            w = 0.2 * math.exp(rng.normal(0, 0.05))
            rows.append({"run": len(rows), "replicate": rep + 1, "codec": codec, "status": "ok",
                         "wall_s": w, "started_at": (t0 + pd.Timedelta(seconds=clock)).isoformat()})
            clock += w + 0.05
    csv = tmp_path / "pilot.csv"
    pd.DataFrame(rows).to_csv(csv, index=False)
    exp = tmp_path / "e.yaml"
    exp.write_text("experiment: codecs\ncommand: [true, '{codec}']\nfactors:\n"
                   "  codec: [zlib, lzma]\nreplicates: 3\n")
    r = main_cli("size", "--detect", "5%", "--pilot", csv, "--levels", exp, "--json")
    assert r.returncode == 0, r.stderr
    d = json.loads(r.stdout)
    assert d["expected_run_s"] == pytest.approx(0.25, rel=0.15)
    assert d["expected_wall_s"] == pytest.approx(d["expected_run_s"] * d["runs"])
    # sizing a metric in ms: the runs still take their wall clock, not 200 "seconds"
    pd.DataFrame(rows).assign(spill_ms=lambda t: t["wall_s"] * 1000).to_csv(csv, index=False)
    r = main_cli("size", "--detect", "5%", "--pilot", csv, "--levels", exp, "--response",
            "spill_ms", "--json")
    assert r.returncode == 0, r.stderr
    assert json.loads(r.stdout)["expected_run_s"] == pytest.approx(0.25, rel=0.15)


def _simulate_holm_pairwise(levels, n, detect, cv, alpha, sims, seed):
    """Share of simulated experiments in which Holm-adjusted pairwise t tests (pooled
    full-model error) declare the two levels D apart different (factor 0; others no effect).
    Holm's step-down (Holm 1979) is applied directly; vectorised over simulations."""
    rng = np.random.default_rng(seed)
    cells = int(np.prod(levels))
    a = levels[0]
    grid = np.indices(levels).reshape(len(levels), -1).T
    D = math.log(1 + detect)
    sigma = math.sqrt(math.log(1 + cv * cv))
    shift = np.zeros(a)
    shift[0], shift[1] = -D / 2, D / 2
    mu = shift[grid[:, 0]]
    df = cells * (n - 1)
    b = cells // a
    pairs = [(i, j) for i in range(a) for j in range(i + 1, a)]
    m = len(pairs)
    y = mu[None, :, None] + rng.normal(0, sigma, size=(sims, cells, n))
    cm = y.mean(axis=2)
    mse = ((y - cm[:, :, None]) ** 2).sum(axis=(1, 2)) / df
    lm = np.stack([cm[:, grid[:, 0] == i].mean(axis=1) for i in range(a)], axis=1)
    se = np.sqrt(mse * 2 / (n * b))
    p = np.stack([2 * stats.t.sf(np.abs(lm[:, i] - lm[:, j]) / se, df) for i, j in pairs], axis=1)
    order = np.argsort(p, axis=1)
    ps = np.take_along_axis(p, order, axis=1)
    ok = ps <= alpha / (m - np.arange(m))[None, :]
    # Step-down: reject the k smallest where k = first failure.
    first_fail = np.where(ok.all(axis=1), m, np.argmin(ok, axis=1))
    rank0 = np.argmax(order == 0, axis=1)          # where pair 0 sits in the sorted order
    return float(np.mean(rank0 < first_fail))


def test_pairwise_bound_is_conservative_by_simulation():
    # The Bonferroni t power is a lower bound on Holm's power for the pair D apart.
    s = sizing.sigma_from_cv(0.05)
    n = sizing.replicates_needed(4, 8, sizing.log_difference(0.05), s, 0.05, 0.8, "pairwise")
    bound = sizing.pairwise_power(n, 4, 8, sizing.log_difference(0.05), s, 0.05)
    got = _simulate_holm_pairwise((4, 2), n, 0.05, 0.05, 0.05, sims=2000, seed=11)
    assert bound >= 0.8
    assert got >= bound - 0.03          # 2000 simulations: binomial SD about 0.009
    # Cross-check of the vectorised Holm against statsmodels on one simulated table.
    from statsmodels.stats.multitest import multipletests

    pv = np.array([0.001, 0.04, 0.012, 0.3, 0.02, 0.009])
    rej = multipletests(pv, alpha=0.05, method="holm")[0]
    order = np.argsort(pv)
    ok = pv[order] <= 0.05 / (6 - np.arange(6))
    k = 6 if ok.all() else int(np.argmin(ok))
    assert set(order[:k]) == set(np.flatnonzero(rej))


def test_size_text_says_its_question_in_the_grammar_and_aligns_its_table(main_cli):
    """The answer's first line uses the grammar's words (a ratio 1.10×, power and
    confidence in per cent, docs/cli.md), and the per-factor table keeps its columns under
    their headers even when the factor names (A, B) are shorter than 'factor'."""
    r = main_cli("size", "--detect", "10%", "--noise-cv", "5%", "--levels", "2,2",
            "--power", "80%", "--confidence", "99%")
    assert r.returncode == 0, r.stderr
    lines = r.stdout.splitlines()
    assert ("to detect a ratio of 1.10× (+10%) with 80% power, tests at 99% confidence"
            in lines[0]), lines[0]
    assert "alpha" not in r.stdout
    head = next(ln for ln in lines if ln.lstrip().startswith("factor"))
    rows = [ln for ln in lines if ln.startswith("  A ") or ln.startswith("  B ")]
    assert len(rows) == 2
    end = head.index("replicates") + len("replicates")
    for row in rows:   # the replicate count is right-aligned under its header
        assert row[end - 1].isdigit() and row[end] == " ", (head, row)
    assert re.search(r"timed runs: \d+ \(\d+ × 4 cells\)", r.stdout)
