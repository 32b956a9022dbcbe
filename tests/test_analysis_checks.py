"""Analysis details checked against outside references and planted truths.

Written to kill mutants that survived the rest of the suite (DEVELOPERS.md, "Mutation
testing"): the size of each comparison family, the number of sign runs a clustered
residual sequence is compared with, and the derivative of the inverse Box-Cox transform
used by delta-method intervals.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from benchharness.analysis import analyze


def _levels_frame(k, reps, seed, step=0.04):
    rng = np.random.default_rng(seed)
    lv = [f"L{i}" for i in range(k)]
    d = pd.DataFrame({"f": np.repeat(lv, reps)})
    d["wall_s"] = np.exp(step * np.repeat(np.arange(k), reps) + rng.normal(0, 0.03, k * reps))
    return d


def test_tukey_family_is_every_pair_of_levels():
    # Planted: five levels, a clear trend. Tukey HSD compares all k(k-1)/2 = 10 pairs as
    # one family (Tukey 1953); statsmodels' pairwise_tukeyhsd lists the same 10 pairs.
    from statsmodels.stats.multicomp import pairwise_tukeyhsd

    d = _levels_frame(5, 6, seed=3)
    an = analyze(d, factors=["f"], transform="log", comparisons=["tukey"], art=False)
    rows = [c for c in an.comparisons if c["method"] == "tukey" and c["factor"] == "f"]
    ref = pairwise_tukeyhsd(np.log(d["wall_s"]), d["f"])
    assert len(rows) == len(ref.reject) == 10
    assert {c["family_size"] for c in rows} == {10}
    assert {c["interval_level"] for c in rows} == {0.95}


@pytest.mark.parametrize("k", [3, 6])
def test_bonferroni_family_size_and_adjusted_p(k):
    # Pairwise comparisons with Bonferroni: m = k(k-1)/2 tests, p_adj = min(1, m p);
    # reference statsmodels.stats.multitest.multipletests(method="bonferroni").
    from statsmodels.stats.multitest import multipletests

    d = _levels_frame(k, 5, seed=11)
    an = analyze(d, factors=["f"], transform="log", comparisons=["pairwise"],
                 adjust="bonferroni", art=False)
    pw = [c for c in an.comparisons if c["method"] == "pairwise" and c["factor"] == "f"]
    m = k * (k - 1) // 2
    assert len(pw) == m and {c["family_size"] for c in pw} == {m}
    ref = multipletests([c["p"] for c in pw], method="bonferroni")[1]
    np.testing.assert_allclose([c["p_adj"] for c in pw], ref, rtol=1e-12)
    assert all(c["interval_level"] == pytest.approx(1 - 0.05 / m) for c in pw)


def test_clustered_signs_are_compared_with_the_expected_number_of_runs():
    # Planted: residuals in alternating stretches of 25 runs (no linear trend). The
    # verdict names the runs of signs seen and the number expected for independent
    # signs, 2 n1 n2 / n + 1 (Wald & Wolfowitz 1940; common practice).
    rng = np.random.default_rng(12)
    n = 200
    d = pd.DataFrame({"a": np.tile(["x", "y"], n // 2), "position": np.arange(n)})
    signs = np.array([1, -1, -1, 1, -1, 1, 1, -1])
    d["wall_s"] = np.exp(0.2 * (d.a == "y") + 0.05 * signs[np.arange(n) // 25]
                         + rng.normal(0, 0.01, n))
    an = analyze(d, factors=["a"], transform="log", comparisons=False, art=False)
    dr = an.diagnostics["drift"]
    r = np.asarray(an.residuals)
    nz = r[r != 0]
    n1 = int((nz > 0).sum())
    expected = 2.0 * n1 * (len(nz) - n1) / len(nz) + 1.0
    runs = 1 + int(np.count_nonzero(np.sign(nz[1:]) != np.sign(nz[:-1])))
    assert dr["runs_test"]["runs"] == runs
    assert f"({runs} runs of signs where about {expected:.0f} are expected" in dr["verdict"]
    assert runs < expected / 3


@pytest.mark.parametrize("lam", [0.5, -0.5, 2.0])
def test_derivative_of_the_inverse_box_cox(lam):
    # Reference: central differences of scipy.special.inv_boxcox. Outside the range the
    # inverse exists (1 + lam z <= 0) the derivative is not a number.
    from scipy.special import inv_boxcox

    from benchharness.analysis.transform import Choice, derivative_inverse

    ch = Choice("boxcox", lam, "planted")
    z = np.array([-0.5, 0.0, 0.3, 0.9]) / abs(lam)
    z = z[1.0 + lam * z > 0]
    h = 1e-6
    ref = (inv_boxcox(z + h, lam) - inv_boxcox(z - h, lam)) / (2 * h)
    np.testing.assert_allclose(derivative_inverse(z, ch), ref, rtol=1e-6)
    outside = np.array([(-1.0 - 0.5) / lam, (-1.0 - 1.5) / lam])   # 1 + lam z = -0.5, -1.5
    assert np.isnan(derivative_inverse(outside, ch)).all()
    np.testing.assert_allclose(derivative_inverse(np.array([0.2]), Choice("log", 0.0, "")),
                               np.exp([0.2]))
    np.testing.assert_allclose(derivative_inverse(np.array([0.2]), Choice("none", 1.0, "")),
                               [1.0])
