"""`size --for interaction` on an experiment with exclusions (``exclude:`` / ``only_when:``):
sized on the cells that remain, checked against a Monte-Carlo of the F test it sizes,
whose statistic is checked against statsmodels fits (docs/design.md, "Sizing")."""

from __future__ import annotations

import itertools
import math
import warnings

import numpy as np
import pytest

from benchharness.cli import main
from benchharness.design import sizing

SIGMA = 0.05

# Planted: a 3×2×2 grid with one combination of a and b excluded (z with q): a:b keeps a
# single 2×2 sub-grid, (x, y) × (p, q); a:c and b:c stay complete.
SPACE = """\
experiment: shard
command: [./shard, "{a}", "{b}", "{c}"]
factors:
  a: [x, y, z]
  b: [p, q]
  c: [u, v]
exclude:
  - {a: z, b: q, why: z has no q mode}
"""


def _cells():
    return [dict(a=a, b=b, c=c) for a, b, c in itertools.product("xyz", "pq", "uv")
            if not (a == "z" and b == "q")]


def test_a_full_grid_sizes_as_before():
    # on a complete grid the cell-based sizing is the closed form of interaction_effects
    f = [("a", 3), ("b", 2), ("c", 4)]
    cells = [dict(zip("abc", t)) for t in itertools.product("012", "01", "0123")]
    old = sizing.interaction_effects(f, 24, math.log(1.1), 0.03)
    new, skipped = sizing.interaction_effects_on_cells(f, cells, math.log(1.1), 0.03)
    assert skipped == []
    for e, g in zip(old, new):
        assert (e.name, e.df1, e.params) == (g.name, g.df1, g.params)
        assert g.lam1 == pytest.approx(e.lam1, rel=1e-12)


def _design(cells, n):
    import pandas as pd
    from patsy import dmatrix

    rows = pd.DataFrame([c for c in cells for _ in range(n)])
    full = dmatrix("(C(a) + C(b) + C(c))**2", rows, return_type="matrix")
    reduced = dmatrix("C(a) + C(b) + C(c) + C(a):C(c) + C(b):C(c)", rows,
                      return_type="matrix")
    cellm = dmatrix("C(a):C(b):C(c) - 1", rows, return_type="matrix")
    return rows, np.asarray(full), np.asarray(reduced), np.asarray(cellm)


def _rss(X, Y):
    """Residual sums of squares of the columns of Y on X (many simulated data sets at once)."""
    coef = np.linalg.lstsq(X, Y, rcond=None)[0]
    R = Y - X @ coef
    return (R * R).sum(axis=0)


def test_interaction_power_on_the_remaining_cells_matches_a_monte_carlo():
    from scipy import stats
    import statsmodels.api as sm

    cells, D, n = _cells(), math.log(1.10), 4
    effects, skipped = sizing.interaction_effects_on_cells([("a", 3), ("b", 2), ("c", 2)],
                                                           cells, D, SIGMA)
    assert skipped == []
    ab = next(e for e in effects if e.name == "a:b")
    assert ab.df1 == 1 and ab.params == 10
    predicted = ab.power(n, 10, 0.05)
    assert 0.3 < predicted < 0.9
    # the truth the sizing assumes: ±D/4 on the one 2×2 sub-grid, on every c
    bump = {("x", "p"): D / 4, ("y", "q"): D / 4, ("x", "q"): -D / 4, ("y", "p"): -D / 4}
    rows, full, reduced, cellm = _design(cells, n)
    mu = np.array([bump.get((a, b), 0.0) for a, b in zip(rows["a"], rows["b"])])
    rng = np.random.default_rng(12)
    sims = 4000
    Y = mu[:, None] + rng.normal(0.0, SIGMA, size=(len(mu), sims))
    df2 = len(mu) - 10
    F = ((_rss(reduced, Y) - _rss(full, Y)) / ab.df1) / (_rss(cellm, Y) / df2)
    # the Monte-Carlo's statistic is the F test statsmodels gives: on the first data set,
    # the extra sum of squares of two statsmodels OLS fits over the pure error of a third
    y0 = Y[:, 0]
    with warnings.catch_warnings():     # patsy's full-rank coding of an incomplete grid
        warnings.simplefilter("ignore")  # leaves a column of zeros: statsmodels warns
        ssr = [sm.OLS(y0, X).fit().ssr for X in (reduced, full, cellm)]
    assert F[0] == pytest.approx(((ssr[0] - ssr[1]) / ab.df1) / (ssr[2] / df2), rel=1e-9)
    rate = float(np.mean(F > stats.f.isf(0.05, ab.df1, df2)))
    assert abs(rate - predicted) < 3 * math.sqrt(predicted * (1 - predicted) / sims), \
        (rate, predicted)


def test_size_says_what_it_sized_on_and_what_it_could_not(tmp_path, capsys):
    f = tmp_path / "shard.yaml"
    f.write_text(SPACE)
    assert main(["size", "--for", "interaction", "--detect", "10%", "--noise-cv", "5%",
                 "--levels", str(f)]) == 0
    out = capsys.readouterr().out
    assert "timed runs:" in out and "× 10 cells)" in out
    assert "sized on the 10 cells the exclusions leave (of 12 combinations)" in out
    for name in ("a:b", "a:c", "b:c"):
        assert f"  {name} " in out
    # an exclusion that leaves b:c without a 2×2 sub-grid: it is named, the rest sized
    f.write_text(SPACE.replace("{a: z, b: q, why: z has no q mode}",
                               "{b: q, c: v}"))
    assert main(["size", "--for", "interaction", "--detect", "10%", "--noise-cv", "5%",
                 "--levels", str(f)]) == 0
    out = capsys.readouterr().out
    assert ("not sized, it cannot be estimated on these cells: b:c: no 2×2 sub-grid, no two "
            "levels of b run with the same two levels of c") in out
    assert "  a:b " in out and "  b:c " not in out


def test_no_estimable_interaction_is_one_line_and_exit_2(tmp_path, capsys):
    f = tmp_path / "tiny.yaml"
    f.write_text("experiment: tiny\ncommand: [./x, '{a}', '{b}']\nfactors:\n  a: [x, y]\n"
                 "  b: [p, q]\nexclude:\n  - {a: x, b: p}\n")
    assert main(["size", "--for", "interaction", "--detect", "10%", "--noise-cv", "5%",
                 "--levels", str(f)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "Traceback" not in err[0]
    assert str(f) in err[0] and "no two-factor interaction can be estimated" in err[0]
    assert "a:b: no 2×2 sub-grid" in err[0] and "--for anova" in err[0]
