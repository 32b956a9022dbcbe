"""The one Holm adjustment (`analysis.comparisons.adjust_p`) against statsmodels.

Holm (1979): sort the m p-values, multiply the i-th smallest (0-based) by m − i,
cap at 1, then carry the running maximum forward (the monotone step) so an
adjusted p is never below the one of a smaller raw p. Every Holm-adjusted p of
the project (ANOVA terms, comparisons, a fraction's alias chains) comes from
this function (the fraction's chains are checked against statsmodels in
test_design_fraction_analysis.py).
"""

from __future__ import annotations

import numpy as np
import pytest

from benchharness.analysis.comparisons import adjust_p


def test_holm_matches_statsmodels_including_the_monotone_step():
    # source: statsmodels.stats.multitest.multipletests(method="holm")
    from statsmodels.stats.multitest import multipletests

    # sorted: 0.005·4 = 0.02, 0.01·3 = 0.03, 0.03·2 = 0.06, 0.04·1 = 0.04 -> 0.06 (monotone)
    p = [0.04, 0.01, 0.03, 0.005]
    ours = adjust_p(p, "holm")
    ref = multipletests(p, method="holm")[1]
    np.testing.assert_allclose(ours, ref, rtol=1e-12)
    # the step that matters: without the running maximum the largest p would be 0.04
    assert ours[0] == pytest.approx(0.06)
    assert ours[0] >= ours[2]


@pytest.mark.parametrize("seed", range(5))
def test_holm_matches_statsmodels_on_random_families(seed):
    # source: statsmodels.stats.multitest.multipletests(method="holm"); ties included
    from statsmodels.stats.multitest import multipletests

    rng = np.random.default_rng(seed)
    p = np.round(rng.uniform(0, 0.2, 12), 3)
    np.testing.assert_allclose(adjust_p(p, "holm"), multipletests(p, method="holm")[1],
                               rtol=1e-12)
    # adjusted p-values keep the order of the raw ones
    order = np.argsort(p, kind="stable")
    assert np.all(np.diff(adjust_p(p, "holm")[order]) >= 0)

