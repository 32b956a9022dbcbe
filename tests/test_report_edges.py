"""Reports of awkward experiments: odd names, no transform, no replicates, blocks.

Tables are built directly (invented data for rendering checks only; no reference
values are taken from them) and analysed by the real analysis stage.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from benchharness.report import build_report
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
    data, figs = build_report(df, factors=["A", "B"])
    md = render_markdown(data, figs, compact=True)
    assert "could not test any factor" in md
    assert "no residual degrees of freedom" in md
    assert "no difference detected" not in md


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
    assert fmt_value(2048, "max_rss_kib") == "2,048 KiB"
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
    assert "The best cell is nap=short, scale=1" in html
    assert "req/s" in html


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
