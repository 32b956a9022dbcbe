"""What the gate SAYS when it cannot decide, and when it fails a candidate for failing
more often: the reason the planted data support, with numbers from
`benchharness.numbers` (docs/gate.md, "Why undecided", "Failures decide by rate").

In-process on planted blocks with the plain-mean estimator (its boundary table is
cheap to build), so the wording is checked without real processes.
"""

from __future__ import annotations

import json
import math
import random
import re
import xml.etree.ElementTree as ET

import pytest

from benchharness.execute.base import RunSpec
from benchharness.execute.simulated import SimulatedExecutor, SimulatedModel
from benchharness.gate import output
from benchharness.gate.decide import Block, GateSettings, judge
from benchharness.gate.orchestrate import GateOutcome, run_gate

LEVELS = {"baseline": "old", "candidate": "new"}


def _blocks(ratio, sd_log, n, seed):
    """n pairs whose log slowdown is log(ratio) plus normal noise of sd ``sd_log``."""
    rng = random.Random(seed)
    return [Block(1.0, ratio * math.exp(rng.gauss(0.0, sd_log))) for _ in range(n)]


def _settings(pairs):
    return GateSettings(max_runs=pairs, estimator="mean")


def _outcome(j, settings):
    return GateOutcome(settings=settings, response="wall_s", judgements={"w0": j},
                       workload_levels={"w0": {"w": "0"}}, runs=2 * j.blocks, warmups=2)


def test_noise_not_closeness_keeps_a_far_ratio_undecided_and_the_budget_it_names_settles_it():
    # Planted: the candidate is 1.30x as slow (far beyond the 5% tolerance), but the
    # pairs' log slowdowns scatter with sd 0.4, and the budget is 8 pairs. The interval
    # straddles 1.05x because it is wide, not because the ratio is near 1.05x: the
    # reason must say the runs were too noisy for the budget, never "too close".
    s = _settings(8)
    j = judge(_blocks(1.30, 0.4, 8, seed=7), s)
    assert j.verdict == "inconclusive" and j.lower < 1.05 < j.upper
    assert "too noisy for the budget" in j.reason, j.reason
    assert "too close" not in j.reason
    assert "would likely settle a ratio this far from 1.05×" in j.reason
    text = "\n".join(output.terminal_lines(_outcome(j, s)))
    assert "too noisy for the budget" in text and "too close" not in text
    need = int(re.search(r"about ([\d,]+) pairs", j.reason).group(1).replace(",", ""))
    assert 8 < need < 100
    # ... and the budget it names does settle it: with that many pairs, a ratio and a
    # spread as estimated are called worse in most of 20 fresh gates (the reason
    # promises "likely": 9 in 10 by its normal approximation)
    called = sum(judge(_blocks(j.ratio, j.sd_log, need, seed=100 + g), _settings(need)).verdict
                 == "regression" for g in range(20))
    assert called >= 14, called


def test_a_ratio_at_the_tolerance_is_said_to_be_too_close_not_too_noisy():
    # Planted: the candidate is exactly 1.05x (the tolerance) with little noise (sd
    # 0.004): the bounds are narrow and still contain 1.05x. Closeness is the reason.
    s = _settings(100)
    j = judge(_blocks(1.05, 0.004, 100, seed=2), s)
    assert j.verdict == "inconclusive" and j.lower < 1.05 < j.upper
    assert j.upper / j.lower < 1.05            # narrow bounds
    assert "too close to the tolerance 1.05× to tell" in j.reason, j.reason
    assert "noisy" not in j.reason


def test_noise_with_the_estimate_near_the_tolerance_says_both():
    # Planted: ratio 1.05x with sd 0.3 and 8 pairs: too noisy, and the estimate came
    # out near 1.05x, so the budget it names would settle only a ratio well away from
    # 1.05x, which it says.
    j = judge(_blocks(1.05, 0.3, 8, seed=7), _settings(8))
    assert j.verdict == "inconclusive"
    assert "too noisy for the budget" in j.reason
    assert "if the true ratio is outside" in j.reason and "near the tolerance" in j.reason


def _failing_gate(seed):
    # Planted: the same timings (ratio 1.00, CV 3%); the candidate fails 45% of its
    # runs, the baseline 2%.
    model = SimulatedModel(effects={"build": {"old": 1.0, "new": 1.0}}, cv=0.03,
                           failure_prob={"build": {"new": 0.45, "old": 0.02}})
    wl = {"w0": {"w": "0"}}
    return run_gate(wl, lambda k, r, i, w=False: RunSpec(levels={**wl[k], "build": LEVELS[r]}),
                    SimulatedExecutor(model, seed=seed), GateSettings(estimator="mean"),
                    seed=seed + 1, warmup=1)


def test_a_worse_by_failure_rate_states_both_rates_with_their_intervals_everywhere():
    from statsmodels.stats.proportion import proportion_confint

    out = _failing_gate(5)
    j = out.judgements["w0"]
    assert out.verdict == "regression" and output.by_failures(j)
    n, fc, fb = j.blocks, j.candidate_failures, j.baseline_failures
    assert fc > fb
    # reference: statsmodels' Wilson score interval (Wilson 1927) at the gate's confidence
    ref_c = proportion_confint(fc, n, alpha=0.05, method="wilson")
    ref_b = proportion_confint(fb, n, alpha=0.05, method="wilson")

    def pct(x):
        return f"{100 * x:.0f}%"

    said_c = f"{pct(fc / n)} [{pct(ref_c[0])} to {pct(ref_c[1])}]"
    said_b = f"{pct(fb / n)} [{pct(ref_b[0])} to {pct(ref_b[1])}]"
    cell = f"fails {said_c} vs {said_b}"
    term = "\n".join(output.terminal_lines(out))
    assert cell in term and "no bounds" not in term
    md = output.markdown_summary(out)
    assert cell in md and "no bounds" not in md
    junit = output.junit_xml(out)
    failure = ET.fromstring(junit.split("\n", 1)[1]).find(".//failure")
    assert failure.get("message").startswith(f"worse: fails more often than the baseline: {cell}")
    assert "no bounds" not in junit
    doc = json.loads(json.dumps(output.to_json_dict(out)))["workloads"][0]
    rates = doc["failure_rates"]
    assert rates["candidate"]["failed"] == fc and rates["candidate"]["runs"] == n
    assert rates["candidate"]["lower"] == pytest.approx(ref_c[0], abs=1e-12)
    assert rates["candidate"]["upper"] == pytest.approx(ref_c[1], abs=1e-12)
    assert rates["baseline"]["upper"] == pytest.approx(ref_b[1], abs=1e-12)
    assert f"{said_c} of its runs vs {said_b} of the baseline's" in doc["reason"]


def test_counts_in_gate_reasons_take_the_right_number():
    # planted: a budget of 3 blocks where both builds failed in two, so one block is usable;
    # the reason counts it in the singular ("1 block", never "1 blocks")
    from benchharness.gate.decide import Block, GateSettings, judge

    failed = Block(None, None, "failed", "failed")
    j = judge([Block(1.0, 1.0), failed, failed], GateSettings(max_runs=3, min_runs=2))
    assert j.verdict == "inconclusive"
    assert j.reason == "only 1 block with both runs ok within the budget"
