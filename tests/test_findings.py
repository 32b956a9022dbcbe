"""Findings and comparisons: what the analysis *says*, checked against planted truths.

Data are simulated with fixed seeds (planted answers, invented for the test);
adjusted p-values are checked against statsmodels' ``multipletests`` and the
tied-set rule for two cells against scipy's two-sample t test.
"""

from __future__ import annotations

import json
import math
import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from benchharness.analysis import analyze

ROOT = Path(__file__).resolve().parents[1]


def crossover_frame(seed=3, reps=4, sigma=0.1):
    """A slows things ×2.5 when B=off and speeds them ×0.43 when B=on; C, D do nothing."""
    rng = np.random.default_rng(seed)
    rows = []
    for a in ("lo", "hi"):
        for b in ("off", "on"):
            for c in ("x", "y"):
                for _ in range(reps):
                    m = 1.0
                    if a == "hi":
                        m *= 2.5 if b == "off" else 0.43
                    rows.append({"A": a, "B": b, "C": c,
                                 "wall_s": 0.1 * m * math.exp(rng.normal(0, sigma))})
    return pd.DataFrame(rows)


def run_cli(*args):
    """The command a user would type (in this process: conftest's `run_main`); a wide
    terminal so the headline is one line."""
    from conftest import run_main

    return run_main(*args, env={"COLUMNS": "1000"})


def test_crossover_headline_states_the_interaction_per_level(tmp_path):
    csv = tmp_path / "cross.csv"
    crossover_frame().to_csv(csv, index=False)
    out = tmp_path / "a.json"
    r = run_cli("analyze", csv, "--factors", "A,B,C", "--transform", "log", "--json-out", out)
    assert r.returncode == 0, r.stderr
    head = r.stdout.splitlines()[0]
    assert "A and B interact" in head
    assert "A made no detectable difference" not in r.stdout
    assert "when B=off" in head and "when B=on" in head
    assert head.index("when B=off") < head.index("when B=on")   # the listed level order
    d = json.loads(out.read_text())
    kinds = [f["kind"] for f in d["findings"]]
    assert kinds.count("interaction") == 1
    inter = next(f for f in d["findings"] if f["kind"] == "interaction")
    assert inter["terms"] == ["A:B"] and inter["significant"] is True
    simple = {(f["factor"], f["within"].get("B")): f for f in d["findings"]
              if f["kind"] == "simple effect" and f["factor"] == "A"}
    # the planted ratios lie inside the stated intervals, on the right side of 1
    off, on = simple[("A", "off")], simple[("A", "on")]
    assert off["lower"] < 2.5 < off["upper"] and off["lower"] > 1 and off["significant"]
    assert on["lower"] < 0.43 < on["upper"] and on["upper"] < 1 and on["significant"]
    # no main-effect finding for A or B (they are stated per level); C made no difference
    mains = {f["factors"][0]: f for f in d["findings"] if f["kind"] == "main"}
    assert set(mains) == {"C"} and mains["C"]["significant"] is False
    assert "C made no detectable difference" in head
    best = next(f for f in d["findings"] if f["kind"] == "best")
    assert all(c["A"] == "hi" and c["B"] == "on" for c in best["cells"])


def test_comparisons_default_family_is_simple_effects_and_tukey():
    d = crossover_frame(seed=5)
    d["D"] = np.tile(["p", "q", "r"], len(d) // 3 + 1)[: len(d)]
    d["wall_s"] *= np.where(d["C"] == "y", 1.6, 1.0)
    an = analyze(d, factors=["A", "B", "C"], transform="log")
    methods = {(c["method"], c["factor"]) for c in an.comparisons}
    # A and B inside A:B: simple effects only; C significant and outside: Tukey only
    assert methods == {("simple", "A"), ("simple", "B"), ("tukey", "C")}
    tk = next(c for c in an.comparisons if c["method"] == "tukey")
    # oriented like the effects: level over reference (x), > 1 = slower
    assert (tk["a"], tk["b"]) == ("y", "x") and 1.45 < tk["ratio"] < 1.75
    eff = next(e for e in an.effects if e["factor"] == "C")
    assert tk["ratio"] == pytest.approx(eff["ratio"], rel=1e-12)
    every = analyze(d, factors=["A", "B", "C"], transform="log", comparisons="all")
    assert {c["method"] for c in every.comparisons} == {"simple", "tukey", "pairwise"}


@pytest.mark.parametrize("adjust", ["bonferroni", "holm"])
def test_interval_and_adjusted_p_agree(adjust):
    # source: statsmodels multipletests for the adjusted p-values; the agreement of each
    # interval with its adjusted p is the property under test
    from statsmodels.stats.multitest import multipletests

    rng = np.random.default_rng(11)
    levels = [f"L{i}" for i in range(6)]
    true = dict(zip(levels, [1.0, 1.0, 1.08, 1.12, 1.2, 1.5]))
    rows = [{"f": lv, "g": g, "wall_s": true[lv] * math.exp(rng.normal(0, 0.08))}
            for lv in levels for g in ("u", "v") for _ in range(4)]
    an = analyze(pd.DataFrame(rows), factors=["f", "g"], transform="log", adjust=adjust,
                 comparisons=["pairwise"])
    pw = [c for c in an.comparisons if c["method"] == "pairwise" and c["factor"] == "f"]
    assert len(pw) == 15
    ref = multipletests([c["p"] for c in pw], method=adjust)[1]
    np.testing.assert_allclose([c["p_adj"] for c in pw], ref, rtol=1e-9)
    decided = 0
    for c in pw:
        excludes = c["lower"] > 1 or c["upper"] < 1
        assert excludes == (c["p_adj"] < 0.05), c
        decided += excludes
        # orientation: a pair with the reference L0 has it as b
        if "L0" in (c["a"], c["b"]):
            assert c["b"] == "L0"
    assert 0 < decided < 15   # the check is not vacuous


def test_tied_set_of_two_cells_is_the_t_test():
    # source: scipy.stats.ttest_ind (pooled variance) on the log times decides the tie
    from scipy import stats

    for seed, shift in ((1, 0.02), (2, 0.3)):
        rng = np.random.default_rng(seed)
        d = pd.DataFrame({"v": np.repeat(["a", "b"], 6)})
        d["wall_s"] = np.exp(rng.normal(0, 0.1, 12) + shift * (d["v"] == "b"))
        an = analyze(d, factors=["v"], transform="log")
        p = stats.ttest_ind(np.log(d.wall_s[d.v == "a"]), np.log(d.wall_s[d.v == "b"])).pvalue
        best = next(f for f in an.findings if f["kind"] == "best")
        assert (len(best["cells"]) == 1) == (p < 0.05)
        main = next(f for f in an.findings if f["kind"] == "main")
        assert main["significant"] == (p < 0.05)
        assert (best["lower"] > 1) == (p < 0.05)


def test_higher_is_better_picks_the_largest(tmp_path):
    rng = np.random.default_rng(8)
    d = pd.DataFrame({"threads": np.repeat(["1", "2", "4"], 5)})
    d["rate"] = np.exp(rng.normal(0, 0.05, 15)) * d["threads"].map({"1": 100, "2": 180,
                                                                   "4": 330})
    csv = tmp_path / "rate.csv"
    d.to_csv(csv, index=False)
    r = run_cli("analyze", csv, "--factors", "threads", "--response", "rate",
                "--better", "higher", "--json-out", tmp_path / "a.json")
    assert r.returncode == 0, r.stderr
    found = json.loads((tmp_path / "a.json").read_text())["findings"]
    best = next(f for f in found if f["kind"] == "best")
    assert best["cells"] == [{"threads": "4"}] and best["ratio"] < 1
    assert "Recommended: threads=4" in r.stdout
    low = analyze(d, factors=["threads"], response="rate")
    assert next(f for f in low.findings if f["kind"] == "best")["cells"] == [{"threads": "1"}]


def test_a_rate_named_per_s_is_not_read_as_seconds(tmp_path):
    """``ops_per_s`` ends in ``_s`` but is a rate: its mean is not "1.43e+03 s" and the
    runner-up is not compared with "the best's time" (planted: batch=32 ×1.3 more ops)."""
    rng = np.random.default_rng(1404)
    d = pd.DataFrame({"batch": np.repeat(["8", "32"], 6)})
    d["ops_per_s"] = np.exp(rng.normal(0, 0.03, 12)) * d["batch"].map({"8": 1000, "32": 1300})
    csv = tmp_path / "ops.csv"
    d.to_csv(csv, index=False)
    r = run_cli("analyze", csv, "--factors", "batch", "--response", "ops_per_s",
                "--better", "higher", "--json-out", tmp_path / "a.json")
    assert r.returncode == 0, r.stderr
    best = next(f for f in json.loads((tmp_path / "a.json").read_text())["findings"]
                if f["kind"] == "best")
    assert best["cells"] == [{"batch": "32"}]
    assert re.search(r"\(1,?[23]\d\d per s\)", best["statement"]), best["statement"]
    assert "time" not in best["statement"] and "slower" not in best["statement"]
    # a time in milliseconds is still a time, shown in its unit
    d = d.rename(columns={"ops_per_s": "latency_ms"})
    low = analyze(d, factors=["batch"], response="latency_ms")
    text = next(f for f in low.findings if f["kind"] == "best")["statement"]
    assert "the best's time" in text and "(slower)" in text and " s (" not in text
    assert re.search(r"batch=8 \((1|1\.0\d?|0\.99\d?) s\)", text), text  # ~1000 ms: ~1 s


def test_headline_keeps_a_factor_name_as_written(tmp_path):
    """Factor names are exact text: the headline starts with ``batch``, not ``Batch``."""
    from benchharness.report.story import headline

    rng = np.random.default_rng(14)
    d = pd.DataFrame({"batch": np.repeat(["8", "32"], 6), "pin": np.tile(["no", "yes"], 6)})
    d["wall_s"] = np.exp(rng.normal(0, 0.03, 12)) * d["batch"].map({"8": 1.0, "32": 0.7})
    found = analyze(d, factors=["batch", "pin"]).findings
    text = headline(found)
    assert text.startswith("batch matters") and "pin made no detectable difference" in text
    r = run_cli("analyze", _csv(tmp_path, d), "--factors", "batch,pin")
    assert r.returncode == 0, r.stderr
    assert r.stdout.splitlines()[0].startswith("batch matters")


def _csv(tmp_path, frame):
    path = tmp_path / "data.csv"
    frame.to_csv(path, index=False)
    return path


def test_a_best_cell_the_fraction_did_not_run_is_not_called_measured(tmp_path):
    """A 2^(4-1) half fraction I = -ABCD leaves out the all-lo cell, which the planted effects
    (every factor's hi level slower) make the best: it is predicted, never "measured"."""
    rng = np.random.default_rng(41)
    rows = []
    for a in (0, 1):
        for b in (0, 1):
            for c in (0, 1):
                dd = 1 - (a + b + c) % 2      # the all-lo cell is left out of this half
                for _ in range(2):
                    m = 0.2 * 2.0 ** a * 1.8 ** b * 1.5 ** c * 1.05 ** dd
                    rows.append({"A": "lh"[a], "B": "lh"[b], "C": "lh"[c], "D": "lh"[dd],
                                 "wall_s": m * math.exp(rng.normal(0, 0.08))})
    frame = pd.DataFrame(rows)
    assert not ((frame[["A", "B", "C", "D"]] == "l").all(axis=1)).any()
    an = analyze(frame, factors=["A", "B", "C", "D"])
    best = next(f for f in an.findings if f["kind"] == "best")
    assert best["best"] == {"A": "l", "B": "l", "C": "l", "D": "l"}
    assert best["best"] in best["not_run"]
    assert best["statement"].startswith("Tied for best")   # D=h (×1.05, ran) is tied
    assert "best measured" not in best["statement"] and "best predicted" in best["statement"]
    md = tmp_path / "r.md"
    r = run_cli("report", _csv(tmp_path, frame), "--factors", "A,B,C,D", "--markdown", md,
                "--html", tmp_path / "r.html")
    assert r.returncode == 0, r.stderr
    text = md.read_text()
    assert "best predicted A=l, B=l, C=l, D=l" in text and "best measured" not in text
    rec = next(line for line in text.splitlines() if "Recommended:" in line)
    assert "(best predicted, not run in this fraction;" in rec, rec


def test_no_detectable_difference_never_sits_beside_an_interval_that_excludes_one():
    """Planted: D ×1.08 (small), A, B, C nothing; 2^4 with 2 runs, seed 2. D's F test gives
    p = 0.02 alone but 0.35 after Holm over the 15 terms, while its per-term 95% interval
    [1.01, 1.17] excludes 1×: the statement must say the failure comes from the adjustment
    and that the interval is unadjusted, not a bare "made no detectable difference"."""
    import itertools

    rng = np.random.default_rng(2)
    rows = []
    for a, b, c, d in itertools.product("01", "01", "01", "01"):
        for _ in range(2):
            rows.append({"A": a, "B": b, "C": c, "D": d, "wall_s": 0.2 * (
                1.08 if d == "1" else 1.0) * math.exp(rng.normal(0, 0.1))})
    an = analyze(pd.DataFrame(rows), factors=list("ABCD"))
    f = next(x for x in an.findings if x["kind"] == "main" and x["factors"] == ["D"])
    assert f["p_raw"] < 0.05 <= f["p"] and f["lower"] > 1      # the situation planted
    assert f["significant"] is False
    assert "made no detectable difference" not in f["statement"]
    assert "after adjusting over the model's terms" in f["statement"]
    assert "not adjusted for the other terms" in f["statement"]
    for x in an.findings:   # elsewhere the plain words stay where the interval holds 1×
        if x["kind"] == "main" and "made no detectable difference" in x["statement"]:
            assert x["lower"] is None or x["lower"] <= 1 <= x["upper"]


def brew_frame(seed=36, reps=4, sigma=0.1):
    """Planted: brew=press 1.15× the time, size=large 1.5×, noise CV about 10% (invented)."""
    rng = np.random.default_rng(seed)
    rows = []
    for brew in ("drip", "press"):
        for size in ("small", "large"):
            for _ in range(reps):
                m = (1.15 if brew == "press" else 1.0) * (1.5 if size == "large" else 1.0)
                rows.append({"brew": brew, "size": size,
                             "wall_s": 0.04 * m * math.exp(rng.normal(0, sigma))})
    return pd.DataFrame(rows)


def test_a_p_just_above_the_threshold_is_not_printed_as_the_threshold(tmp_path):
    """At 99% confidence brew's Holm-adjusted p is 0.0112 (seed 36): the finding says brew
    made no difference detectable, so the p it states must read above 0.01 — in three
    decimals like every other p (docs/cli.md), not rounded to ``p = 0.01``."""
    csv = tmp_path / "brew.csv"
    brew_frame().to_csv(csv, index=False)
    out = tmp_path / "a.json"
    r = run_cli("analyze", csv, "--factors", "brew,size", "--confidence", "99%",
                "--json-out", out)
    assert r.returncode == 0, r.stderr
    d = json.loads(out.read_text())
    row = next(x for x in d["anova"] if x["term"] == "brew")
    assert 0.01 < row["p_holm"] < 0.0125 and row["p"] < 0.01   # the planted situation
    f = next(x for x in d["findings"] if x["kind"] == "main" and x["factors"] == ["brew"])
    assert f["significant"] is False
    assert "no difference detectable" in f["statement"]
    stated = re.search(r"p = (\S+) after Holm", f["statement"])
    assert stated and float(stated.group(1)) > 0.01, f["statement"]
    assert "p = 0.011 after Holm over the terms, 0.006 alone" in r.stdout
    assert "p < 0.0001" not in r.stdout and "p = 0.01 " not in r.stdout
