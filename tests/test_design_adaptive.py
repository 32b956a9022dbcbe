"""Adaptive replication (stopping rule) and time budgets."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from benchharness.design import adaptive, budget
from benchharness.errors import ExperimentError
from benchharness.experiment.file import Experiment

BASE = """\
experiment: codecs
command: [python3, -c, "pass", "{codec}", "{level}"]
factors:
  codec: [zlib, lzma, bz2]
  level: [1, 9]
seed: 4
"""
LEVELS = {"codec": ["zlib", "lzma", "bz2"], "level": ["1", "9"]}


def runs_table(reps, sigma, seed, start=1):
    rng = np.random.default_rng(seed)
    rows = []
    for r in range(start, start + reps):
        for c in LEVELS["codec"]:
            for lv in LEVELS["level"]:
                mu = {"zlib": 0.0, "lzma": 0.3, "bz2": 0.1}[c] + (0.2 if lv == "9" else 0)
                rows.append({"replicate": r, "codec": c, "level": lv, "status": "ok",
                             "wall_s": math.exp(mu + rng.normal(0, sigma))})
    return pd.DataFrame(rows)


def test_rule_is_read_from_the_experiment_file():
    e = Experiment.from_text(BASE + "replicates: {until: {ratio_halfwidth: 2%}, max: 40, min: 4}\n")
    rule = adaptive.adaptive_rule(e)
    assert rule == adaptive.AdaptiveRule(0.02, 40, 4, 0.95, "wall_s")
    assert e.replicates == 4
    assert adaptive.adaptive_rule(Experiment.from_text(BASE + "replicates: 3\n")) is None


def test_rule_may_watch_a_custom_metric_or_steady_s():
    text = (BASE + "replicates: {until: {ratio_halfwidth: 2%, response: rate_rps}}\n"
            "metrics:\n  rate_rps: {pattern: 'rate ([0-9.]+)', better: higher}\n")
    assert adaptive.adaptive_rule(Experiment.from_text(text)).response == "rate_rps"
    text = (BASE + "replicates: {until: {ratio_halfwidth: 2%, response: steady_s}}\n"
            "samples: {format: lines}\n")
    assert adaptive.adaptive_rule(Experiment.from_text(text)).response == "steady_s"


@pytest.mark.parametrize("text, fragment", [
    ("replicates: {max: 10}\n", "needs the key 'until'"),
    ("replicates: {until: {ratio_halfwidth: 2%}, max: 3, min: 5}\n", "below 'min'"),
    ("replicates: {until: {width: 2%}}\n", "unknown key 'width'"),
    ("replicates: {until: {ratio_halfwidth: 200%}}\n", "between 0% and 100%"),
    ("replicates: {until: {ratio_halfwidth: 2%, response: wal_s}}\n", "not a measured response"),
])
def test_bad_rules(text, fragment):
    e = Experiment.from_text(BASE + text, path="c.yaml")
    with pytest.raises(ExperimentError, match=fragment) as info:
        adaptive.adaptive_rule(e)
    assert str(info.value).startswith("c.yaml:7:")


def test_intervals_match_statsmodels_cell_means_model():
    # Reference: statsmodels OLS of ln(wall_s) on the full-interaction model; the level
    # contrast of equal-weight marginal means and its t interval (balanced design).
    import statsmodels.formula.api as smf

    runs = runs_table(4, 0.05, seed=2)
    iv, problem = adaptive.main_effect_intervals(runs, LEVELS)
    assert problem is None
    df = runs.assign(ly=np.log(runs.wall_s))
    fit = smf.ols("ly ~ C(codec, Sum) * C(level, Sum)", data=df).fit()
    # level 9 vs 1 on the sum-coded model: difference = -2 * coefficient of level[S.1].
    name = [p for p in fit.params.index if p.startswith("C(level, Sum)[S.") and ":" not in p][0]
    d = -2 * fit.params[name]
    se = 2 * fit.bse[name]
    tq = __import__("scipy").stats.t.ppf(0.975, fit.df_resid)
    row = [r for r in iv if r["factor"] == "level"][0]
    assert row["ratio"] == pytest.approx(math.exp(d), rel=1e-9)
    assert row["low"] == pytest.approx(math.exp(d - tq * se), rel=1e-9)
    assert row["halfwidth"] == pytest.approx(math.expm1(tq * se), rel=1e-9)
    assert len([r for r in iv if r["factor"] == "codec"]) == 3


def test_decide_continues_then_stops():
    rule = adaptive.AdaptiveRule(0.03, 30, 3)
    few = runs_table(2, 0.05, seed=3)
    d = adaptive.decide(few, LEVELS, rule)
    assert not d.stop and "minimum" in d.reason
    noisy = runs_table(3, 0.05, seed=3)
    d = adaptive.decide(noisy, LEVELS, rule)
    assert not d.stop and d.projected_replicates > 3
    # Keep adding replicates, as the runner would, until the rule stops.
    reps = 3
    table = noisy
    while not d.stop:
        table = pd.concat([table, runs_table(1, 0.05, seed=100 + reps, start=reps + 1)])
        reps += 1
        d = adaptive.decide(table, LEVELS, rule)
    assert d.widest["halfwidth"] <= 0.03 and "within" in d.reason
    assert reps < 30
    # The half-width is that of the widest pairwise level ratio.
    assert d.widest["halfwidth"] == max(i["halfwidth"] for i in d.intervals)
    assert d.to_json_dict()["stop"] is True


def test_decide_stops_at_max():
    rule = adaptive.AdaptiveRule(0.001, 4, 2)
    d = adaptive.decide(runs_table(4, 0.2, seed=1), LEVELS, rule)
    assert d.stop and "maximum" in d.reason


def test_missing_cell_keeps_going():
    runs = runs_table(3, 0.05, seed=1)
    runs.loc[(runs.codec == "bz2") & (runs.level == "9"), "status"] = "failed"
    d = adaptive.decide(runs, LEVELS, adaptive.AdaptiveRule(0.05, 10, 3))
    assert not d.stop and "bz2" in d.reason


def _pilot(sec_per_cell, overhead, reps=2):
    t0 = pd.Timestamp("2026-03-01T10:00:00Z")
    clock = 0.0
    rows = []
    for r in range(reps):
        for (c, lv), s in sec_per_cell.items():
            rows.append({"replicate": r + 1, "codec": c, "level": lv, "status": "ok",
                         "wall_s": s, "started_at": (t0 + pd.Timedelta(seconds=clock)).isoformat()})
            clock += s + overhead
    return pd.DataFrame(rows)


def test_pilot_timing_and_plan_estimate():
    from benchharness.design import build_plan

    secs = {(c, lv): 0.5 + 0.1 * i for i, (c, lv) in
            enumerate((c, lv) for c in LEVELS["codec"] for lv in LEVELS["level"])}
    timing = budget.pilot_timing(_pilot(secs, 0.2), ["codec", "level"])
    assert timing.overhead_s == pytest.approx(0.2, abs=1e-6)
    exp = Experiment.from_text(BASE + "replicates: 4\nwarmup: 1\n")
    est = budget.estimate_plan(build_plan(exp), timing)
    per_rep = sum(secs.values()) + 6 * 0.2
    assert est.timed_s == pytest.approx(4 * per_rep)
    assert est.warmup_s == pytest.approx(per_rep)
    assert est.total_s == pytest.approx(5 * per_rep)
    assert budget.replicates_in_budget(10 * per_rep + 1, per_rep, est.warmup_s) == 9


def test_plan_estimate_counts_cells_the_pilot_lacks():
    from benchharness.design import build_plan

    exp = Experiment.from_text(BASE + "replicates: 2\n")
    # a pilot of codec zlib only: 4 of the 6 cells are not in it
    secs = {("zlib", "1"): 0.5, ("zlib", "9"): 0.7}
    est = budget.estimate_plan(build_plan(exp), budget.pilot_timing(_pilot(secs, 0.0),
                                                                     ["codec", "level"]))
    assert est.cells_without_pilot == 4 and "4 cells were not in the pilot" in est.notes[0]
    # a pilot of another experiment (no shared factor) says so
    other = _pilot(secs, 0.0).rename(columns={"codec": "x", "level": "y"})
    est = budget.estimate_plan(build_plan(exp), budget.pilot_timing(other, ["codec", "level"]))
    assert "none of this experiment's factors" in est.notes[0]
    assert est.timed_s == pytest.approx(12 * 0.6)


def test_next_replicate_fits():
    ok, why = budget.next_replicate_fits(600, 100, [120, 130])
    assert ok and "mean of 2" in why
    ok, why = budget.next_replicate_fits(600, 480, [120, 130])
    assert not ok and "stopping" in why
    ok, _ = budget.next_replicate_fits(600, 0, [], estimate_s=700)
    assert not ok
    assert budget.next_replicate_fits(600, 0, [])[0]
