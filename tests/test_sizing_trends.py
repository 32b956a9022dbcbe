"""`size` for interactions and trends: the power formulas against simulations of the analysis.

Each formula (design/sizing.py) predicts the power of a test the analysis makes;
a fixed-seed simulation plants exactly the effect sized for and counts how often
the analysis finds it. The fast versions are smoke tests (a factor of two in a
noncentrality moves the rate far outside their bounds); the slow ones pin the
rate to within three binomial standard errors.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import pytest

from benchharness.design import sizing

SIGMA = 0.05


def _interaction_rate(sims, n, D, seed):
    from benchharness.analysis import analyze

    rng = np.random.default_rng(seed)
    # planted: ±D/4 on the 2×2 sub-table (x, y) × (p, q) of a 3×2 design: the ratio
    # between a=x and a=y changes by e^D between b=p and b=q
    bump = {("x", "p"): D / 4, ("y", "q"): D / 4, ("x", "q"): -D / 4, ("y", "p"): -D / 4}
    cells = [(a, b) for a in "xyz" for b in "pq"]
    hits = 0
    for _ in range(sims):
        rows = [{"a": a, "b": b, "wall_s": math.exp(bump.get((a, b), 0.0)
                                                    + rng.normal(0, SIGMA))}
                for a, b in cells for _ in range(n)]
        an = analyze(pd.DataFrame(rows), factors=["a", "b"], comparisons=False, art=False,
                     transform="log")
        p = next(r["p"] for r in an.to_dict()["anova"] if r["term"] == "a:b")
        hits += p < 0.05
    return hits / sims


def _interaction_prediction(n, D):
    (eff,) = sizing.interaction_effects([("a", 3), ("b", 2)], 6, D, SIGMA)
    return eff.power(n, 6, 0.05)


def test_interaction_power_formula_matches_a_simulation_fast():
    D, n = math.log(1.12), 5
    predicted = _interaction_prediction(n, D)
    rate = _interaction_rate(30, n, D, seed=31)
    assert 0.4 < predicted < 0.8
    assert abs(rate - predicted) < 3 * math.sqrt(predicted * (1 - predicted) / 30) + 0.02


@pytest.mark.slow
def test_interaction_power_formula_matches_a_simulation():
    D, n = math.log(1.12), 5
    predicted = _interaction_prediction(n, D)
    rate = _interaction_rate(1000, n, D, seed=32)
    assert abs(rate - predicted) < 3 * math.sqrt(predicted * (1 - predicted) / 1000)


XS = (1000, 4000, 16000)


def _trend_rates(sims, n, slope, seed):
    """(rate the slope is found, rate the exponents are found to differ)."""
    from benchharness.analysis.numeric import trends
    from benchharness.analysis.prepare import prepare

    rng = np.random.default_rng(seed)
    found = differ = 0
    for _ in range(sims):
        # planted: exponent `slope` at g=p, 2·slope at g=q (a difference of `slope`)
        rows = [{"x": str(x), "g": g,
                 "wall_s": math.exp((slope if g == "p" else 2 * slope) * math.log(x)
                                    + rng.normal(0, SIGMA))}
                for x in XS for g in "pq" for _ in range(n)]
        prep = prepare(pd.DataFrame(rows), factors=["x", "g"])
        (t,) = trends(prep, 0.05, [], None)
        differ += t["by"][0]["test"]["p"] < 0.05
        found += t["slope"]["p"] < 0.05
    return found / sims, differ / sims


def _trend_predictions(n, slope):
    effects = sizing.trend_effects([("x", 3), ("g", 2)], {"x": XS}, 6, slope, SIGMA)
    by = {e.name: e for e in effects}
    return by["trend over x"], by["x exponent by g"]


def test_slope_difference_power_matches_a_simulation_fast():
    n, slope = 3, 0.04
    _common, diff = _trend_predictions(n, slope)
    predicted = diff.power(n, 6, 0.05)
    _found, rate = _trend_rates(50, n, slope, seed=41)
    assert 0.3 < predicted < 0.8
    assert abs(rate - predicted) < 3 * math.sqrt(predicted * (1 - predicted) / 50) + 0.02


@pytest.mark.slow
def test_trend_power_formulas_match_a_simulation():
    n, slope = 3, 0.04
    _c, diff = _trend_predictions(n, slope)
    _f, rate = _trend_rates(1000, n, slope, seed=42)
    p = diff.power(n, 6, 0.05)
    assert abs(rate - p) < 3 * math.sqrt(p * (1 - p) / 1000)
    # the common slope alone, with equal exponents: a smaller slope to find
    n2, s2 = 2, 0.02
    common, _d = _trend_predictions(n2, s2)
    rng = np.random.default_rng(43)
    from benchharness.analysis.numeric import trends
    from benchharness.analysis.prepare import prepare

    hits = 0
    for _ in range(1000):
        rows = [{"x": str(x), "g": g, "wall_s": math.exp(s2 * math.log(x)
                                                         + rng.normal(0, SIGMA))}
                for x in XS for g in "pq" for _ in range(n2)]
        (t,) = trends(prepare(pd.DataFrame(rows), factors=["x", "g"]), 0.05, [], None)
        hits += t["slope"]["p"] < 0.05
    p = common.power(n2, 6, 0.05)
    assert 0.2 < p < 0.9
    assert abs(hits / 1000 - p) < 3 * math.sqrt(p * (1 - p) / 1000)


def test_main_effect_sizing_is_unchanged_by_the_generic_effect():
    # the generic Effect with the main-effect noncentrality gives size_design's power
    D = math.log1p(0.05)
    eff = sizing.Effect("a", 2, 6 / 3 * D * D / (2 * SIGMA ** 2), params=6)
    assert eff.power(4, 6, 0.05) == pytest.approx(sizing.f_power(4, 3, 6, D, SIGMA, 0.05),
                                                  rel=1e-12)


def test_size_cli_for_trend_and_interaction(capsys):
    from benchharness.cli import main

    from pathlib import Path

    demo = Path(__file__).resolve().parent.parent / "experiments" / "thread-scaling.yaml"
    code = main(["size", "--for", "trend", "--slope", "0.05", "--noise-cv", "3%", "--levels",
                 str(demo), "--json"])
    assert code == 0
    d = json.loads(capsys.readouterr().out)
    assert d["for"] == "trend" and d["slope"] == 0.05
    assert set(d["per_factor"]) == {"trend over threads", "trend over records",
                                    "threads exponent by records", "records exponent by threads"}
    assert d["power"] >= 0.9 and d["replicates"] == max(d["per_factor"].values())
    assert main(["size", "--for", "trend", "--detect", "5%", "--noise-cv", "2%", "--levels",
                 "3,2"]) == 2
    err = capsys.readouterr().err
    assert "--for trend needs --slope" in err and err.count("\n") == 1
    assert main(["size", "--for", "interaction", "--detect", "5%", "--noise-cv", "2%",
                 "--levels", "3,2"]) == 0
    out = capsys.readouterr().out
    assert out.startswith("replicates per cell: 10 ") and "A:B" in out
