"""The gate with occasional slow runs, flaky builds and builds that never succeed.

Planted-answer tests: the simulated system (`SimulatedExecutor`) draws run times
with a known slowdown ratio, noise, outlier rate and failure probabilities, and
the tests assert what the gate says (verdict, reason, exit code). Reference
checks name their source beside them.
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest

from benchharness.execute.base import RunSpec
from benchharness.execute.simulated import SimulatedExecutor, SimulatedModel
from benchharness.gate.decide import Block, GateSettings, judge
from benchharness.gate.failures import failure_verdict, pocock_spending, sign_boundaries
from benchharness.gate.orchestrate import run_gate
from benchharness.gate.robust import HUBER_C, huber_proposal2, robust_location, robust_t
from benchharness.gate.sequential import SpendingTracker, look_schedule

LEVELS = {"baseline": "old", "candidate": "new"}


def _sim(ratio, cv, seed, st=None, outliers=0.0, fail=None, workloads=1, warmup=1):
    model = SimulatedModel(effects={"build": {"old": 1.0, "new": ratio}}, cv=cv,
                           outlier_prob=outliers, failure_prob=fail or {})
    ex = SimulatedExecutor(model, seed=seed)
    wl = {f"w{i}": {"w": str(i)} for i in range(workloads)}
    return run_gate(wl, lambda k, r, i, w=False: RunSpec(levels={**wl[k], "build": LEVELS[r]}),
                    ex, st or GateSettings(), seed=seed + 1, warmup=warmup)


# ---------------------------------------------------------------- the estimate

def test_scale_step_matches_statsmodels_huber_proposal2():
    # Outside check: statsmodels.robust.scale.Huber (Huber's proposal 2, same c),
    # solved to convergence on both sides.
    from statsmodels.robust.scale import Huber

    rng = np.random.default_rng(4)
    for n in (8, 25, 60):
        x = rng.normal(0.1, 0.05, n)
        x[:2] += 0.4                        # two slow runs
        mu_ref, s_ref = Huber(c=HUBER_C, maxiter=1000, tol=1e-11)(x)
        mu, s, ok = huber_proposal2(x, iterations=1000, tol=1e-11)
        assert ok[0]
        assert mu[0] == pytest.approx(float(mu_ref), abs=1e-7)
        assert s[0] == pytest.approx(float(s_ref), rel=1e-6)


def test_location_solves_the_biweight_equation():
    # Outside check: statsmodels' TukeyBiweight psi (c = 4.685) sums to zero at the
    # estimate, with the scale held fixed (an M-estimate's defining equation).
    from statsmodels.robust.norms import TukeyBiweight

    rng = np.random.default_rng(5)
    x = rng.normal(0.05, 0.04, 40)
    x[[3, 17, 30]] += np.log(1.5)
    mu, se, s = robust_location(x)
    psi = TukeyBiweight(c=4.685).psi((x - mu[0]) / s[0])
    assert abs(psi.sum()) < 1e-6 * len(x)
    # the three slow runs get weight zero: the estimate is the clean values' centre
    clean = np.delete(x, [3, 17, 30])
    assert mu[0] == pytest.approx(np.mean(clean), abs=0.25 * np.std(clean) / math.sqrt(37) + 2e-3)
    assert abs(np.mean(x) - 0.05) > abs(mu[0] - 0.05)


def test_statistic_is_location_scale_equivariant():
    # the property that makes simulated null boundaries exact for any mu and sigma
    rng = np.random.default_rng(6)
    x = rng.standard_normal((50, 12))
    t1 = robust_t(x)
    t2 = robust_t(0.3 * x)
    mu1, se1, _ = robust_location(x)
    mu2, se2, _ = robust_location(5.0 + 2.0 * x)
    np.testing.assert_allclose(t1, t2, rtol=1e-6)
    np.testing.assert_allclose(mu2, 5.0 + 2.0 * mu1, rtol=1e-6, atol=1e-6)
    np.testing.assert_allclose(se2, 2.0 * se1, rtol=1e-6)


def test_robust_boundaries_keep_the_level_on_fresh_paths():
    # boundaries come from the tracker's seeded null paths; fresh normal paths
    # (another seed, any mu and sigma) must cross them at the spent rate
    looks = look_schedule(6, 14)
    tr = SpendingTracker(0.05, statistic="robust")
    bounds = [tr.boundary(n, 14, final=(n == 14)) for n in looks]
    R = 8000
    x = np.random.default_rng(12).normal(0.7, 3.0, (R, looks[-1]))
    crossed = np.zeros(R, dtype=bool)
    for n, b in zip(looks, bounds):
        mu, se, _ = robust_location(x[:, :n])
        crossed |= (mu - 0.7) / se >= b
    rate = crossed.mean()
    assert abs(rate - 0.05) < 3.5 * math.sqrt(0.05 * 0.95 / R)


def test_planted_outliers_barely_move_the_ratio():
    # planted: ratio 1.08, CV 3%, two blocks in 20 with a candidate run 1.5x as slow
    rng = np.random.default_rng(2)
    blocks = []
    for i in range(20):
        b = math.exp(rng.normal(0, 0.03))
        c = 1.08 * math.exp(rng.normal(0, 0.03)) * (1.5 if i in (4, 13) else 1.0)
        blocks.append(Block(b, c))
    from dataclasses import replace

    st = replace(GateSettings(), min_runs=20, max_runs=20)
    robust = judge(blocks, st)
    plain = judge(blocks, replace(st, estimator="mean"))
    assert robust.ratio == pytest.approx(1.08, abs=0.02)
    assert plain.ratio > 1.10                        # the mean is pulled up by the two runs
    assert robust.sd_log < 0.6 * plain.sd_log        # and its spread swells


# ---------------------------------------------------------------- gates with slow runs

def test_outliers_cost_few_runs_fixed_seed():
    # small fixed-seed version of the 2,000-gate figures (experiments/bench/gate_validation.py)
    G = 40
    clean = [_sim(1.0, 0.03, 300 + g) for g in range(G)]
    dirty = [_sim(1.0, 0.03, 300 + g, outliers=0.05) for g in range(G)]
    runs = lambda outs: np.mean([o.judgements["w0"].blocks for o in outs])  # noqa: E731
    assert runs(dirty) <= 1.3 * runs(clean)
    assert sum(o.verdict == "regression" for o in dirty) <= 2
    assert sum(o.verdict in ("no_regression", "improvement") for o in dirty) >= 0.85 * G
    # the plain mean needs several times the runs on the same runs
    plain = [_sim(1.0, 0.03, 300 + g, GateSettings(estimator="mean"), outliers=0.05)
             for g in range(10)]
    assert runs(plain) > 2.0 * runs(dirty[:10])
    # a real slowdown is still caught with outliers
    slow = [_sim(1.10, 0.03, 700 + g, outliers=0.05).verdict for g in range(G)]
    assert slow.count("regression") >= 0.85 * G


@pytest.mark.slow
def test_outlier_figures_from_2000_gates_each():
    """The gate's promises with 5% of runs 1.5x as slow, each from 2,000 seeded gates,
    judged with binomial uncertainty (3 standard errors where a rate is a bound)."""
    G = 2000

    def rates(ratio, cv, seed0, outliers):
        outs = [_sim(ratio, cv, seed0 + g, outliers=outliers) for g in range(G)]
        v = [o.verdict for o in outs]
        return v.count("regression") / G, np.mean([o.judgements["w0"].blocks for o in outs])

    for cv in (0.03, 0.05, 0.08):
        for outliers in (0.0, 0.05):
            fail, _ = rates(1.05, cv, 80_000, outliers)
            assert fail <= 0.045 + 3 * math.sqrt(0.045 * 0.955 / G), (cv, outliers, fail)
    _, clean = rates(1.0, 0.03, 90_000, 0.0)
    _, dirty = rates(1.0, 0.03, 90_000, 0.05)
    assert dirty <= 1.3 * clean
    power, _ = rates(1.10, 0.03, 95_000, 0.0)
    assert power >= 0.90 - 3 * math.sqrt(0.9 * 0.1 / G)


# ---------------------------------------------------------------- failure rates

def test_sign_boundaries_spend_at_most_the_level_exactly():
    # Outside check by enumeration: every one of the 2^K fair-coin paths of K = 14
    # discordant blocks, crossing probability summed exactly, against the spending
    # function; the first boundary against scipy.stats.binom.
    from scipy.stats import binom

    K, a = 14, 0.05
    u = sign_boundaries(K, a)
    crossed_at = np.zeros(K)
    for path in itertools.product((0, 1), repeat=K):
        s = np.cumsum(path)
        for k in range(K):
            if u[k] is not None and s[k] >= u[k]:
                crossed_at[k] += 0.5 ** K
                break
    spent = np.cumsum(crossed_at)
    for k in range(K):
        assert spent[k] <= pocock_spending((k + 1) / K, a) + 1e-12
    assert spent[-1] > 0.5 * a                 # and it is not wasted
    first = next(k for k in range(K) if u[k] is not None)
    assert binom.sf(u[first] - 1, first + 1, 0.5) <= pocock_spending((first + 1) / K, a)


def test_failure_test_tail_direction():
    # the candidate failing alone in k of k discordant blocks, at the first look with a
    # boundary, is a regression; the baseline failing alone as often never is
    u = sign_boundaries(100, 0.05)
    k = next(i + 1 for i, b in enumerate(u) if b is not None)
    assert u[k - 1] == k
    assert failure_verdict(k, 0, 100, 0.05) is not None
    assert failure_verdict(0, k, 100, 0.05) is None
    assert failure_verdict(k - 1, 0, 100, 0.05) is None
    assert failure_verdict(k, k, 100, 0.05) is None
    assert failure_verdict(1, 0, 100, 0.05) is None


def test_identical_flaky_builds_pass_and_the_tail_is_not_reversed_fixed_seed():
    # Planted: both builds the same, each run failing with probability 0.1. The old
    # rule (one candidate failure decides) failed about half of these gates.
    G = 120
    same = [_sim(1.0, 0.03, 4000 + g, fail={"build": {"old": 0.1, "new": 0.1}})
            for g in range(G)]
    false_fail = sum(o.verdict == "regression" for o in same)
    assert false_fail <= 0.05 * G + 3 * math.sqrt(0.05 * 0.95 * G)
    assert sum(o.verdict in ("no_regression", "improvement") for o in same) >= 0.8 * G
    # candidate fails 30% of its runs, baseline never: regression (same timings)
    worse = [_sim(1.0, 0.03, 5000 + g, fail={"build": {"new": 0.3}}) for g in range(40)]
    assert sum(o.verdict == "regression" for o in worse) >= 0.6 * 40
    assert all("fails more often" in o.judgements["w0"].reason
               for o in worse if o.verdict == "regression")
    # reversed: baseline fails 30%, candidate never: never a regression
    better = [_sim(1.0, 0.03, 6000 + g, fail={"build": {"old": 0.3}}) for g in range(40)]
    assert not any(o.verdict == "regression" for o in better)


@pytest.mark.slow
def test_equal_failure_rates_false_fail_rate_2000_gates():
    G = 2000
    for p in (0.1, 0.3):
        outs = [_sim(1.0, 0.03, 200_000 + g, fail={"build": {"old": p, "new": p}})
                for g in range(G)]
        k = sum(o.verdict == "regression" for o in outs)
        assert k / G <= 0.05 + 3 * math.sqrt(0.05 * 0.95 / G), (p, k)


# ---------------------------------------------------------------- builds that never succeed

@pytest.mark.parametrize("broken", ["old", "new"])
def test_a_build_that_never_succeeds_stops_at_once_with_exit_5(broken):
    out = _sim(1.0, 0.03, 11, fail={"build": {broken: 1.0}}, workloads=2)
    assert out.verdict == "never_ok"
    assert out.exit_code() == 5 and out.exit_code("pass") == 5 and out.exit_code("fail") == 5
    role = "baseline" if broken == "old" else "candidate"
    reasons = [j.reason for j in out.judgements.values() if j.verdict == "never_ok"]
    assert len(reasons) == 1 and f"the {role} failed all 3 of its runs" in reasons[0]
    # one warm-up and two blocks of the first workload tried, at most a few runs in all
    assert out.runs <= 2 * 2 * 2
    others = [j for j in out.judgements.values() if j.verdict != "never_ok"]
    assert all(j.verdict == "inconclusive" and "not judged" in j.reason for j in others)


def test_a_flaky_build_is_not_called_never_ok():
    # fails 1 run in 2 (warm-up included): the first three runs all fail 1 time in 8
    outs = [_sim(1.0, 0.03, 900 + g, fail={"build": {"new": 0.5}}) for g in range(40)]
    never = sum(o.verdict == "never_ok" for o in outs)
    assert never <= 12
    assert sum(o.verdict == "regression" for o in outs) >= 25


def test_a_candidate_that_only_fails_more_often_is_not_called_slower():
    # Planted: the same timings (ratio 1.00), the candidate failing 40% of its runs.
    # The gate fails it (exit 1), but what it says must be the failure rate, not
    # "slower than the tolerance allows": the ratio is inside the tolerance.
    import xml.etree.ElementTree as ET

    from benchharness.gate.output import junit_xml, markdown_summary, terminal_lines

    outs = [_sim(1.0, 0.03, 7100 + g, fail={"build": {"new": 0.4}}) for g in range(12)]
    by_fail = [o for o in outs if o.verdict == "regression"]
    assert len(by_fail) >= 8
    for o in by_fail:
        j = o.judgements["w0"]
        assert "fails more often" in j.reason and j.ratio < 1.05
        text = "\n".join(terminal_lines(o))
        assert "verdict: worse: the candidate fails more often than the baseline" in text
        assert "slower" not in text.lower()
        row = text.splitlines()[2].split()
        assert row[:2] == ["w0", "worse"] and "fails more often" in text.splitlines()[2]
        md = markdown_summary(o)
        assert "fails more often" in md and "slower" not in md.lower()
        msg = ET.fromstring(junit_xml(o).split("\n", 1)[1]).find(".//failure").get("message")
        assert msg.startswith("worse: fails more often than the baseline")
        assert "slower" not in msg
        assert "bounds no bounds" not in junit_xml(o)
    # a candidate planted 30% slower that never fails is still said to be slower
    slow = _sim(1.3, 0.03, 7200)
    assert slow.verdict == "regression"
    text = "\n".join(terminal_lines(slow))
    assert "verdict: worse: the candidate is slower than the tolerance allows" in text
    assert text.splitlines()[2].split()[:2] == ["w0", "worse"]
    assert "fails more often" not in text


def test_slow_runs_do_not_push_the_statistic_past_its_clean_tail():
    # Small fixed-seed version of `gate_validation.py --sections tails`: with 5% of runs
    # 1.5x as slow at noise CV 5% (a slow run about six scales out, where the biweight
    # keeps part of its weight), the studentized resistant statistic at one look passes
    # its clean-noise upper 1% point no more often than clean noise does (binomial
    # allowance for 20,000 samples: 1% + 3 sd = 1.21%). An understated standard error
    # would push this share well above 1%.
    rng = np.random.default_rng(11)
    paths, n = 20_000, 10
    q99 = np.quantile(robust_t(rng.standard_normal((paths, n))), 0.99)
    s = math.sqrt(math.log1p(0.05 ** 2))
    slow = math.log(1.5)
    d = (rng.normal(0, s, (paths, n)) + slow * (rng.random((paths, n)) < 0.05)
         - rng.normal(0, s, (paths, n)) - slow * (rng.random((paths, n)) < 0.05))
    share = float(np.mean(robust_t(d) > q99))
    assert share <= 0.0121
    # and the slow runs are really there: the plain mean moves by more than the noise says
    assert np.mean(np.abs(d) > 4 * s * math.sqrt(2)) > 0.05
