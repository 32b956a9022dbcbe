"""What analyze, report and choose SAY on ordinary data (each test plants a truth).

Each test builds a small fixed-seed table whose truth is known by construction and
asserts the words the user reads, not only the numbers: a statement the data do not
support is a defect even when every number is right.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from benchharness.analysis import analyze
from benchharness.report.story import headline


def _pool(seed=3, serial=None, reps=3):
    """A thread pool whose serial share shrinks as the input grows (Amdahl 1967:
    T = W(n)·(s + (1 − s)/p)): the speed-up of 8 threads differs with the records."""
    rng = np.random.default_rng(seed)
    serial = serial or {100000: 0.40, 200000: 0.15, 400000: 0.03}
    rows = []
    for p in (1, 2, 4, 8):
        for n, s in serial.items():
            w = 0.1 * (n / 1e5) ** 1.25
            for _ in range(reps):
                rows.append({"threads": str(p), "records": str(n),
                             "work_s": w * (s + (1 - s) / p) * np.exp(rng.normal(0, 0.04))})
    return pd.DataFrame(rows)


def test_a_speedup_that_differs_with_the_input_is_not_headlined_as_one_ratio():
    df = _pool()
    an = analyze(df, response="work_s", factors=["threads", "records"])
    head = headline(list(an.findings))
    (sc,) = [f for f in an.findings if f["kind"] == "scaling"]
    # planted: 8 threads give 1/(0.4 + 0.6/8) = 2.1x at 100000 records and
    # 1/(0.03 + 0.97/8) = 6.6x at 400000 (Amdahl's formula, from memory)
    assert sc["depends_on"] == "records"
    assert "the speed-up of threads=8 over threads=1 depends on records: from 2." in head
    assert "at records=100000 to 6." in head and "at records=400000" in head
    # the overall ratio is said as the average it is, never as a speed-up that holds
    assert "threads=8 is 3." not in head
    assert "on average over records" in head
    # each level's speed-up is the ratio of the cells' geometric means (common practice)
    z = np.log(df["work_s"])
    for n in ("100000", "400000"):
        g1 = z[(df.threads == "1") & (df.records == n)].mean()
        g8 = z[(df.threads == "8") & (df.records == n)].mean()
        assert f"{np.exp(g1 - g8):.2f}×" in sc["statement"]
    # the interval is the interaction's own simple effect, and says it is adjusted
    assert "Bonferroni-adjusted" in head
    assert "(Bonferroni-adjusted intervals)" in sc["statement"]
    # said once: the interaction's clause does not repeat the per-level ratios
    assert head.count("records=100000") == 1


def test_a_speedup_that_holds_at_every_input_is_still_said_as_one_ratio():
    an = analyze(_pool(seed=4, serial={100000: 0.1, 200000: 0.1, 400000: 0.1}),
                 response="work_s", factors=["threads", "records"])
    (sc,) = [f for f in an.findings if f["kind"] == "scaling"]
    assert sc["depends_on"] is None
    assert sc["short"].startswith("threads=8 is ")
    assert "depends on" not in headline(list(an.findings))


def test_an_interaction_elsewhere_leaves_a_speedup_that_holds_everywhere_one_ratio():
    # planted: the same serial share at every size, so 8 threads give one speed-up;
    # an interaction carried by the other thread counts (2 threads pay a fixed cost on
    # the small input only) must not split the 8-thread speed-up by size
    df = _pool(seed=5, serial={100000: 0.1, 200000: 0.1, 400000: 0.1})
    two_small = (df.threads == "2") & (df.records == "100000")
    df.loc[two_small, "work_s"] *= 1.5
    an = analyze(df, response="work_s", factors=["threads", "records"])
    assert any(f["kind"] == "interaction" and f["significant"] for f in an.findings)
    (sc,) = [f for f in an.findings if f["kind"] == "scaling"]
    assert sc["depends_on"] is None and sc["short"].startswith("threads=8 is ")


def _spill(seed=19):
    """The spill demo's truth (tests/test_incomplete.py): level applies only where codec is
    not none, and lzma at level 9 never ran with large rows."""
    from test_incomplete import spill_table

    return spill_table(seed=seed)


def test_a_nested_term_whose_levels_all_ran_within_each_parent_is_fully_estimable():
    an = analyze(_spill(), factors=["codec", "level", "rows"])
    terms = {t["term"]: t for t in an.incomplete["terms"]}
    # planted: levels 1, 6 and 9 all ran within zlib and within lzma, so "level within
    # codec" has (3 − 1) + (3 − 1) = 4 df of 4 (Montgomery ch. 14, a(b − 1), from memory)
    assert terms["level within codec"]["estimable"] == "full"
    assert terms["level within codec"]["df_full"] == 4
    # lzma level 9 never ran with large rows: 3 of the 4 df of its crossing with rows
    t = terms["(level within codec):rows"]
    assert (t["estimable"], t["df"], t["df_full"]) == ("part", 3, 4)


def test_a_ratio_that_averages_over_fewer_nested_levels_says_so():
    an = analyze(_spill(), factors=["codec", "level", "rows"])
    (main,) = [f for f in an.findings if f["kind"] == "main" and f["factors"] == ["codec"]]
    # lzma's mean leaves out level 9 (it did not run with large rows); zlib's averages over
    # all three levels, so only lzma's ratio is qualified
    assert ("codec=lzma averaged over level=1, 6 only: level=9 did not run at every rows"
            in main["statement"])
    assert "codec=zlib averaged" not in main["statement"]
    head = headline(list(an.findings))
    assert "codec=lzma averaged over level=1, 6 only" in head
    # the planted lzma/none ratio over levels 1 and 6 (geometric mean of 1.2 and 2.0 times
    # 24/30 ms), not over 1, 6 and 9, is what the interval covers
    want = (24 / 30) * math.sqrt(1.2 * 2.0)
    (e,) = [e for e in an.effects if e["factor"] == "codec" and e["level"] == "lzma"]
    assert e["lower"] < want < e["upper"]


def _codecs(seed=7, reps=3, codecs=("zlib", "lzma"), sd=0.05):
    """codec × corpus with a planted codec effect (lzma 1.5× zlib's time)."""
    rng = np.random.default_rng(seed)
    rows = []
    for codec in codecs:
        for corpus in ("text", "binary"):
            for _ in range(reps):
                t = 0.1 * (1.5 if codec == "lzma" else 1.0) * (1.2 if corpus == "text" else 1)
                rows.append({"codec": codec, "corpus": corpus,
                             "wall_s": t * np.exp(rng.normal(0, sd))})
    return pd.DataFrame(rows)


def test_a_factor_left_with_one_level_says_why_it_could_not_be_tested():
    df = _codecs()
    an = analyze(df[df.codec == "zlib"], factors=["codec", "corpus"])
    (main,) = [f for f in an.findings if f["kind"] == "main" and f["factors"] == ["codec"]]
    assert main["untested"]
    assert "only one of its levels has analysed runs (codec=zlib)" in main["statement"]
    assert "no error estimate" not in main["statement"]     # there is one: 10 residual df
    assert an.counts["df_resid"] > 0
    assert "codec (only one level has runs) could not be tested" in headline(
        list(an.findings))


def test_a_factor_without_replicates_left_says_the_noise_could_not_be_estimated():
    # three codecs (not a two-level design, which Lenth's method would judge without
    # replicates): 6 cells, 6 parameters in the full model, nothing left for the noise
    df = _codecs(reps=1, codecs=("zlib", "lzma", "bz2"))
    an = analyze(df, factors=["codec", "corpus"], model="full")
    assert an.counts["df_resid"] == 0
    (main,) = [f for f in an.findings if f["kind"] == "main" and f["factors"] == ["codec"]]
    assert "no replicate is left to estimate the noise" in main["statement"]
    assert "only one of its levels" not in main["statement"]


def _cache_table(seed=1, missing=("on", "large", "y")):
    """A 2×2×2 full factorial (cache, size, mode) with one combination never run; planted:
    cache on costs 1.3×, a large size 2×, mode nothing."""
    rng = np.random.default_rng(seed)
    rows = []
    for a in ("off", "on"):
        for b in ("small", "large"):
            for c in ("x", "y"):
                if (a, b, c) == missing:
                    continue
                for _ in range(3):
                    t = 0.1 * (1.3 if a == "on" else 1) * (2 if b == "large" else 1)
                    rows.append({"cache": a, "size": b, "mode": c,
                                 "wall_s": t * np.exp(rng.normal(0, 0.05))})
    return pd.DataFrame(rows)


def test_a_missing_cell_of_a_full_factorial_is_not_worded_as_a_fractions_alias():
    an = analyze(_cache_table(), factors=["cache", "size", "mode"])
    said = [f["statement"] for f in an.findings]
    assert not any("alias" in s for s in said)
    (miss,) = [f for f in an.findings if f.get("check") == "missing_cells"]
    assert miss["statement"].startswith(
        "1 of 8 cells has no analysed runs (cache=on, size=large, mode=y): a combination of "
        "the full factorial with no runs")
    # with one cell of a 2^3 missing, the three-factor interaction has no df left
    # (8 − 1 cells = 7 parameters: the mean and six lower terms; common practice)
    assert "not estimable from these cells: cache:size:mode" in miss["statement"]
    # the planted effects are still found
    mains = {f["factors"][0]: f for f in an.findings if f["kind"] == "main"}
    assert mains["cache"]["significant"] and mains["size"]["significant"]
    assert not mains["mode"]["significant"]


def test_a_factor_whose_ratios_cannot_be_estimated_still_matters_when_its_test_says_so():
    # planted: a=1 is 1.2x slower than a=1.10 and a=1.0; b does nothing; level b=z ran only
    # with a=1.0, so no ratio of a's levels can be averaged over b. The F test of a still
    # finds the planted effect: the finding says a matters, and nothing about which levels
    # differ (it said "no two of its levels are distinguishable ... ()" and the headline
    # "None of the factors ... made a difference").
    rng = np.random.default_rng(11)
    rows = [{"a": a, "b": b, "wall_s": 0.1 * (1.2 if a == "1" else 1.0)
             * math.exp(rng.normal(0, 0.1))}
            for a in ("1.10", "1", "1.0") for b in ("x", "y") for _ in range(20)]
    rows += [{"a": "1.0", "b": "z", "wall_s": 0.1 * math.exp(rng.normal(0, 0.1))}
             for _ in range(3)]
    an = analyze(pd.DataFrame(rows), factors=["a", "b"])
    mains = {f["factors"][0]: f for f in an.findings if f["kind"] == "main"}
    assert mains["a"]["significant"] and not mains["b"]["significant"]
    assert mains["a"]["statement"].startswith("a matters (p < 0.001)")
    assert "which levels differ is not said" in mains["a"]["statement"]
    assert "()" not in mains["a"]["statement"]
    assert headline(list(an.findings)).startswith("a matters")


def test_an_interaction_on_the_original_scale_is_said_in_differences_not_alike_ratios():
    # planted: lanczos takes 1.3x as long as box at every mp (one ratio), time grows with
    # mp, and the noise is additive and small. On the original scale filter:mp is real in
    # differences only (about +6 ms at mp=1, +28 ms at mp=8); it was said as "1.30× when
    # mp=1; 1.30× when mp=8", which reads as no interaction at all.
    rng = np.random.default_rng(5)
    rows = [{"filter": f, "mp": str(mp), "wall_s": 0.02 * mp ** 0.75
             * (1.3 if f == "lanczos" else 1.0) + rng.normal(0, 0.0003)}
            for f in ("box", "lanczos") for mp in (1, 2, 4, 8) for _ in range(4)]
    df = pd.DataFrame(rows)
    an = analyze(df, factors=["filter", "mp"], transform="none")
    inter = [f for f in an.findings if f["kind"] == "interaction"][0]
    simple = [f for f in an.findings if f["kind"] == "simple effect"
              and f["factor"] == "filter"]
    means = df.groupby(["filter", "mp"])["wall_s"].mean()   # the cell means, by pandas
    for f in simple:
        mp = f["within"]["mp"]
        assert f["difference"] == pytest.approx(means["lanczos", mp] - means["box", mp],
                                                rel=1e-9)
    diffs = [f["difference"] for f in sorted(simple, key=lambda f: int(f["within"]["mp"]))]
    assert diffs == sorted(diffs) and diffs[-1] > 4 * diffs[0]
    head = headline(list(an.findings))
    assert head.startswith("filter and mp interact (filter=lanczos against filter=box: +")
    assert " ms [" in head and "(1.30×) when mp=8" in head
    assert "ms" in inter["statement"] and "(1.30×) when mp=1" in inter["statement"]


def test_a_factor_confounded_with_the_blocks_gets_a_short_reason_in_the_headline():
    # planted: mp is run in blocks of its own (as a gate folder's workload is), so it
    # cannot be tested; the headline names why in a few words and the finding says the rest
    rng = np.random.default_rng(3)
    rows = [{"a": a, "mp": mp, "block": mp, "wall_s": 0.01 * (1.3 if a == "y" else 1.0)
             * float(mp) * math.exp(rng.normal(0, 0.05))}
            for a in "xy" for mp in ("1", "2") for _ in range(5)]
    an = analyze(pd.DataFrame(rows), factors=["a", "mp"], block="block")
    head = headline(list(an.findings))
    assert head.endswith("mp (completely confounded with block) could not be tested.")
    (mp,) = [f for f in an.findings if f["kind"] == "main" and f["factors"] == ["mp"]]
    assert "left out of the model" in mp["statement"]


def test_each_note_is_printed_once(capsys, tmp_path):
    from benchharness.cli import main

    path = tmp_path / "cache.csv"
    _cache_table().to_csv(path, index=False)
    an = analyze(_cache_table(), factors=["cache", "size", "mode"])
    assert any(f.get("check") == "rank_check" for f in an.findings)   # a note to repeat
    assert main(["analyze", str(path), "--factors", "cache,size,mode"]) == 0
    out = capsys.readouterr().out
    # the missing cell: named once by the caution, not again by the notes
    assert out.count("cache=on, size=large, mode=y") == 1
    assert "cells have no ok runs" not in out
    # the rank-based cross-check (it disagrees on this table): one sentence, not three
    assert out.count("rank-based cross-check disagrees") == 1
    assert main(["analyze", str(path), "--factors", "cache,size,mode", "--plain"]) == 0
    plain = capsys.readouterr().out
    assert plain.count("cache=on, size=large, mode=y") == 1
    assert plain.count("rank-based cross-check disagrees") == 1


def test_analyze_and_choose_draw_one_tied_set_on_the_committed_example():
    from pathlib import Path

    from benchharness.choose import choose
    from benchharness.results.journal import load_results

    folder = Path(__file__).resolve().parents[1] / "results" / "example-archive-codecs"
    res = load_results(folder)
    an = analyze(res)
    (best,) = [f for f in an.findings if f["kind"] == "best"]
    ch = choose(res)
    # zlib at levels 1 and 6 differ by 1.06x: analyze called them tied and choose called
    # level 1 better than every other setting; one method now draws both
    assert sorted(map(str, best["cells"])) == sorted(map(str, ch.tied))
    assert len(ch.tied) == 2
    assert "cannot be told apart from the best" in best["statement"]
    assert "intervals adjusted for the comparisons with the best" in best["statement"]


@pytest.mark.parametrize("seed", range(6))
def test_a_tie_of_two_settings_is_the_two_sided_t_test_in_analyze_and_choose(seed):
    from scipy import stats

    from benchharness.choose import choose

    rng = np.random.default_rng(seed)
    # two builds 4% apart, 6 runs each, 4% noise: sometimes told apart, sometimes not
    df = pd.DataFrame({"build": ["old"] * 6 + ["new"] * 6,
                       "wall_s": np.exp(np.r_[np.zeros(6), np.full(6, np.log(1.04))]
                                        + rng.normal(0, 0.04, 12))})
    an = analyze(df, factors=["build"])
    (best,) = [f for f in an.findings if f["kind"] == "best"]
    ch = choose(df, factors=["build"])
    z = np.log(df["wall_s"])
    # scipy's two-sample t test on the log scale (the pooled-variance test the one-factor
    # ANOVA is): tied exactly when it does not reject at 5%
    p = stats.ttest_ind(z[df.build == "old"], z[df.build == "new"]).pvalue
    assert (len(best["cells"]) == 2) == (p >= 0.05)
    assert (len(ch.tied) == 2) == (p >= 0.05)


def test_a_best_setting_whose_factor_fails_only_after_holm_says_so():
    # planted: the larger cache is 0.85x the time, 15% noise, 4 runs a cell; on this seed
    # the factor's F test gives p = 0.018 alone and 0.053 after Holm over the three terms
    # (Holm 1979: 0.018 times 3), so the best cell (one comparison) and the factor's finding
    # (adjusted over the terms) must not contradict each other silently
    rng = np.random.default_rng(2)
    rows = [{"cache_size": c, "mix": m,
             "wall_s": (0.85 if c == "4096" else 1.0) * np.exp(rng.normal(0, 0.15))}
            for c in ("256", "4096") for m in ("skewed", "uniform") for _ in range(4)]
    an = analyze(pd.DataFrame(rows), factors=["cache_size", "mix"])
    row = next(r for r in an.anova_rows if r["term"] == "cache_size")
    assert row["p"] < 0.05 <= row["p_holm"]
    # statsmodels' Holm step-down over the table's three terms (reference)
    from statsmodels.stats.multitest import multipletests

    terms = [r for r in an.anova_rows if r.get("p") is not None]
    holm = multipletests([r["p"] for r in terms], method="holm")[1]
    assert row["p_holm"] == pytest.approx(holm[terms.index(row)], rel=1e-9)
    # the headline keeps the adjusted verdict; the best cell says why it still leads
    assert "None of the factors (cache_size and mix)" in headline(list(an.findings))
    (best,) = [f for f in an.findings if f["kind"] == "best"]
    assert best["significant"]      # one comparison, p = 0.018: ahead of the other
    assert best["statement"].endswith(
        "this comparison with the best is not adjusted over the model's terms: after that "
        "adjustment the effect of cache_size is not detectable")


def test_the_bounding_critical_values_are_never_below_the_exact_ones():
    # Slepian's inequality (Slepian 1962, from memory): smaller correlations raise a
    # one-sided multivariate-t quantile, so each bound is >= the exact value (which
    # tests/test_choose_mcb.py checks against scipy.stats.dunnett), equal when balanced
    from benchharness.analysis.mcb import bounding_critical_values, critical_values

    w = 1 / np.random.default_rng(1).integers(4, 9, 8)
    exact, bound = critical_values(w, 30, 0.975), bounding_critical_values(w, 30, 0.975)
    assert np.all(bound >= exact - 1e-9) and np.all(bound <= exact * 1.05)
    even = np.full(8, 0.2)
    assert np.allclose(bounding_critical_values(even, 30, 0.975),
                       critical_values(even, 30, 0.975), rtol=0, atol=1e-12)


def test_a_caution_names_its_check_and_does_not_assert_what_the_test_did_not_confirm():
    # planted: +10% per 100 runs hidden in large noise over 40 runs: the drift cannot be
    # ruled out but is not shown, so its caution must not be headed "Responses drift"
    rng = np.random.default_rng(1)
    n = 40
    pos = np.arange(n)
    d = pd.DataFrame({"a": np.tile(["x", "y"], n // 2), "position": pos,
                      "wall_s": np.exp(0.001 * pos + 0.4 * rng.standard_normal(n))})
    an = analyze(d, factors=["a"], transform="log")
    (c,) = [f for f in an.findings if f.get("check") == "drift"]
    assert c["statement"].startswith("Drift over the run order: a drift beyond ±5% per 100 "
                                     "runs cannot be ruled out")


def test_a_confidence_that_is_not_a_whole_percentage_is_said_and_used_as_given():
    # planted: a bend on log-log axes (n=100 three times slower than a power law), analysed
    # at 99.9% confidence: the words say 99.9% (not "100%") and the lack of fit, p < 0.001,
    # is reported (at "100%" it was judged against 0 and never said)
    rng = np.random.default_rng(4)
    rows = [{"n": str(n), "wall_s": 0.001 * n * (3 if n == 100 else 1)
             * math.exp(rng.normal(0, 0.02))} for n in (10, 100, 1000) for _ in range(5)]
    an = analyze(pd.DataFrame(rows), factors=["n"], alpha=0.001)
    (t,) = [f for f in an.findings if f["kind"] == "trend"]
    assert "(99.9% interval of the log-log slope)" in t["statement"]
    assert "lack of fit p < 0.001" in t["statement"] and t["lack_of_fit"]
    assert not any("100%" in f.get("statement", "") for f in an.findings)
