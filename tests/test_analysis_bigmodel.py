"""Cost that follows what the data can estimate: large, partly run designs (invented data).

The truth is planted (fixed seeds); the checks are what `analyze` says (its
notes, its findings, its exit code) and, for the sums of squares of the model
it fitted, statsmodels ``ols`` + ``anova_lm`` (Type II) on the same rows and terms.
"""

from __future__ import annotations


import numpy as np
import pandas as pd
import pytest

from benchharness.analysis import analyze
from benchharness.analysis import model as model_mod
from analysis_refs import assert_same_anova, sm_anova
from conftest import run_main
NAMES = ["threads", "cache", "batch", "compaction", "bloom"]


def partial_plan(rows=600, seed=3):
    """A 5 × 10-level plan (100,000 cells) in random order, stopped after ``rows`` runs.

    Planted: threads changes the time by up to about ×1.5 (10 levels), cache
    by ×1.3, the other three nothing; lognormal noise of 5 %.
    """
    rng = np.random.default_rng(seed)
    order = rng.permutation(np.repeat(np.arange(10 ** 5), 2))[:rows]
    codes = [(order // 10 ** (4 - j)) % 10 for j in range(5)]
    logy = (np.log(0.05) + np.linspace(0, 0.4, 10)[codes[0]]
            + np.linspace(0, 0.25, 10)[codes[1]] + rng.normal(0, 0.05, rows))
    d = pd.DataFrame({n: np.char.add("v", c.astype(str)) for n, c in zip(NAMES, codes)})
    d["wall_s"] = np.exp(logy)
    return d


def test_partly_run_large_design_never_builds_rows_by_cells(monkeypatch):
    d = partial_plan()
    shapes = []
    real = model_mod.design

    def spy(levels, terms, sizes):
        X, sl = real(levels, terms, sizes)
        shapes.append(X.shape)
        return X, sl

    monkeypatch.setattr(model_mod, "design", spy)
    an = analyze(d, factors=NAMES, transform="log", block=False, art=True)
    # one run per cell: the requested model (up to order 4) has 40,951 columns; what is
    # built stays within the rows
    assert shapes and max(c for _, c in shapes) <= len(d)
    assert max(r * c for r, c in shapes) < len(d) * 10 ** 5 / 100
    lim = an.model["limited"]
    assert lim["parameters_requested"] == 40951 and lim["parameters_fitted"] <= len(d)
    said = [n for n in an.notes if "fitted" in n and "instead" in n]
    assert len(said) == 1 and "40,951 parameters" in said[0] and "600 runs" in said[0]
    # the planted truth: threads and cache matter, the other three do not
    p = {r["term"]: r["p"] for r in an.anova_rows if r.get("p") is not None}
    assert p["threads"] < 1e-6 and p["cache"] < 1e-6
    assert all(p[f] > 0.001 for f in ("batch", "compaction", "bloom"))
    # the cross-check follows the fitted model, one F test per fitted term
    assert {r["term"] for r in an.art["terms"]} == {t for t in an.model["terms"]}


def test_incomplete_design_type2_matches_statsmodels():
    # source: statsmodels ols + anova_lm(typ=2) on the same rows and the same terms
    # (every pair of factors fully observed, a third of the three-factor cells empty)
    rng = np.random.default_rng(11)
    full = [(a, b, c) for a in range(3) for b in range(4) for c in range(3)]
    keep = [cell for i, cell in enumerate(full) if i % 3 != 1]
    rows = [cell for cell in keep for _ in range(2)]
    d = pd.DataFrame(rows, columns=["a", "b", "c"]).astype(str)
    d["y"] = (1.0 + 0.3 * d["a"].astype(int) + 0.1 * (d["b"] == "2")
              + 0.2 * (d["a"] == "1") * (d["c"] == "2") + rng.normal(0, 0.05, len(d)))
    an = analyze(d, response="y", factors=["a", "b", "c"], transform="none", model=2,
                 block=False)
    ref, _ = sm_anova(d, "y", ["a", "b", "c"], typ=2, order=2)
    assert_same_anova(an, ref)


def test_limit_message_names_what_was_fitted():
    sizes = [2] * 10
    names = [f"f{i}" for i in range(10)]
    terms = model_mod.model_terms(names, "full")
    lim = model_mod.limit_terms(terms, sizes, n_cells=181, n_rows=200)
    # 1 + 10 + 45 + 120 = 176 parameters up to order 3; 386 up to order 4
    assert lim.order == 3 and lim.fitted == 176 and lim.requested == 1024
    assert lim.message.startswith("the full model has 1,024 parameters, more than 200 runs")
    assert "fitted interactions up to order 3 (176 parameters) instead" in lim.message
    assert "order 4 would need 386 parameters" in lim.message


def test_too_many_levels_for_any_model_is_one_line_exit_2(tmp_path):
    n = model_mod.MAX_PARAMETERS + 500
    d = pd.DataFrame({"input": [f"in{i}" for i in range(n)] * 2,
                      "wall_s": np.random.default_rng(1).uniform(1, 2, 2 * n)})
    csv = tmp_path / "runs.csv"
    d.to_csv(csv, index=False)
    res = run_main("analyze", csv, "--factors", "input")
    assert res.returncode == 2
    err = res.stderr.strip().splitlines()
    assert len(err) == 1 and "Traceback" not in res.stderr
    assert f"input alone has {n:,} levels" in err[0] and "cannot analyse" in err[0]


def test_failures_are_counted_per_cell_in_a_huge_plan():
    # 12 factors of 10 levels: 10^12 cells, of which 300 ran and 12 of those failed
    rng = np.random.default_rng(4)
    names = [f"k{i}" for i in range(12)]
    d = pd.DataFrame({n: rng.choice([f"L{j}" for j in range(10)], 300) for n in names})
    d["wall_s"] = np.exp(rng.normal(0, 0.05, 300))
    d["status"] = "ok"
    d.loc[:11, "status"] = "failed"
    an = analyze(d, factors=names, transform="log", block=False, comparisons=False)
    assert an.failures["runs"] == 300 and an.failures["not_ok"] == 12
    assert len(an.failures["cells"]) == 12
    assert an.counts["cells_expected"] == 10 ** 12 and an.counts["rows"] == 288


def test_seventy_two_level_factors_keys_do_not_overflow():
    # 2^70 cells: more than a 64-bit cell number holds; planted: s0 doubles the time
    rng = np.random.default_rng(6)
    names = [f"s{i}" for i in range(70)]
    codes = rng.integers(0, 2, (160, 70))
    d = pd.DataFrame({n: np.where(codes[:, i] == 1, "on", "off") for i, n in enumerate(names)})
    d["wall_s"] = np.exp(np.log(2.0) * codes[:, 0] + rng.normal(0, 0.05, 160))
    an = analyze(d, factors=names, transform="log", block=False, model="main",
                 comparisons=False)
    assert an.counts["cells"] == len({tuple(r) for r in codes.tolist()})
    p = {r["term"]: r["p"] for r in an.anova_rows if r["kind"] == "effect"}
    assert p["s0"] < 1e-6 and sum(v < 0.001 for v in p.values()) == 1
