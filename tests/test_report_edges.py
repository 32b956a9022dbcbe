"""Reports of awkward experiments: odd names, no transform, no replicates, blocks.

Tables are built directly (invented data for rendering checks only; no reference
values are taken from them) and analysed by the real analysis stage.
"""

from __future__ import annotations

import numpy as np
import pytest
import pandas as pd

from benchharness.report import build_report
from benchharness.report.data import collect
from benchharness.report.html import render_html
from benchharness.report.markdown import render_markdown


def test_odd_factor_name_no_transform_and_negative_response():
    rng = np.random.default_rng(1)
    name = "thread pool: <size>"
    df = pd.DataFrame({name: np.repeat(["1", "1.0", "4"], 5)})
    df["delta_ms"] = rng.normal(0, 1, len(df)) + (df[name] == "4") * 3
    data, figs = build_report(df, factors=[name], response="delta_ms")
    assert data.analysis["transform"]["name"] == "none"
    names = [f.name for f in figs.figures]
    assert "boxcox" not in names            # Box-Cox undefined for values ≤ 0
    assert "residuals-position" not in names  # no run order in this table
    assert "distributions" in names and "qq" in names
    html = render_html(data, figs)
    assert "thread pool: &lt;size&gt;" in html and "<size>" not in html
    assert ">difference<" in html           # no transform: differences beside ratios
    assert "1.0" in html                     # levels 1 and 1.0 stay apart
    md = render_markdown(data, figs)
    assert "thread pool: &lt;size&gt;" in md


def test_one_run_per_cell_says_nothing_could_be_tested():
    rng = np.random.default_rng(2)
    df = pd.DataFrame([(a, b) for a in "xyz" for b in "pq"], columns=["A", "B"])
    df["wall_s"] = np.exp(rng.normal(0, .1, len(df)))
    data, figs = build_report(df, factors=["A", "B"], model="full")
    md = render_markdown(data, figs, compact=True)
    assert "could not be tested" in md
    assert "no residual degrees of freedom" in md.lower()
    assert "no difference detected" not in md and "no detectable difference" not in md
    # by default the A:B interaction serves as the error term, so the factors are tested
    data = collect(df, factors=["A", "B"])
    assert [r["term"] for r in data.analysis["anova"]] == ["A", "B", "Residual"]
    assert any("one run per cell" in n for n in data.analysis["notes"])


def test_blocked_main_effects_model_keeps_the_block_out_of_the_factors():
    rng = np.random.default_rng(3)
    df = pd.DataFrame([(a, b, blk) for a in "xy" for b in "pqr" for blk in (1, 2, 3)],
                      columns=["A", "B", "block"])
    df["wall_s"] = np.exp(rng.normal(0, .05, len(df)) + df["block"] * .2 + (df["A"] == "y"))
    df["position"] = rng.permutation(len(df))
    df["run"] = np.arange(len(df))
    data, figs = build_report(df, factors=["A", "B"], block="block", model="main")
    assert data.block == "block"
    assert [r["term"] for r in data.analysis["anova"]] == ["block", "A", "B", "Residual"]
    # the residuals remove the block effect: they are small against the planted 0.2 steps
    assert float(np.abs(data.residuals["residual"]).max()) < 0.2
    html = render_html(data, figs)
    assert "interaction not in the model" not in html  # that text lives in the figure only
    assert any(f.name == "interaction-a-b" for f in figs.figures)


def test_choose_section_when_the_experiment_asks_for_it(tmp_path):
    from report_support import EXPERIMENT, make_results

    from benchharness.report import write_reports

    folder = make_results(tmp_path, text=EXPERIMENT + "choose: {}\n")
    html_path, md_path = write_reports(folder)
    html = html_path.read_text()
    assert '<section id="choose">' in html
    assert html.find('<section id="comparisons">') < html.find('<section id="choose">') \
        < html.find('<section id="diagnostics">')
    # planted: nap=short, scale=1 is fastest by far
    assert "Recommended: nap=short, scale=1" in html
    assert "## Choosing a default" in md_path.read_text()


def test_units_and_markdown_escaping():
    from benchharness.report.markdown import md_code, md_escape
    from benchharness.report.units import axis_label, fmt_p, fmt_value

    assert fmt_value(0.0123, "wall_s") == "12.3 ms"
    assert fmt_value(2.5e-5, "wall_s") == "25.0 µs"
    assert fmt_value(1.5, "wall_s") == "1.50 s"
    assert fmt_value(2048, "max_rss_kib") == "2.00 MiB"      # 1 MiB = 1024 KiB
    assert axis_label("wall_s", "ms") == "wall-clock time [wall_s] (ms)"
    assert fmt_p(3e-9) == "< 0.001" and fmt_p(0.0412) == "0.041"
    assert md_escape("a|b *c* <d> [e](f)") == r"a\|b \*c\* &lt;d&gt; \[e\](f)"
    assert md_code("x ` y") == "``x ` y``"  # CommonMark: a longer fence around a backtick


def test_custom_metric_where_higher_is_better(tmp_path):
    """A throughput metric (`better: higher`): the best cell is the one with the most."""
    from report_support import EXPERIMENT, PlantedExecutor, make_results

    from benchharness.report import build_report

    text = EXPERIMENT + (
        "metrics:\n  throughput_rps:\n    pattern: 'served ([0-9.]+) requests/s'\n"
        "    unit: req/s\n    better: higher\n")
    folder = make_results(tmp_path, text=text, executor=PlantedExecutor(print_rate=True))
    data, figs = build_report(folder, response="throughput_rps")
    assert data.better == "higher"
    html = render_html(data, figs)
    # planted: nap=short, scale=1 is fastest, so it serves the most requests per second
    assert "Recommended: nap=short, scale=1" in html
    assert data.analysis["best"]["cells"][0]["levels"] == {"nap": "short", "scale": "1"}
    assert "req/s" in html


def test_report_of_a_folder_whose_runs_all_failed(tmp_path, main_cli):
    """Every run exits non-zero: `run` and `report` still write a report that says so."""
    exp = tmp_path / "broken.yaml"
    exp.write_text(
        "experiment: broken\n"
        "about: Does the new build start at all?\n"
        "command: [python3, -c, 'import sys; sys.exit(3)', '{build}']\n"
        "factors:\n  build: [old, '<new>']\n"
        "replicates: 2\nseed: 4\n")
    out = tmp_path / "out"
    # --keep-going: the whole plan although every cell fails the same way; exit 4
    # since timed runs failed
    r = main_cli("run", exp, "--out", out, "--quiet", "--keep-going", timeout=120)
    assert r.returncode == 4, r.stderr
    assert "Traceback" not in r.stderr
    assert (out / "report.html").exists() and (out / "report.md").exists()
    (out / "report.html").unlink()
    r = main_cli("report", out)
    assert r.returncode == 0, r.stderr
    assert "Traceback" not in r.stderr
    assert "nothing to analyse" in r.stdout
    md = (out / "report.md").read_text()
    html = (out / "report.html").read_text()
    assert "No timed run finished successfully" in md
    assert "4 runs failed or timed out" in md
    assert "exit code 3" in md                  # the reason the runs give
    assert "may look faster" not in md          # nothing was analysed, nothing looks faster
    assert "No ANOVA" in html and "&lt;new&gt;" in html and "<new>" not in html
    assert "<img" not in html                  # no empty figures
    assert md.count("Nothing to show: no run finished.") == 2


def test_report_of_a_gate_results_folder(tmp_path, main_cli):
    """A gate folder: blocks are pairs of runs, the report uses them and repeats the gate."""
    import statsmodels.formula.api as smf
    from statsmodels.stats.anova import anova_lm

    from benchharness import analyze
    from benchharness.results.journal import load_results

    out = tmp_path / "gate"
    r = main_cli("gate", "--baseline", "sleep 0.02", "--candidate", "sleep 0.04", "--seed", "2",
            "--max-pairs", "8", "--out", out, timeout=180)
    assert r.returncode in (0, 1, 3), r.stderr
    r = main_cli("report", out)
    assert r.returncode == 0, r.stderr
    md = (out / "report.md").read_text()
    assert "| **block** |" in md or "| block |" in md
    assert "benchharness gate --baseline 'sleep 0.02' --candidate 'sleep 0.04'" in md
    assert "--out" not in md.split("```sh", 1)[1].split("```", 1)[0]
    # source: statsmodels ols "np.log(wall_s) ~ C(block) + C(build)" + anova_lm(typ=2)
    runs = load_results(out).runs
    ok = runs[runs["status"] == "ok"].copy()
    ref = anova_lm(smf.ols("np.log(wall_s) ~ C(block) + C(build)", ok).fit(), typ=2)
    an = analyze(out, transform="log")
    rows = {x["term"]: x for x in an.anova_rows}
    assert an.block == "block"
    assert rows["block"]["df"] == ref.loc["C(block)", "df"]
    assert rows["build"]["sum_sq"] == pytest.approx(ref.loc["C(build)", "sum_sq"], rel=1e-9)
    assert rows["Residual"]["sum_sq"] == pytest.approx(ref.loc["Residual", "sum_sq"], rel=1e-9)


def test_transform_sentence_keeps_the_lambda_symbol():
    # a reason that starts with λ̂ must not become Λ̂ (another symbol) when capitalised
    from benchharness.report.story import transform_sentence

    data = collect(pd.DataFrame({"a": np.repeat(["x", "y"], 6),
                                 "wall_s": np.exp(np.linspace(0, 1, 12))}), factors=["a"])
    # the report says which scale the analysis used and what the Box-Cox profile says
    text = transform_sentence(data)
    assert text.startswith("Analysed on the log scale, the default for a positive, "
                           "ratio-scaled response")
    assert "Box-Cox profile: the data are consistent with the log scale (λ̂ = " in text
    assert "Λ" not in text


def test_timings_that_follow_the_load_are_a_data_quality_warning():
    # planted answer: runs started under higher load are slower (as in the analysis test)
    from benchharness.report.story import warnings

    rng = np.random.default_rng(21)
    n = 120
    load = rng.uniform(0, 4, n)
    df = pd.DataFrame({"a": np.tile(["x", "y"], n // 2), "load_1m": load,
                       "wall_s": np.exp(0.1 * (np.arange(n) % 2) + 0.05 * load
                                        + rng.normal(0, 0.02, n))})
    data = collect(df, factors=["a"])
    assert data.analysis["diagnostics"]["load"]["ok"] is False
    noisy = [w["text"] for w in warnings(data) if w["kind"] == "Noisy host"]
    assert any("load" in t for t in noisy), warnings(data)


def test_best_cell_with_timeouts_carries_a_caution():
    # planted: the fastest cell lost two runs to timeouts (the slow ones never finished)
    from benchharness.report import story

    rng = np.random.default_rng(4)
    df = pd.DataFrame({"pool": np.repeat(["2", "8", "32"], 6), "status": "ok"})
    df["wall_s"] = np.exp(rng.normal(0, 0.05, 18) - 0.5 * (df.pool == "32"))
    df.loc[[16, 17], "status"] = "timeout"
    df.loc[[16, 17], "wall_s"] = np.nan
    data = collect(df, factors=["pool"])
    v = story.verdict(data)
    assert v["best"].startswith("Best: pool=32")
    assert v["recommendation"] == "Recommended: pool=32"
    assert "2 of this cell's runs did not finish" in v["best"]
    df.loc[[16, 17], "status"] = "ok"
    df.loc[[16, 17], "wall_s"] = np.exp(-0.5)
    assert "did not finish" not in story.verdict(collect(df, factors=["pool"]))["best"]


def test_effect_of_an_empty_level_says_not_estimable():
    # planted: every run of pool=32 timed out, so its ratio has no interval
    rng = np.random.default_rng(5)
    df = pd.DataFrame({"pool": np.repeat(["2", "8", "32"], 4), "status": "ok"})
    df["wall_s"] = np.exp(rng.normal(0, 0.05, 12))
    df.loc[df.pool == "32", "status"] = "timeout"
    data, figs = build_report(df, factors=["pool"])
    md = render_markdown(data, figs)
    # a level with no measurement is left out of the effects, and a note says why
    # (kept in, its cells read as missing by design; tests/test_level_never_finished.py)
    assert "| pool | 32 |" not in md
    assert "pool=32: none of its 4 runs finished with a value" in md
    assert "– to –" not in md


def test_transform_reason_keeps_the_case_of_a_symbol():
    # "λ̂ = ..." starts the reason: capitalising it would print a different symbol (Λ)
    from types import SimpleNamespace

    from benchharness.report.story import transform_sentence

    data = SimpleNamespace(analysis={"transform": {"name": "log", "reason": "λ̂ = -0.12, 95% "
                                                   "interval [-0.38, 0.14] contains 0"}})
    s = transform_sentence(data)
    assert "λ̂ = -0.12" in s and "Λ" not in s
    data = SimpleNamespace(analysis={"transform": {"name": "none", "reason": "run times "
                                                   "vary little"}})
    assert "Run times vary little." in transform_sentence(data)
