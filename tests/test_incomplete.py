"""Incomplete factorials: cells missing by design, a conditional factor and a nested one.

The sums of squares are checked against statsmodels by explicit model comparison
on the same rows (Type II: each term against the terms that do not contain it;
``ols`` fits, F with the full model's error), the findings against planted truths.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from benchharness.analysis import analyze

# statsmodels says so when a cell-means formula has empty cells; its pinv fit is still exact
pytestmark = pytest.mark.filterwarnings("ignore::statsmodels.tools.sm_exceptions"
                                        ".SingularMatrixWarning")

BASE_MS = {"none": 30.0, "zlib": 20.0, "lzma": 24.0}
LEVEL = {"zlib": {"1": 1.0, "6": 1.3, "9": 1.8}, "lzma": {"1": 1.2, "6": 2.0, "9": 3.0}}


def spill_table(seed=19, reps=4, sd=0.05, rows_factor=2.0) -> pd.DataFrame:
    """The spill demo's truth: level only where codec is not none ('-' elsewhere), and
    lzma at level 9 with large rows excluded."""
    rng = np.random.default_rng(seed)
    out = []
    for codec, base in BASE_MS.items():
        for level in (["-"] if codec == "none" else ["1", "6", "9"]):
            for rows in ("small", "large"):
                if (codec, level, rows) == ("lzma", "9", "large"):
                    continue
                ms = base * (LEVEL[codec][level] if codec != "none" else 1.0)
                ms *= rows_factor if rows == "large" else 1.0
                for _ in range(reps):
                    out.append({"codec": codec, "level": level, "rows": rows, "status": "ok",
                                "wall_s": ms / 1000 * math.exp(rng.normal(0, sd))})
    return pd.DataFrame(out)


def _reference_type2(df, formulas: dict, full: str):
    """{term: (df, SS, F, p)} by model comparison with statsmodels' ols (reference)."""
    import statsmodels.formula.api as smf
    from scipy import stats

    d = df.assign(z=np.log(df["wall_s"]))
    big = smf.ols(full, d).fit()
    mse, df_res = big.ssr / big.df_resid, big.df_resid
    out = {}
    for term, (without, with_) in formulas.items():
        a, b = smf.ols(without, d).fit(), smf.ols(with_, d).fit()
        ddf = int(round(a.df_resid - b.df_resid))
        ss = a.ssr - b.ssr
        F = ss / ddf / mse
        out[term] = (ddf, ss, F, stats.f.sf(F, ddf, df_res))
    return out


def test_conditional_factor_type2_matches_statsmodels_model_comparisons():
    df = spill_table()
    an = analyze(df, factors=["codec", "level", "rows"])
    rows = {r["term"]: r for r in an.anova_rows}
    c, lv, r = "C(codec)", "C(codec):C(level)", "C(rows)"
    # reference: statsmodels ols on the same rows; level nested in codec is C(codec):C(level)
    ref = _reference_type2(df, {
        "codec": (f"z ~ {r}", f"z ~ {c} + {r}"),
        "rows": (f"z ~ {c} + {lv}", f"z ~ {c} + {lv} + {r}"),
        "level within codec": (f"z ~ {c} * {r}", f"z ~ {c} * {r} + {lv}"),
        "codec:rows": (f"z ~ {c} + {r} + {lv}", f"z ~ {c} + {r} + {lv} + {c}:{r}"),
        "(level within codec):rows": (f"z ~ {c} * {r} + {lv}",
                                      "z ~ C(codec):C(level):C(rows)"),
    }, full="z ~ C(codec):C(level):C(rows)")
    assert set(ref) <= set(rows)
    for term, (ddf, ss, F, p) in ref.items():
        got = rows[term]
        assert got["df"] == ddf, term
        assert got["sum_sq"] == pytest.approx(ss, rel=1e-8, abs=1e-12), term
        assert got["F"] == pytest.approx(F, rel=1e-7), term
        assert got["p"] == pytest.approx(p, rel=1e-6, abs=1e-300), term
    assert "level" not in rows            # no main effect of a conditional factor
    assert rows["Residual"]["df"] == len(df) - 13


def test_what_the_analysis_says_follows_the_planted_truth():
    an = analyze(spill_table(), factors=["codec", "level", "rows"])
    text = " | ".join(f["statement"] for f in an.findings)
    assert "rows matters" in text                     # doubled by large rows
    assert "level matters within codec" in text
    assert "level made no detectable" not in text and "codec made no detectable" not in text
    # ratios of level only within codec; each 99% interval holds its planted value
    # (four intervals: Bonferroni keeps the chance of any miss under 4%)
    an99 = analyze(spill_table(), factors=["codec", "level", "rows"], alpha=0.01)
    within = {(e["within"]["codec"], e["level"]): e for e in an99.incomplete["within_ratios"]}
    assert set(within) == {("zlib", "6"), ("zlib", "9"), ("lzma", "6"), ("lzma", "9")}
    for (codec, level), e in within.items():
        truth = LEVEL[codec][level] / LEVEL[codec]["1"]
        assert e["lower"] < truth < e["upper"], (codec, level, e)
    within = {(e["within"]["codec"], e["level"]): e for e in an.incomplete["within_ratios"]}
    # lzma 9 against 1 only where both ran (rows=small): said, never extrapolated
    assert within[("lzma", "9")]["over"] == [{"rows": "small"}]
    assert not [e for e in an.effects if e["factor"] == "level"]
    rows_ratio = next(e for e in an.effects if e["factor"] == "rows")
    assert rows_ratio["lower"] < 2.0 < rows_ratio["upper"]
    assert an.best["cells"][0]["levels"] == {"codec": "zlib", "level": "1"}
    assert {"codec": "lzma", "level": "9"} in an.incomplete["not_compared"]


def test_no_rows_effect_is_not_invented_by_the_missing_cells():
    """A null planted on rows: with the crossed coding the missing cells used to leave the
    rows test confounded; the analysis must not call rows significant."""
    an = analyze(spill_table(seed=5, rows_factor=1.0), factors=["codec", "level", "rows"])
    row = next(r for r in an.anova_rows if r["term"] == "rows")
    assert row["p"] > 0.01
    assert not any(f["significant"] and f["factors"] == ["rows"] for f in an.findings)


def test_a_nested_factor_is_found_and_matches_statsmodels():
    """Tuning options that exist for one compiler only (nested within compiler)."""
    rng = np.random.default_rng(3)
    truth = {("gcc", "O2"): 1.0, ("gcc", "O3-native"): 0.8, ("clang", "O2-lto"): 0.9,
             ("clang", "Oz"): 1.3, ("clang", "O3"): 0.85}
    out = []
    for (comp, tune), m in truth.items():
        for inp in ("a", "b"):
            for _ in range(3):
                out.append({"compiler": comp, "tuning": tune, "input": inp, "status": "ok",
                            "wall_s": m * (1.5 if inp == "b" else 1) * math.exp(rng.normal(0, 0.04))})
    df = pd.DataFrame(out)
    an = analyze(df, factors=["compiler", "tuning", "input"])
    assert an.incomplete["nested"] == {"tuning": ["compiler"]}
    rows = {r["term"]: r for r in an.anova_rows}
    c, t, i = "C(compiler)", "C(compiler):C(tuning)", "C(input)"
    ref = _reference_type2(df, {
        "compiler": (f"z ~ {i}", f"z ~ {c} + {i}"),
        "tuning within compiler": (f"z ~ {c} * {i}", f"z ~ {c} * {i} + {t}"),
        "input": (f"z ~ {c} + {t}", f"z ~ {c} + {t} + {i}"),
    }, full="z ~ C(compiler):C(tuning):C(input)")
    for term, (ddf, ss, F, p) in ref.items():
        assert rows[term]["df"] == ddf and rows[term]["sum_sq"] == pytest.approx(ss, rel=1e-8)
        assert rows[term]["p"] == pytest.approx(p, rel=1e-6, abs=1e-300)
    within = {(e["within"]["compiler"], e["level"]): e["ratio"]
              for e in an.incomplete["within_ratios"]}
    assert within[("clang", "Oz")] == pytest.approx(1.3 / 0.9, rel=0.1)
    assert ("gcc", "Oz") not in within


def test_within_ratio_intervals_are_statsmodels_t_intervals():
    """Each ratio within codec is a contrast of cell means, averaged over the rows levels
    where both levels ran; statsmodels' ``t_test`` on the cell-means ols fit (reference)
    gives the same estimate and 95% interval."""
    import statsmodels.formula.api as smf

    df = spill_table(seed=7, reps=3, sd=0.1)
    an = analyze(df, factors=["codec", "level", "rows"], comparisons=False)
    d = df.assign(z=np.log(df["wall_s"]), cell=df["codec"] + "_" + df["level"] + "_" + df["rows"])
    ref = smf.ols("z ~ C(cell) - 1", d).fit()
    names = list(ref.params.index)
    for e in an.incomplete["within_ratios"]:
        codec, level = e["within"]["codec"], e["level"]
        rows = ["small"] if (codec, level) == ("lzma", "9") else ["small", "large"]
        L = np.zeros(len(names))
        for r in rows:
            L[names.index(f"C(cell)[{codec}_{level}_{r}]")] += 1 / len(rows)
            L[names.index(f"C(cell)[{codec}_1_{r}]")] -= 1 / len(rows)
        t = ref.t_test(L)
        lo, hi = np.exp(t.conf_int(0.05)[0])
        assert e["ratio"] == pytest.approx(float(np.exp(t.effect[0])), rel=1e-9)
        assert (e["lower"], e["upper"]) == pytest.approx((lo, hi), rel=1e-9)


def interval_rates(seeds):
    """(coverage of the within-codec level ratios' 95% intervals, share of experiments where
    the (level within codec):rows or codec:rows test is significant at 5%) over fixed seeds.
    The planted truth is multiplicative, so both interactions are null."""
    covered = total = alarms = 0
    for s in seeds:
        df = spill_table(seed=s, reps=3, sd=0.1)
        an = analyze(df, factors=["codec", "level", "rows"], comparisons=False, art=False)
        for e in an.incomplete["within_ratios"]:
            truth = LEVEL[e["within"]["codec"]][e["level"]] / LEVEL[e["within"]["codec"]]["1"]
            covered += e["lower"] < truth < e["upper"]
            total += 1
        p = {r["term"]: r.get("p") for r in an.anova_rows}
        alarms += p["(level within codec):rows"] < 0.05
        alarms += p["codec:rows"] < 0.05
    return covered / total, alarms / (2 * len(seeds))


def test_within_ratio_intervals_and_null_interactions_small():
    coverage, false_rate = interval_rates(range(20))
    assert coverage >= 0.85          # 80 intervals at 95%: below 85% is p < 0.001
    assert false_rate <= 0.15        # 40 null tests at 5%: 7 or more is p < 0.002


@pytest.mark.slow
def test_within_ratio_intervals_and_null_interactions_rates():
    """The figures in docs/analysis.md: 400 experiments, 1,600 intervals, 800 null tests."""
    coverage, false_rate = interval_rates(range(400))
    # the four intervals of an experiment share its error estimate, so the spread is wider
    # than 1,600 independent ones (± 0.016 for 400 clusters of four, taking them as one)
    assert 0.925 <= coverage <= 0.975
    assert 0.027 <= false_rate <= 0.073     # 5% ± 3 binomial standard errors


def test_an_excluded_cell_leaves_a_ratio_where_both_levels_ran(tmp_path):
    """Crossed factors with one combination excluded: lzma never ran on large rows, so its
    ratio to zlib is given over small rows only, and holds the planted 2×."""
    from benchharness.execute.runner import run_experiment
    from benchharness.execute.simulated import SimulatedExecutor, SimulatedModel
    from benchharness.experiment.file import parse_experiment

    exp = parse_experiment('experiment: x\ncommand: [./app, "{codec}", "{rows}", "{t}"]\n'
                           "factors:\n  codec: [zlib, bz2, lzma]\n  rows: [small, large]\n"
                           "  t: [1, 2]\nexclude:\n  - {codec: lzma, rows: large}\n"
                           "replicates: 3\nseed: 1\n", "x.yaml")
    truth = SimulatedModel(base_s=0.05, cv=0.03, effects={
        "codec": {"bz2": 1.5, "lzma": 2.0}, "rows": {"large": 2.0}, "t": {"2": 0.6}})
    run_experiment(exp, out=tmp_path / "r", executor=SimulatedExecutor(truth, seed=3))
    an = analyze(tmp_path / "r")
    e = {(x["factor"], x["level"]): x for x in an.effects}
    assert e[("codec", "lzma")]["over"] == [{"rows": "small", "t": "1"},
                                            {"rows": "small", "t": "2"}]
    assert "only rows=small, where both ran" in e[("codec", "lzma")]["wording"]
    for key, want in ((("codec", "lzma"), 2.0), (("codec", "bz2"), 1.5), (("rows", "large"), 2.0)):
        assert e[key]["lower"] < want < e[key]["upper"], key
    assert "over" not in e[("codec", "bz2")]
    terms = {t["term"]: t for t in an.incomplete["terms"]}
    assert terms["codec:rows"]["estimable"] == "part" and terms["codec"]["estimable"] == "full"
    assert an.counts["cells_planned"] == 10 and an.counts["cells"] == 10
    assert not any(f["kind"] == "caution" and "no analysed runs" in f["statement"]
                   for f in an.findings)


def shipper_table(seed=5, reps=3, sd=0.05) -> pd.DataFrame:
    """A log shipper: ``ack`` applies only to tcp and quic ('-' for udp), and udp never ran with
    batch=b256 on big payloads, so udp's margin lacks a combination tcp has."""
    rng = np.random.default_rng(seed)
    out = []
    for transport, base in (("tcp", 20.0), ("udp", 12.0), ("quic", 16.0)):
        for ack in (["every", "window"] if transport != "udp" else ["-"]):
            for batch in ("off", "b32", "b256"):
                for payload in ("small", "big"):
                    if (transport, batch, payload) == ("udp", "b256", "big"):
                        continue
                    ms = base * {"every": 1.5, "window": 1.0, "-": 1.0}[ack]
                    ms *= {"off": 1.0, "b32": 0.7, "b256": 0.6}[batch]
                    ms *= 1.5 if payload == "big" else 1.0
                    for _ in range(reps):
                        out.append({"transport": transport, "ack": ack, "batch": batch,
                                    "payload": payload, "status": "ok",
                                    "wall_s": ms / 1000 * math.exp(rng.normal(0, sd))})
    return pd.DataFrame(out)


def test_a_parent_level_without_the_nested_factor_is_compared_where_both_ran():
    """udp (no ack) against tcp (averaged over its two acks), over the batch and payload
    combinations where both ran: the ratio is defined, holds the planted 12 / (20·√1.5),
    equals statsmodels' ``t_test`` on the cell-means ols fit (reference), and the finding
    names it (it was "cannot be compared: the cells needed are empty")."""
    import statsmodels.formula.api as smf

    df = shipper_table()
    an = analyze(df, factors=["transport", "ack", "batch", "payload"], comparisons=False)
    assert an.incomplete["nested"] == {"ack": ["transport"]}
    e = next(x for x in an.effects if (x["factor"], x["level"]) == ("transport", "udp"))
    want = 12.0 / (20.0 * math.sqrt(1.5))
    assert e["estimable"] and e["lower"] < want < e["upper"]
    both = [("off", "small"), ("off", "big"), ("b32", "small"), ("b32", "big"),
            ("b256", "small")]
    assert sorted((o["batch"], o["payload"]) for o in e["over"]) == sorted(both)
    d = df.assign(z=np.log(df["wall_s"]),
                  cell=df["transport"] + "_" + df["ack"] + "_" + df["batch"] + "_" + df["payload"])
    ref = smf.ols("z ~ C(cell) - 1", d).fit()
    names = list(ref.params.index)
    L = np.zeros(len(names))
    for b, p in both:
        L[names.index(f"C(cell)[udp_-_{b}_{p}]")] += 1 / len(both)
        for ack in ("every", "window"):
            L[names.index(f"C(cell)[tcp_{ack}_{b}_{p}]")] -= 1 / (2 * len(both))
    t = ref.t_test(L)
    assert e["ratio"] == pytest.approx(float(np.exp(t.effect[0])), rel=1e-9)
    assert (e["lower"], e["upper"]) == pytest.approx(tuple(np.exp(t.conf_int(0.05)[0])),
                                                     rel=1e-9)
    main = next(f for f in an.findings if f["kind"] == "main" and f["factors"] == ["transport"])
    assert main["significant"] and "transport=udp 0.4" in main["statement"]


def test_a_nested_finding_states_the_tables_p_beside_the_adjusted_one():
    """A nested term's finding gives its Holm-adjusted p as the crossed terms' findings do,
    with the ANOVA table's own p beside it: a bare "p = 1.000" beside a table row reading
    0.4 contradicted the table."""
    from benchharness.analysis.findings import fmt_p

    an = analyze(shipper_table(seed=2), factors=["transport", "ack", "batch", "payload"],
                 comparisons=False)
    rows = {r["term"]: r for r in an.anova_rows}
    checked = 0
    for f in an.findings:
        if not f.get("within"):
            continue
        r = rows[f["terms"][0]]
        if fmt_p(r["p_holm"]) != fmt_p(r["p"]):
            raw = fmt_p(r["p"]).replace("p = ", "")
            assert f"{fmt_p(r['p_holm'])} after Holm over the terms, {raw} alone" \
                in f["statement"]
            checked += 1
    assert checked >= 1      # the planted interactions are null: their Holm p differs


def test_a_level_without_a_tukey_interval_is_still_stated_where_both_ran():
    """batch=b256 never ran for udp on big payloads, so Tukey's comparison of batch levels
    has no interval for it; the finding still states its ratio (planted 0.6×) over the
    combinations where both ran, instead of naming only b32 (planted 0.7×)."""
    an = analyze(shipper_table(seed=4), factors=["transport", "ack", "batch", "payload"])
    tk = [c for c in an.comparisons if c.get("method") == "tukey" and c.get("factor") == "batch"
          and c.get("a") == "b256" and c.get("b") == "off"]
    assert tk and tk[0].get("ratio") is None          # the case this test is about
    main = next(f for f in an.findings if f["kind"] == "main" and f["factors"] == ["batch"])
    assert main["significant"] and main["level"] == "b256"
    assert main["lower"] < 0.6 < main["upper"]
    assert "batch=b256 0.6" in main["statement"]
    assert "(not at transport=udp, ack=-, payload=big, where only one of them ran)" \
        in main["statement"]
    assert "batch=b32 0.6" in main["statement"]       # 0.695× here: planted 0.7×


def test_a_ratio_over_part_of_the_combinations_says_where_it_holds(tmp_path):
    """a=y is excluded with b=q: a's levels are compared at b=p only and b's at a=x only, and
    the ratios (planted 1.3× and 0.7×) say so; a level left out of one combination among
    many names that combination rather than listing the ones kept."""
    from benchharness.execute.runner import run_experiment
    from benchharness.execute.simulated import SimulatedExecutor, SimulatedModel
    from benchharness.experiment.file import parse_experiment

    exp = parse_experiment('experiment: x\ncommand: [./app, "{a}", "{b}", "{c}"]\n'
                           "factors:\n  a: [x, y]\n  b: [p, q]\n  c: [s, t]\n"
                           "exclude:\n  - {a: y, b: q}\nreplicates: 4\nseed: 1\n", "x.yaml")
    truth = SimulatedModel(base_s=0.01, cv=0.04, effects={
        "a": {"y": 1.3}, "b": {"q": 0.7}, "c": {"t": 0.8}})
    run_experiment(exp, out=tmp_path / "r", executor=SimulatedExecutor(truth, seed=3))
    an = analyze(tmp_path / "r")
    e = {x["factor"]: x for x in an.effects}
    assert e["a"]["lower"] < 1.3 < e["a"]["upper"] and e["b"]["lower"] < 0.7 < e["b"]["upper"]
    assert "only b=p, where both ran" in e["a"]["wording"]
    assert "only a=x, where both ran" in e["b"]["wording"]
    assert "over" not in e["c"]
    main = {f["factors"][0]: f for f in an.findings if f["kind"] == "main"}
    assert "(only b=p, where both ran)" in main["a"]["statement"]
    assert "where both ran" not in main["c"]["statement"]
    ship = analyze(shipper_table(seed=4), factors=["transport", "ack", "batch", "payload"],
                   comparisons=False)
    udp = next(x for x in ship.effects if x["level"] == "udp")
    assert "(not at batch=b256, payload=big, where only one of them ran)" in udp["wording"]
