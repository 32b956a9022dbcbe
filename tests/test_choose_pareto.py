"""The confident Pareto front: allowance against scipy, and its false-drop rate by simulation."""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest
from scipy import stats

from benchharness.choose.pareto import pareto_front, tukey_allowance


def test_allowance_matches_scipy_tukey_hsd():
    # Source: scipy.stats.tukey_hsd intervals are diff +- q/sqrt(2) * s * sqrt(1/ni + 1/nj).
    rng = np.random.default_rng(3)
    groups = [rng.normal(m, 1, 6) for m in (0.0, 0.5, 1.0, 1.2)]
    ci = stats.tukey_hsd(*groups).confidence_interval(0.95)
    half = (ci.high[0, 1] - ci.low[0, 1]) / 2
    dfe = sum(g.size for g in groups) - len(groups)
    s = np.sqrt(sum(((g - g.mean()) ** 2).sum() for g in groups) / dfe)
    assert tukey_allowance(4, dfe, 0.95) * s * np.sqrt(2 / 6) == pytest.approx(half, rel=1e-6)


def _model(settings, means, n, sigma, df):
    return SimpleNamespace(settings=settings, goodness=np.asarray(means, float),
                           weights=np.full(len(means), 1.0 / n), sigma=sigma, df=df)


def _false_drop_rate(reps, seed, k=4, n=5):
    # All settings equal on both responses: any drop is a false one.
    rng = np.random.default_rng(seed)
    settings = tuple((str(i),) for i in range(k))
    df = k * (n - 1)
    drops = 0
    for _ in range(reps):
        models = []
        for _r in range(2):
            y = rng.normal(0, 1, (k, n))
            s = np.sqrt(((y - y.mean(1, keepdims=True)) ** 2).sum() / df)
            models.append(_model(settings, y.mean(1), n, s, df))
        drops += len(pareto_front(models, 0.95).front) < k
    return drops / reps


def test_equal_settings_are_rarely_dropped():
    # Planted: nothing dominates anything; the chance of any drop is at most alpha.
    assert _false_drop_rate(300, seed=1) <= 0.05 + 3 * np.sqrt(0.05 * 0.95 / 300)


@pytest.mark.slow
def test_false_drop_rate_long_simulation():
    assert _false_drop_rate(5000, seed=2) <= 0.05


def test_clear_domination_drops_and_names_the_winner():
    settings = (("a",), ("b",), ("c",))
    fast = _model(settings, [3.0, 2.0, 0.0], 5, 0.1, 12)
    lean = _model(settings, [0.0, 2.0, 3.0], 5, 0.1, 12)
    res = pareto_front([fast, lean], 0.95)
    assert res.front == (0, 1, 2)
    worse = _model(settings, [3.0, 2.0, 0.0], 5, 0.1, 12)
    also_worse = _model(settings, [3.0, 2.0, 0.0], 5, 0.1, 12)
    res = pareto_front([worse, also_worse], 0.95)
    assert res.front == (0,)
    assert res.dominated_by == (None, 0, 0)


def _boundary_drop_rate(reps, seed, k=4, n=5, noise=0.03, within=0.03):
    # Planted on the log scale: setting 0 is better than the others by exactly the margin
    # on the first response, all are equal on the second. Nothing is better *beyond* the
    # margin, so dropping any setting is a false drop.
    rng = np.random.default_rng(seed)
    settings = tuple((str(i),) for i in range(k))
    df = k * (n - 1)
    delta = np.log1p(within)
    truth = [np.r_[delta, np.zeros(k - 1)], np.zeros(k)]
    drops = 0
    for _ in range(reps):
        models = []
        for mu in truth:
            y = mu[:, None] + rng.normal(0, noise, (k, n))
            s = np.sqrt(((y - y.mean(1, keepdims=True)) ** 2).sum() / df)
            m = _model(settings, y.mean(1), n, s, df)
            m.scale = "log"
            models.append(m)
        drops += len(pareto_front(models, 0.95, within=within).front) < k
    return drops / reps


def test_a_difference_of_exactly_the_margin_rarely_drops_a_setting():
    # The margin rule's error rate at its boundary stays within alpha (fixed seed, short).
    assert _boundary_drop_rate(300, seed=5) <= 0.05 + 3 * np.sqrt(0.05 * 0.95 / 300)


@pytest.mark.slow
def test_margin_boundary_drop_rate_long_simulation():
    assert _boundary_drop_rate(4000, seed=6) <= 0.05


def test_the_margin_drops_a_setting_only_better_within_noise_elsewhere():
    # b is 20 % better on time; a's 1 % memory advantage is inside a 3 % margin: a is off
    # the front with the margin and on it without (strict rule).
    settings = (("a",), ("b",))
    time = _model(settings, [0.0, np.log(1.2)], 10, 0.02, 18)
    mem = _model(settings, [np.log(1.01), 0.0], 10, 0.002, 18)
    for m in (time, mem):
        m.scale = "log"
    assert pareto_front([time, mem], 0.95, within=0.03).front == (1,)
    assert pareto_front([time, mem], 0.95, within=0.0).front == (0, 1)
