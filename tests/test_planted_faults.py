"""Checks that catch ordinary faults the rest of the suite once let through (issue 17).

Each test here was shown to fail with its fault planted (listed beside it) and to pass
without it: the randomized order left unshuffled, Holm without its monotone step
(checked in ``adjust_p`` and through the fraction screen's active flags), the outlier
cut-off without Bonferroni, no fsync in the atomic file writer. The references are outside the project: scipy's chi-square and t
quantiles, statsmodels' ``multipletests`` and ``outlier_test``.
"""

from __future__ import annotations

import math
import os
import textwrap

import numpy as np
import pandas as pd
import pytest

from benchharness.analysis import analyze
from benchharness.analysis.comparisons import adjust_p
from benchharness.design.plan import make_plan
from benchharness.experiment.file import Experiment
from benchharness.results import journal as J

# ---------------------------------------------------------------- randomization

PLAN = """\
experiment: shuffle
command: [echo, "{a}", "{b}"]
factors:
  a: [x, y, z]
  b: ["1", "2"]
replicates: 2
warmup: 1
seed: 1
"""

SEEDS = range(1, 401)      # fixed list: the test is deterministic
P_MIN = 1e-3               # a uniform order passes at this level; an unshuffled one gives p ~ 0


def _position_table(order: str, warmup: bool) -> np.ndarray:
    """Counts of (run identity, position) over SEEDS; identity = (cell, replicate)."""
    exp = Experiment.from_text(PLAN + f"order: {order}\n")
    ids: dict = {}
    table = None
    for seed in SEEDS:
        runs = [r for r in make_plan(exp, seed=seed).runs if r.warmup == warmup]
        if table is None:
            table = np.zeros((len(runs), len(runs)))
        for pos, r in enumerate(runs):
            key = (r.cell, r.replicate)
            i = ids.setdefault(key, len(ids))
            # blocked: the place within the replicate's block (blocks follow each other)
            place = pos % 6 if (order == "blocked" and not warmup) else pos
            table[i, place] += 1
    return table[:, : (6 if order == "blocked" and not warmup else table.shape[1])]


@pytest.mark.parametrize("order,warmup", [("randomized", False), ("randomized", True),
                                          ("blocked", False), ("blocked", True)])
def test_each_run_is_equally_likely_at_every_position_over_seeds(order, warmup):
    # Planted fault it catches: the randomized (or blocked) order left unshuffled, so each
    # run always sits at the same place. Reference: scipy.stats.chi2_contingency, the
    # chi-square test of independence of run identity and position (under a uniform
    # random permutation every identity is equally likely at every position).
    from scipy.stats import chi2_contingency

    table = _position_table(order, warmup)
    assert set(table.sum(axis=1)) == {len(SEEDS)}        # every run once per seed
    p = chi2_contingency(table).pvalue
    assert p > P_MIN, (order, warmup, p)
    # and the test has the power to see an order that is not shuffled at all
    frozen = np.diag(np.full(table.shape[0], float(len(SEEDS))))
    assert chi2_contingency(frozen + 1e-9).pvalue < 1e-12


def test_listed_order_is_the_files_order_whatever_the_seed():
    exp = Experiment.from_text(PLAN + "order: listed\n")
    a = [(r.cell, r.replicate) for r in make_plan(exp, seed=1).runs if not r.warmup]
    b = [(r.cell, r.replicate) for r in make_plan(exp, seed=2).runs if not r.warmup]
    assert a == b == [(c, r) for c in range(6) for r in (1, 2)]


# ---------------------------------------------------------------- Holm


def _pvalue_sets():
    rng = np.random.default_rng(17)
    sets = [
        # raw step-down values 0.04, 0.033, 0.06, 0.04: without the monotone step the
        # largest p would be "rejected" at 5% while a smaller one is not
        [0.01, 0.011, 0.03, 0.04],
        [0.2, 0.008, 0.008, 0.5, 0.012],     # ties
        [0.9, 0.001],
        [0.04],
    ]
    sets += [list(rng.uniform(0, 0.2, size=n)) for n in (3, 5, 8, 13)]
    return sets


@pytest.mark.parametrize("p", _pvalue_sets())
def test_holm_matches_statsmodels_multipletests(p):
    # Reference: statsmodels.stats.multitest.multipletests(method="holm") (Holm 1979);
    # planted fault it catches: Holm without its monotone step (maximum.accumulate)
    from statsmodels.stats.multitest import multipletests

    reject, ref, _, _ = multipletests(p, alpha=0.05, method="holm")
    ours = adjust_p(p, "holm")
    np.testing.assert_allclose(ours, ref, rtol=1e-12, atol=0)
    assert list(ours < 0.05) == list(reject)
    _, bonf, _, _ = multipletests(p, alpha=0.05, method="bonferroni")
    np.testing.assert_allclose(adjust_p(p, "bonferroni"), bonf, rtol=1e-12, atol=0)


def test_holm_stops_at_the_first_p_it_cannot_reject():
    # the conclusion, not only the numbers: with p = .01, .011, .03, .04 and four tests
    # Holm rejects the first two only (.03 * 2 = .06 fails, so .04 may not pass after it)
    adj = adjust_p([0.04, 0.01, 0.03, 0.011], "holm")
    assert list(adj < 0.05) == [False, True, False, True]


def test_fraction_holm_active_flags_match_multipletests():
    # The fraction screen's own Holm step (the "active" flag over the alias chains),
    # against statsmodels' multipletests on the same t-test p values. Planted truth: a
    # replicated 2^(4-1) with one large effect, two small ones and five null chains.
    from statsmodels.stats.multitest import multipletests

    from benchharness.analysis.fraction import analyze_fraction
    from benchharness.design import words as W
    from benchharness.design.fractional import design_from_generators

    levels = {"threads": ["4", "16"], "batch": ["1", "64"], "cache": ["off", "on"],
              "pin": ["no", "yes"]}
    d = design_from_generators(list(levels.items()), ["pin = threads*batch*cache"])
    truth = {0b0001: 0.08, 0b0010: 0.012, 0b0100: 0.011}
    rng = np.random.default_rng(5)
    rows = []
    for rep in range(1, 4):
        for code, cell in zip(d.coded_cells(), d.cells()):
            mu = 0.1 + sum(h * math.prod(code[pos] for pos in W.positions(w))
                           for w, h in truth.items())
            rows.append({**cell, "replicate": rep, "block": 1, "status": "ok",
                         "wall_s": math.exp(mu + rng.normal(0, 0.02))})
    res = analyze_fraction(pd.DataFrame(rows), d)
    ps = [e["p"] for e in res["effects"]]
    reject, ref, _, _ = multipletests(ps, alpha=res["alpha"], method="holm")
    np.testing.assert_allclose([e["p_holm"] for e in res["effects"]], ref, rtol=1e-12)
    assert [e["active"] for e in res["effects"]] == list(reject)
    by = {e["term"]: e for e in res["effects"]}
    assert by["threads"]["active"]                           # the large planted effect


# ---------------------------------------------------------------- outliers


def _runs_with_planted_outliers(planted=((5, 5.0), (30, 12.0))):
    """3 x 2 cells, 8 runs each, log-normal noise (sd 0.02); run 1005 is 5 sd above the other
    runs of its cell (beyond the unadjusted two-sided 5% cut-off, within Bonferroni's), run
    1030 is 12 sd above its cell."""
    rng = np.random.default_rng(23)
    rows = []
    for i in range(48):
        a, b = "xyz"[i % 3], "pq"[(i // 3) % 2]
        ln = 0.1 * "xyz".index(a) + 0.05 * (b == "q") + rng.normal(0, 0.02)
        rows.append({"a": a, "b": b, "run": 1000 + i, "position": i, "wall_s": math.exp(ln)})
    d = pd.DataFrame(rows)
    for i, sds in planted:
        same = (d["a"] == d["a"][i]) & (d["b"] == d["b"][i]) & (d.index != i)
        d.loc[i, "wall_s"] = math.exp(np.log(d["wall_s"][same]).mean() + sds * 0.02)
    return d


def test_outlier_cutoff_is_bonferroni_over_the_runs():
    # Reference: the cut-off t(1 - alpha / 2N, df_resid - 1) from scipy.stats.t (externally
    # studentized residuals with Bonferroni over the N runs), and statsmodels'
    # OLSResults.outlier_test(method="bonf") for which runs stand out.
    # Planted fault it catches: the cut-off without Bonferroni (t(1 - alpha/2, df - 1)).
    import statsmodels.formula.api as smf
    from scipy import stats

    d = _runs_with_planted_outliers()
    an = analyze(d, factors=["a", "b"], transform="log", comparisons=False, art=False)
    n = len(d)
    df_resid = next(r["df"] for r in an.anova_rows if r["term"] == "Residual")
    assert df_resid == n - 6
    want = stats.t.ppf(1 - 0.05 / (2 * n), df_resid - 1)
    assert an.diagnostics["outlier_cutoff"] == pytest.approx(want, rel=1e-12)

    d["ly"] = np.log(d["wall_s"])
    ref = smf.ols("ly ~ C(a) * C(b)", data=d).fit().outlier_test(method="bonf", alpha=0.05)
    ref_out = sorted(int(d["run"][i]) for i in ref.index[ref["bonf(p)"] < 0.05])
    assert ref_out == [1030]
    assert [o["run"] for o in an.diagnostics["outliers"]] == ref_out
    np.testing.assert_allclose(an.studentized, ref["student_resid"].to_numpy(), rtol=1e-8)
    # what it says: one run stands out, named with the Bonferroni cut-off
    assert an.diagnostics["outlier_count"] == 1
    said = an.diagnostics["outlier_verdict"]
    assert said.startswith("1 run stands out from its cell (studentized residuals beyond ±")
    assert "the Bonferroni cut-off" in said
    # the 5-sd run is beyond the unadjusted cut-off, so a cut-off without Bonferroni
    # would have named it too
    t5 = abs(float(an.studentized[5]))
    assert stats.t.ppf(0.975, df_resid - 1) < t5 < want


def test_no_planted_outlier_no_run_stands_out():
    d = _runs_with_planted_outliers(planted=())
    an = analyze(d, factors=["a", "b"], transform="log", comparisons=False, art=False)
    assert an.diagnostics["outliers"] == [] and an.diagnostics["outlier_count"] == 0
    assert an.diagnostics["outlier_verdict"] == "no run stands out from its cell"


# ---------------------------------------------------------------- atomic writer


def test_atomic_writer_fsyncs_the_file_before_rename_and_the_folder_after(tmp_path,
                                                                         monkeypatch):
    # Planted fault it catches: no fsync in write_atomic (a power cut after the rename
    # could leave an empty or partial file under the final name: common practice is
    # write, fsync the file, rename, fsync the folder).
    events = []
    real_fsync, real_replace = os.fsync, os.replace

    def fsync(fd):
        events.append(("fsync", os.readlink(f"/proc/self/fd/{fd}")))
        return real_fsync(fd)

    def replace(src, dst, *a, **k):
        events.append(("replace", str(src), str(dst)))
        return real_replace(src, dst, *a, **k)

    monkeypatch.setattr(os, "fsync", fsync)
    monkeypatch.setattr(os, "replace", replace)
    target = tmp_path / "session.json"
    J.write_atomic(target, '{"state": "done"}')
    assert target.read_text() == '{"state": "done"}'
    tmp = str(target) + ".tmp"
    i_replace = events.index(("replace", tmp, str(target)))
    before, after = events[:i_replace], events[i_replace + 1:]
    assert ("fsync", tmp) in before, events            # the data are on disk before the rename
    assert ("fsync", str(tmp_path)) in after, events   # and the rename itself after it
    assert not (tmp_path / "session.json.tmp").exists()
