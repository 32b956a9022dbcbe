"""The gate's counts as it reports them: failures per build, the JUnit tallies, the
overall verdict and its exit code (DEVELOPERS.md, "Exit codes").

Planted truths, written to kill mutants that survived the rest of the suite
(DEVELOPERS.md, "Mutation testing").
"""

from __future__ import annotations

import xml.etree.ElementTree as ET

import pytest

from benchharness.execute.base import RunSpec
from benchharness.execute.simulated import SimulatedExecutor, SimulatedModel
from benchharness.gate.decide import GateSettings, Judgement
from benchharness.gate.orchestrate import GateOutcome, run_gate
from benchharness.gate.output import junit_xml

LEVELS = {"baseline": "old", "candidate": "new"}


def _gate(fail, seed=11, warmup=1):
    model = SimulatedModel(effects={"build": {"old": 1.0, "new": 1.0}}, cv=0.03,
                           failure_prob=fail)
    wl = {"w0": {"w": "0"}}
    return run_gate(wl, lambda k, r, i, w=False: RunSpec(levels={**wl[k], "build": LEVELS[r]}),
                    SimulatedExecutor(model, seed=seed), GateSettings(), seed=seed + 1,
                    warmup=warmup)


def test_both_builds_never_ok_count_every_failed_run_of_each():
    # Planted: every run of both builds fails. The gate stops as soon as it may, saying
    # both never ran successfully, and counts each build's failed timed runs: all of them.
    out = _gate({"build": {"old": 1.0, "new": 1.0}})
    j = out.judgements["w0"]
    assert out.verdict == "never_ok" and out.exit_code() == 5
    assert j.blocks >= 1
    assert j.baseline_failures == j.candidate_failures == j.blocks
    assert "the baseline failed all" in j.reason and "the candidate failed all" in j.reason


def _judgement(verdict):
    return Judgement(verdict=verdict, blocks=10, usable_blocks=10, ratio=1.0, lower=0.98,
                     upper=1.02, horizon_blocks=20, alpha=0.05, reason=f"planted {verdict}")


def _outcome(verdicts):
    js = {f"w{i}": _judgement(v) for i, v in enumerate(verdicts)}
    return GateOutcome(settings=GateSettings(), response="wall_s", judgements=js,
                       workload_levels={k: {"w": k} for k in js}, runs=40, warmups=2)


TAG = {"regression": ["failure"], "no_regression": [], "improvement": [],
       "inconclusive": ["skipped"], "never_ok": ["error"]}


@pytest.mark.parametrize("verdicts", [
    ["regression", "no_regression", "improvement", "inconclusive", "never_ok"],
    ["improvement", "improvement", "no_regression"],
    ["inconclusive", "inconclusive", "regression", "regression", "regression"],
])
def test_junit_tallies_match_the_cases_they_count(verdicts):
    # The suite's attributes count its test cases by outcome: tests (all), failures
    # (cases with <failure>), skipped (<skipped>), errors (<error>) -- JUnit XML, common
    # practice. Planted: workloads with known verdicts.
    root = ET.fromstring(junit_xml(_outcome(verdicts)).split("\n", 1)[1])
    suite = root.find("testsuite")
    cases = suite.findall("testcase")
    assert len(cases) == len(verdicts) == int(suite.get("tests"))
    kinds = {c.get("name"): [e.tag for e in c if e.tag != "system-out"] for c in cases}
    assert kinds == {f"w{i}": TAG[v] for i, v in enumerate(verdicts)}
    for attr, tag in (("failures", "failure"), ("skipped", "skipped"), ("errors", "error")):
        want = sum(TAG[v] == [tag] for v in verdicts)
        assert int(suite.get(attr)) == sum(tag in k for k in kinds.values()) == want, attr


@pytest.mark.parametrize("verdicts,overall,codes", [
    (["no_regression", "improvement"], "no_regression", (0, 0, 0)),
    (["improvement", "improvement"], "improvement", (0, 0, 0)),
    (["inconclusive", "improvement"], "inconclusive", (3, 0, 1)),
    (["inconclusive", "regression"], "regression", (1, 1, 1)),
    (["regression", "never_ok"], "never_ok", (5, 5, 5)),
    ([None, "no_regression"], "inconclusive", (3, 0, 1)),
])
def test_overall_verdict_and_exit_code(verdicts, overall, codes):
    # the worst workload decides: a build that never ran > a regression > inconclusive
    # (or still open) > no regression; all improvements make an improvement. Exit codes
    # 0 / 1 / 3 / 5, with --inconclusive pass|fail mapping only the inconclusive one.
    out = _outcome(verdicts)
    assert out.verdict == overall
    assert (out.exit_code(), out.exit_code("pass"), out.exit_code("fail")) == codes


@pytest.mark.parametrize("workloads,warmup", [(1, 1), (2, 2)])
def test_runs_and_warmups_counted_as_made(workloads, warmup):
    # Planted: a clean gate (ratio 1.00, CV 3%). Each block is one timed run of each
    # build, so the timed runs are twice the blocks over all workloads; each warm-up
    # round runs both builds of every workload once.
    model = SimulatedModel(effects={"build": {"old": 1.0, "new": 1.0}}, cv=0.03)
    wl = {f"w{i}": {"w": str(i)} for i in range(workloads)}
    ex = SimulatedExecutor(model, seed=5)
    out = run_gate(wl, lambda k, r, i, w=False: RunSpec(levels={**wl[k], "build": LEVELS[r]}),
                   ex, GateSettings(), seed=6, warmup=warmup)
    assert out.runs == 2 * sum(j.blocks for j in out.judgements.values()) > 0
    assert out.warmups == 2 * workloads * warmup


@pytest.mark.parametrize("looks", [(2, 4, 8, 16, 30), (5, 10, 20, 40, 60)])
def test_t_boundaries_spend_the_level_as_scheduled(looks):
    # Outside check by an independent simulation (numpy, another seed): 20,000 Gaussian
    # paths, one-sample t statistics at the looks; the share first crossing the
    # boundaries by each look matches the O'Brien-Fleming-type spending (Lan & DeMets
    # 1983) within 4 standard errors, and every look has a boundary (early looks that
    # may spend nothing are +inf, never dropped).
    import math

    import numpy as np

    from benchharness.gate.sequential import obf_spending, t_boundaries

    alpha, paths = 0.05, 20_000
    b = t_boundaries(looks, alpha, paths=paths)
    assert len(b) == len(looks)
    rng = np.random.default_rng(2024)
    x = rng.normal(size=(paths, looks[-1]))
    alive = np.ones(paths, dtype=bool)
    crossed = 0
    for n, bound in zip(looks, b):
        m, s = x[:, :n].mean(axis=1), x[:, :n].std(axis=1, ddof=1)
        t = math.sqrt(n) * m / s
        hit = alive & (t >= bound)
        crossed += int(hit.sum())
        alive &= ~hit
        want = obf_spending(n / looks[-1], alpha) if n < looks[-1] else alpha
        se = math.sqrt(max(want, 1e-4) * (1 - want) / paths)
        assert abs(crossed / paths - want) <= 4 * se + 1e-4, (n, crossed / paths, want)
    if looks[0] == 2:
        assert b[0] == math.inf     # the first look may spend nothing at all


def test_failure_verdict_is_a_regression_exactly_at_or_beyond_the_boundary():
    # The sign test calls a regression when the candidate-only count reaches the boundary
    # u_k at look k, and also when it is beyond it (more failures never help a build).
    from benchharness.gate.failures import failure_verdict, sign_boundaries

    K = 40
    u = sign_boundaries(K, 0.05)
    seen_beyond = 0
    for k in range(1, K + 1):
        for s in range(k + 1):
            called = failure_verdict(s, k - s, K, 0.05) is not None
            want = u[k - 1] is not None and s >= u[k - 1] and s > k - s
            assert called == want, (k, s, u[k - 1])
            seen_beyond += want and s > u[k - 1]
    assert seen_beyond > 0        # counts beyond the boundary were checked


@pytest.mark.parametrize("first,horizon", [(2, 10), (5, 200), (6, 6), (8, 1000), (3, 57)])
def test_look_schedule_spans_first_to_horizon_in_equal_steps(first, horizon):
    import math

    from benchharness.gate.sequential import MAX_LOOKS, look_schedule

    looks = look_schedule(first, horizon)
    assert looks[0] == first and looks[-1] == horizon
    assert len(looks) <= MAX_LOOKS
    assert all(b > a for a, b in zip(looks, looks[1:]))
    g = max(1, math.ceil((horizon - first) / (MAX_LOOKS - 1)))
    assert all(b - a == g for a, b in zip(looks[:-1], looks[1:-1]))
    assert 0 < looks[-1] - looks[-2] <= g if len(looks) > 1 else looks == (first,)


def test_robust_location_of_one_sample_is_that_of_a_one_row_table():
    import numpy as np

    from benchharness.gate.robust import robust_location

    x = np.random.default_rng(3).normal(0.05, 0.02, 30)
    one = robust_location(x)
    table = robust_location(x[None, :])
    for a, b in zip(one, table):
        assert np.shape(a) == (1,)
        np.testing.assert_allclose(a, b, rtol=0, atol=0)


@pytest.mark.parametrize("alpha,beta,d", [(0.05, 0.2, 0.4), (0.025, 0.2, 0.48), (0.05, 0.1, 0.59),
                                          (0.05, 0.05, 0.35)])
def test_fixed_pairs_is_the_smallest_n_with_the_power(alpha, beta, d):
    # Reference: statsmodels TTestPower (one-sample t test, alternative "larger"): the
    # fixed size is the smallest whole number of pairs whose power reaches 1 - beta. The
    # first three cases sit where the power at n - 1 is just short of the target, so one
    # degree of freedom more or less in the critical value changes the answer.
    from statsmodels.stats.power import TTestPower

    from benchharness.gate.sequential import fixed_pairs

    n = fixed_pairs(alpha, beta, d)
    pw = TTestPower()
    assert pw.power(effect_size=d, nobs=n, alpha=alpha, alternative="larger") >= 1 - beta - 1e-9
    assert pw.power(effect_size=d, nobs=n - 1, alpha=alpha, alternative="larger") < 1 - beta


def _gate_exp(extra):
    from benchharness.experiment.file import Experiment

    return Experiment.from_text(
        "experiment: g\ncommand: [echo, '{build}']\nfactors:\n  build: [old, new]\n"
        f"gate: {{factor: build, baseline: old, candidate: new{extra}}}\n")


def test_gate_direction_lower_or_higher_else_a_clear_error():
    from benchharness.errors import ExperimentError
    from benchharness.gate.session import parse_gate_section

    assert parse_gate_section(_gate_exp(", better: lower")).settings.higher_is_better is False
    assert parse_gate_section(_gate_exp(", better: higher")).settings.higher_is_better is True
    # `direction:` is the deprecated spelling of `better:` (docs/cli.md): still read
    assert parse_gate_section(_gate_exp(", direction: higher")).settings.higher_is_better is True
    assert parse_gate_section(_gate_exp("")).settings.higher_is_better is False
    with pytest.raises(ExperimentError, match="'gate: better' must be lower"):
        parse_gate_section(_gate_exp(", better: sideways"))


def test_markdown_summary_states_tolerance_and_confidence_in_percent():
    # GateSettings' defaults are the documented 5% tolerance at 95% confidence
    from benchharness.gate.output import markdown_summary

    out = _outcome(["no_regression"])
    s = out.settings
    assert (s.tolerance, s.confidence) == (0.05, 0.95)
    assert "tolerance 5%, 95% confidence)." in markdown_summary(out)


@pytest.mark.parametrize("value", ["150%", "100%", "0.4"])
def test_a_gate_confidence_outside_one_half_to_one_is_refused(value):
    # a confidence of 100% or more can never be reached, one of 50% or less decides nothing
    from benchharness.errors import ExperimentError
    from benchharness.gate.session import parse_gate_section

    with pytest.raises(ExperimentError, match="'gate: confidence' must be between 0.5 and 1"):
        parse_gate_section(_gate_exp(f", confidence: {value}"))
    assert parse_gate_section(_gate_exp(", confidence: 99%")).settings.confidence == 0.99
