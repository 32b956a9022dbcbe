"""The report of a small real experiment: sections, figures, escaping, links, verdict.

The experiment runs through the real runner into a real results folder, with a
planted-answer executor standing in for processes (tests/report_support.py), and
is analysed by the real analysis stage before the report is drawn.
"""

from __future__ import annotations

import json
import re
from pathlib import Path

import numpy as np
import pytest

from report_support import HOSTILE, PlantedExecutor, make_results

SECTION_IDS = ["question", "design", "effects", "anova", "comparisons", "diagnostics",
               "warnings", "appendix"]


@pytest.fixture(scope="module")
def folder(tmp_path_factory):
    from benchharness.analysis import analyze_results_folder, write_analysis_json
    from benchharness.report import write_reports

    tmp = tmp_path_factory.mktemp("report")
    # run ids 4 and 9 fail / time out: the report must count and flag them
    f = make_results(tmp, executor=PlantedExecutor(fail_runs={4}, timeout_runs={9}))
    write_analysis_json(analyze_results_folder(f), f / "analysis.json")
    write_reports(f)
    return f


@pytest.fixture(scope="module")
def html(folder):
    return (folder / "report.html").read_text(encoding="utf-8")


@pytest.fixture(scope="module")
def md(folder):
    return (folder / "report.md").read_text(encoding="utf-8")


def test_every_section_in_order(html):
    positions = [html.find(f'<section id="{s}">') for s in SECTION_IDS]
    assert all(p > 0 for p in positions), dict(zip(SECTION_IDS, positions))
    assert positions == sorted(positions)
    for words in ("Question and answer", "Design", "Effects and interactions",
                  "Analysis of variance", "Comparisons", "Diagnostics",
                  "Data-quality warnings", "Appendix"):
        assert f"<h2>{words}" in html


def test_at_least_six_figures_inline_and_on_disk(folder, html):
    imgs = re.findall(r'<img src="data:image/png;base64,([A-Za-z0-9+/=]+)"', html)
    assert len(imgs) >= 6
    import base64

    for b in imgs:
        assert base64.b64decode(b)[:8] == b"\x89PNG\r\n\x1a\n"
    pngs = sorted(p.stem for p in (folder / "figures").glob("*.png"))
    svgs = sorted(p.stem for p in (folder / "figures").glob("*.svg"))
    assert len(pngs) >= 6 and pngs == svgs
    for name in ("distributions", "effects", "interaction-nap-scale", "qq", "residuals-fitted",
                 "residuals-position", "boxcox"):
        assert name in pngs


def test_no_external_resource(html):
    assert "http://" not in html and "https://" not in html
    # every src/href points inside the file (data URI or fragment)
    for attr, val in re.findall(r'\b(src|href)="([^"]*)"', html):
        assert val.startswith("data:") or val.startswith("#"), (attr, val)
    assert "<link" not in html and "@import" not in html and "url(" not in html


def test_hostile_level_and_question_are_escaped(html, md):
    assert HOSTILE not in html
    assert "<script" not in html
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html
    assert "<b>doubling</b>" not in html and "&lt;b&gt;doubling&lt;/b&gt;" in html
    assert HOSTILE not in md and "&lt;script&gt;alert(1)&lt;/script&gt;" in md


def test_markdown_links_exist(folder, md):
    links = re.findall(r"\]\(([^)\s]+)\)", md)
    assert len([x for x in links if x.endswith(".png")]) >= 6
    for link in links:
        assert (folder / link).exists(), link
    for s in ("## Design", "## Effects and interactions", "## Analysis of variance",
              "## Comparisons", "## Diagnostics", "## Data-quality warnings", "## Appendix"):
        assert s in md


def test_compact_markdown_is_short(folder):
    from benchharness.report.data import collect
    from benchharness.report.figures import FigureSet
    from benchharness.report.markdown import render_markdown

    text = render_markdown(collect(folder), FigureSet(), compact=True)
    assert len(text.splitlines()) < 40
    assert "](" not in text
    assert "Recommended: nap=short, scale=1" in text


def test_verdict_finds_the_planted_answer(folder):
    """Planted: nap=long doubles the time, scale=2 adds half; fastest is short × 1."""
    from benchharness.report import story
    from benchharness.report.data import collect

    d = collect(folder)
    v = story.verdict(d)
    # both planted factors are stated as acting (whatever the scale finds about their joint
    # effect); neither is "no detectable difference"
    assert "nap" in v["headline"] and "scale" in v["headline"]
    assert "no detectable difference" not in v["headline"]
    assert v["best"].startswith("Best: nap=short, scale=1")
    long_effect = next(e for e in d.analysis["effects"] if e["level"] == "long")
    assert long_effect["lower"] < 2.0 < long_effect["upper"]


def test_failed_and_timed_out_runs_are_counted_and_flagged(html, md):
    assert "1 failed, 1 timed out" in html
    assert "timed out. Only the runs that finished are analysed" in html
    # a command's own message is shown, escaped
    assert "planted failure &lt;img src=x onerror=alert(2)&gt;" in html
    assert "<img src=x" not in html and "<img src=x" not in md


def test_reproduce_command_uses_the_run_flags(folder, html):
    session = json.loads((folder / "session.json").read_text())
    assert f"benchharness run {session['experiment_path']} --seed 11" in html


def test_residuals_match_statsmodels_with_an_additive_block():
    """The report's residuals (carried by the Analysis, never re-fitted) against
    `statsmodels` OLS on an unbalanced design with a block (reference library:
    statsmodels ols with treatment coding)."""
    import pandas as pd
    import statsmodels.formula.api as smf

    from benchharness.report.data import collect

    rng = np.random.default_rng(5)
    rows = []
    for a in ("x", "y", "z"):
        for b in ("p", "q"):
            for blk in (1, 2, 3, 4):
                for _ in range(int(rng.integers(1, 4))):
                    rows.append({"a": a, "b": b, "block": blk, "status": "ok"})
    df = pd.DataFrame(rows)
    df["run"] = np.arange(len(df))
    df["position"] = rng.permutation(len(df))
    df["wall_s"] = np.exp(rng.normal(0, 0.2, len(df)) + (df["a"] == "y") * 0.5
                          + df["block"] * 0.05)
    d = collect(df, factors=["a", "b"], block="block", transform="log")
    assert [r["term"] for r in d.analysis["anova"]] == ["block", "a", "b", "a:b", "Residual"]
    mine = d.residuals
    assert list(mine["run"]) == list(df["run"]) and list(mine["a"]) == list(df["a"])
    ref = smf.ols("np.log(wall_s) ~ C(block) + C(a) * C(b)", df).fit()
    assert np.allclose(mine["residual"].to_numpy(), ref.resid.to_numpy(), atol=1e-9)
    assert np.allclose(mine["fitted"].to_numpy(), ref.fittedvalues.to_numpy(), atol=1e-9)


def test_boxcox_profile_matches_brute_force_statsmodels(folder):
    """Profile log-likelihood against OLS fits of the Box-Cox transformed response
    (Box & Cox 1964 likelihood; reference fits by statsmodels), and its peak against the
    analysis stage's λ̂."""
    import pandas as pd
    import statsmodels.api as sm

    from benchharness.report.data import collect

    d = collect(folder)
    ok = d.ok_runs
    y = ok["wall_s"].to_numpy(dtype=float)
    cells = pd.get_dummies(ok["nap"].astype(str) + "|" + ok["scale"].astype(str)).to_numpy(float)
    prof = d.profile
    gm = float(np.exp(np.log(y).mean()))
    for lam in (-1.0, 0.0, 0.5, 1.0):
        # normalised transform, residual degrees of freedom ν from statsmodels (Box & Cox
        # 1964, §4): -(ν/2) log(RSS/ν)
        z = gm * np.log(y) if lam == 0 else (y ** lam - 1) / (lam * gm ** (lam - 1))
        fit = sm.OLS(z, cells).fit()
        ref = -fit.df_resid / 2 * np.log(fit.ssr / fit.df_resid)
        mine = float(np.interp(lam, prof["lambda"], prof["loglik"]))
        assert mine == pytest.approx(ref, abs=0.05)
    peak = float(prof["lambda"][prof["loglik"].idxmax()])
    assert peak == pytest.approx(d.analysis["transform"]["lambda_hat"], abs=0.05)


def test_subsampling_is_said(folder):
    from benchharness.report.data import collect
    from benchharness.report.figures import distributions

    d = collect(folder)
    fig, note = distributions(d, np.random.default_rng(0), max_points=3)
    assert note and "random 3 of the runs" in note
    assert "<image" in fig.svg          # point layer rasterised inside the SVG


def test_terminal_has_no_colour_when_not_a_tty(folder):
    import io

    from benchharness.report.terminal import make_console, print_analysis

    buf = io.StringIO()
    print_analysis(json.loads((folder / "analysis.json").read_text()), console=make_console(buf))
    out = buf.getvalue()
    assert "\x1b[" not in out
    assert "Analysis of variance" in out and "nap:scale" in out and HOSTILE in out


def test_report_command_on_folder_and_csv(folder, tmp_path, cli, main_cli):
    # the first in a new process (the console script); the rest in this one
    r = cli("report", folder, "--html", tmp_path / "r.html", "--markdown", tmp_path / "r.md")
    assert r.returncode == 0, r.stderr
    assert (tmp_path / "r.html").exists() and (tmp_path / "figures" / "qq.png").exists()
    for link in re.findall(r"\]\(([^)\s]+)\)", (tmp_path / "r.md").read_text()):
        assert (tmp_path / link).exists()
    csv = tmp_path / "timings.csv"
    csv.write_text((folder / "runs.csv").read_text())
    r = main_cli("report", csv, "--factors", "nap,scale")
    assert r.returncode == 0, r.stderr
    assert (tmp_path / "timings.report.html").exists()
    # a second CSV in the same directory keeps its own figures: links of both still resolve
    other = tmp_path / "other.csv"
    runs = folder / "runs.csv"
    other.write_text(runs.read_text())
    r = main_cli("report", other, "--factors", "nap")
    assert r.returncode == 0, r.stderr
    for name in ("timings", "other"):
        text = (tmp_path / f"{name}.report.md").read_text()
        links = re.findall(r"\]\(([^)\s]+\.png)\)", text)
        assert links and all(link.startswith(f"{name}.figures/") for link in links)
        assert all((tmp_path / link).exists() for link in links)
    r = main_cli("report", csv)
    assert r.returncode == 2 and len(r.stderr.strip().splitlines()) == 1
    assert "--factors" in r.stderr


def test_write_reports_returns_paths(folder):
    assert (folder / "report.html").stat().st_size > 10_000
    assert Path(folder / "report.md").read_text().startswith("# nap-planted")


def test_run_command_writes_the_reports_of_real_processes(tmp_path, main_cli):
    """End to end through `benchharness run`: real child processes, analysis, reports."""
    exp = tmp_path / "naps.yaml"
    exp.write_text(
        "experiment: naps\n"
        "about: Does a 30 ms nap take longer than a 5 ms one?\n"
        "command: [python3, -c, 'import time, sys; time.sleep(float(sys.argv[1]))', '{nap}']\n"
        "factors:\n  nap: ['0.005', '0.03']\n"
        "replicates: 3\nseed: 5\n")
    out = tmp_path / "out"
    r = main_cli("run", exp, "--out", out, "--quiet")
    assert r.returncode == 0, r.stderr
    assert "report.html" in r.stdout
    html = (out / "report.html").read_text()
    assert all(f'<section id="{s}">' in html for s in SECTION_IDS)
    assert "benchharness run" in html and "--seed 5" in html
    assert len(re.findall(r'<img src="data:image/png;base64,', html)) >= 5
    assert (out / "figures" / "distributions.svg").exists()


def test_outlier_count_and_cutoff_come_from_the_analysis():
    # planted answer: three runs 20× slower than the rest of their cell must be counted
    # (the analysis lists at most 50, but the count and cut-off are in analysis.json)
    import pandas as pd

    from benchharness.analysis import analyze
    from benchharness.report.data import collect
    from benchharness.report.story import diagnostic_items

    rng = np.random.default_rng(9)
    d = pd.DataFrame({"a": np.repeat(["x", "y"], 60), "position": np.arange(120)})
    d["wall_s"] = np.exp(rng.normal(0, 0.05, 120) + 0.3 * (d.a == "y"))
    d.loc[[3, 50, 100], "wall_s"] *= 20
    an = analyze(d, factors=["a"], transform="log").to_dict()
    assert an["diagnostics"]["outlier_count"] == 3
    item = next(i for i in diagnostic_items(collect(d, analysis=an, factors=["a"]))
                if i["key"] == "outliers")
    assert item["concern"] and "3 runs stand out" in item["verdict"]
    assert f"±{an['diagnostics']['outlier_cutoff']:.2f}"[:4] in item["test"]
