"""Analysis of two-level fractions: OLS on the ±1 coding, Lenth (1989), half-normal (Daniel 1959)."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from benchharness.analysis.fraction import (
    analyze_fraction, chain_label, format_fraction, half_normal_figure, half_normal_points, lenth,
)
from benchharness.design import words as W
from benchharness.design.fractional import design_from_generators


LEVELS = {"threads": ["4", "16"], "batch": ["1", "64"], "cache": ["off", "on"],
          "pin": ["no", "yes"]}


def frac_2_4_1():
    return design_from_generators(list(LEVELS.items()), ["pin = threads*batch*cache"])


def simulated_runs(design, reps, truth, sigma, seed):
    """Planted-answer data: ln(wall_s) = 0.1 + sum(truth[word] * column) + noise."""
    rng = np.random.default_rng(seed)
    rows = []
    for rep in range(1, reps + 1):
        for code, cell in zip(design.coded_cells(), design.cells()):
            mu = 0.1
            for word, half in truth.items():
                v = 1
                for pos in W.positions(word):
                    v *= code[pos]
                mu += half * v
            rows.append({**cell, "replicate": rep, "block": 1, "status": "ok",
                         "wall_s": math.exp(mu + rng.normal(0, sigma))})
    return pd.DataFrame(rows)


def test_replicated_half_fraction_matches_statsmodels_ols():
    import statsmodels.formula.api as smf

    d = frac_2_4_1()
    truth = {0b0001: 0.08, 0b0010: -0.03, 0b0011: 0.02}
    runs = simulated_runs(d, 3, truth, 0.02, seed=41)
    res = analyze_fraction(runs, d)
    # Reference: statsmodels OLS of ln(wall_s) on the ±1 columns of the 7 estimable chains
    # (A, B, C, D, AB = CD, AC = BD, AD = BC).
    X = pd.DataFrame({n: np.where(runs[n] == LEVELS[n][1], 1.0, -1.0) for n in LEVELS})
    X["ly"] = np.log(runs["wall_s"])
    fit = smf.ols("ly ~ threads + batch + cache + pin + threads:batch + threads:cache"
                  " + threads:pin", data=X).fit()
    by = {e["term"]: e for e in res["effects"]}
    assert set(by) == {"threads", "batch", "cache", "pin", "threads:batch", "threads:cache",
                       "threads:pin"}
    for term in by:
        assert by[term]["estimate"] == pytest.approx(2 * fit.params[term], rel=1e-9)
        assert by[term]["se"] == pytest.approx(2 * fit.bse[term], rel=1e-9)
        assert by[term]["p"] == pytest.approx(fit.pvalues[term], rel=1e-6)
    assert res["residual_df"] == int(fit.df_resid) == 16
    assert res["sigma"] == pytest.approx(math.sqrt(fit.scale), rel=1e-9)
    assert by["threads"]["label"] == "A (+ BCD)"
    assert by["threads:batch"]["label"] == "AB (+ CD)"
    assert by["threads"]["aliases"] == ["batch:cache:pin"]
    assert by["threads"]["active"] and by["threads"]["ratio"] == pytest.approx(
        math.exp(by["threads"]["estimate"]))
    # Holm-adjusted p over the chains equals statsmodels' multipletests(method="holm").
    from statsmodels.stats.multitest import multipletests

    terms = list(by)
    adj = multipletests([fit.pvalues[t] for t in terms], method="holm")[1]
    for t, a in zip(terms, adj):
        assert by[t]["p_holm"] == pytest.approx(a, rel=1e-6)


def test_lenth_definition():
    # Lenth (1989): s0 = 1.5 median|c|; PSE = 1.5 median{|c| : |c| < 2.5 s0};
    # ME = t_{.975, m/3} PSE; SME = t_{gamma, m/3} PSE, gamma = (1 + .95^(1/m)) / 2.
    from scipy import stats

    c = [10.0, -8.0, 0.5, -0.3, 0.2, 0.4, -0.6, 0.1, 0.35, -0.25, 0.15, 0.45, -0.05, 0.3, 0.55]
    got = lenth(c)
    a = np.abs(c)
    s0 = 1.5 * np.median(a)
    pse = 1.5 * np.median(a[a < 2.5 * s0])
    m = len(c)
    assert got["s0"] == pytest.approx(s0)
    assert got["pse"] == pytest.approx(pse)
    assert got["me"] == pytest.approx(stats.t.ppf(0.975, m / 3) * pse)
    assert got["sme"] == pytest.approx(stats.t.ppf((1 + 0.95 ** (1 / m)) / 2, m / 3) * pse)


def test_unreplicated_fraction_flags_planted_effects_with_lenth():
    # Planted answer: a 2^(5-1) run once, two large effects among 15 estimable chains.
    levels = [(n, ["lo", "hi"]) for n in ("a", "b", "c", "d", "e")]
    d = design_from_generators(levels, ["E = ABCD"])
    truth = {0b00001: 0.20, 0b00110: -0.15}   # A and BC (half-effects on the log scale)
    runs = simulated_runs(d, 1, truth, 0.01, seed=5)
    res = analyze_fraction(runs, d)
    assert res["residual_df"] == 0 and res["lenth"] is not None
    active = {e["effect"] for e in res["effects"] if e.get("active")}
    assert active == {"A", "BC"}
    by = {e["effect"]: e for e in res["effects"]}
    assert by["A"]["estimate"] == pytest.approx(0.40, abs=0.03)
    assert by["A"]["label"] == "A (+ BCDE)"
    pts = res["half_normal"]
    assert len(pts) == 15 and {p["label"] for p in pts[-2:]} == {"A (+ BCDE)", "BC (+ ADE)"}
    assert "Lenth: PSE" in format_fraction(res)


def test_half_normal_points_use_daniel_positions():
    from scipy import stats

    pts = half_normal_points([3.0, -1.0, 2.0], ["x", "y", "z"])
    assert [p["label"] for p in pts] == ["y", "z", "x"]
    assert pts[0]["quantile"] == pytest.approx(stats.norm.ppf(0.5 + 0.5 * 0.5 / 3))
    assert pts[2]["quantile"] == pytest.approx(stats.norm.ppf(0.5 + 0.5 * 2.5 / 3))


def test_half_normal_figure_is_written(tmp_path):
    out = half_normal_figure(half_normal_points([0.4, -0.1, 0.05], ["A", "B", "C"]),
                             tmp_path / "hn.png", {"me": 0.2, "sme": 0.3})
    assert out.exists() and out.stat().st_size > 1000


def test_long_chains_are_shortened():
    levels = [(c, ["lo", "hi"]) for c in "ABCDEFG"]
    d = design_from_generators(levels, ["D = AB", "E = AC", "F = BC", "G = ABC"])
    rep = 0b1
    assert chain_label(rep, d.alias_set(rep)) == "A (+ BD + CE + FG + BCG + BEF + CDF + DEG + ...)"


def test_blocks_confound_their_chain():
    from benchharness.design.blocking import blocking_from_words

    d = frac_2_4_1()
    bl = blocking_from_words(d, ["AB"])
    runs = simulated_runs(d, 2, {0b1: 0.05}, 0.02, seed=9)
    blocks = bl.block_of_cells()
    cells = [tuple(c.items()) for c in d.cells()]
    runs["block"] = [(r - 1) * 2 + blocks[cells.index(tuple((n, row[n]) for n in LEVELS))] + 1
                     for r, (_, row) in zip(runs["replicate"], runs.iterrows())]
    res = analyze_fraction(runs, d)
    assert res["confounded_with_blocks"] == ["AB (+ CD)"]
    assert "AB" not in {e["effect"] for e in res["effects"]}


def test_runs_outside_the_fraction_are_refused():
    from benchharness.errors import DataError

    d = frac_2_4_1()
    runs = simulated_runs(d, 1, {}, 0.01, seed=1)
    runs.loc[0, "pin"] = "yes" if runs.loc[0, "pin"] == "no" else "no"
    with pytest.raises(DataError, match="not a cell of the fraction"):
        analyze_fraction(runs, d)


def test_run_adds_fraction_to_analysis_json(tmp_path):
    import json

    from benchharness.results import journal as J
    from benchharness.analysis.fraction import add_to_results_folder
    from benchharness.execute.simulated import SimulatedExecutor, SimulatedModel
    from benchharness.experiment.file import Experiment
    from benchharness.execute.runner import run_experiment

    text = ("experiment: router\ncommand: [python3, -c, pass, '{threads}', '{batch}', '{cache}',"
            " '{pin}', '{log}']\nfactors:\n  threads: [4, 16]\n  batch: [1, 64]\n"
            "  cache: [off, on]\n  pin: [no, yes]\n  log: [sync, async]\n"
            "design: {cells: 16}\nseed: 4\n")
    exp = Experiment.from_text(text)
    model = SimulatedModel(effects={"threads": {"16": 0.7}, "cache": {"on": 0.9}}, cv=0.02)
    out = run_experiment(exp, out=tmp_path / "r", executor=SimulatedExecutor(model, seed=1))
    res = add_to_results_folder(out.folder)
    data = json.loads((out.folder / "analysis.json").read_text())
    assert data["fraction"]["design"] == "2^(5-1)"
    active = {e["term"] for e in res["effects"] if e.get("active")}
    assert active == {"threads", "cache"}          # planted: x0.7 and x0.9
    by = {e["term"]: e for e in res["effects"]}
    assert by["threads"]["ratio"] == pytest.approx(0.7, rel=0.05)
    assert (out.folder / "half_normal.png").exists()
    assert J.load_results(out.folder).runs.shape[0] == 16


def test_general_anova_of_a_fraction_fits_every_chain(tmp_path):
    # Resolution IV: by default every estimable chain (the main effects and one
    # representative of each aliased pair of 2FIs); with model="main" the main effects only.
    # Both match statsmodels OLS + anova_lm on the same runs.
    import statsmodels.formula.api as smf
    from statsmodels.stats.anova import anova_lm

    from benchharness.analysis import analyze_results_folder
    from benchharness.execute.simulated import SimulatedExecutor, SimulatedModel
    from benchharness.experiment.file import Experiment
    from benchharness.execute.runner import run_experiment

    text = ("experiment: router\ncommand: [python3, -c, pass, '{threads}', '{batch}', '{cache}',"
            " '{pin}']\nfactors:\n  threads: [4, 16]\n  batch: [1, 64]\n  cache: [off, on]\n"
            "  pin: [no, yes]\ndesign: {resolution: 4}\nreplicates: 3\norder: listed\nseed: 4\n")
    exp = Experiment.from_text(text)
    model = SimulatedModel(effects={"threads": {"16": 0.8}}, cv=0.03)
    out = run_experiment(exp, out=tmp_path / "r", executor=SimulatedExecutor(model, seed=2))
    runs = out.runs.assign(ly=lambda d: np.log(d.wall_s.astype(float)))
    an = analyze_results_folder(out.folder, transform="log")
    terms = [r["term"] for r in an.anova_rows]
    assert terms == ["threads", "batch", "cache", "pin", "threads:batch", "threads:cache",
                     "threads:pin", "Residual"]
    ref = anova_lm(smf.ols("ly ~ C(threads) + C(batch) + C(cache) + C(pin) + C(threads):C(batch)"
                           " + C(threads):C(cache) + C(threads):C(pin)", data=runs).fit())
    for r in an.anova_rows[:-1]:
        key = ":".join(f"C({t})" for t in r["term"].split(":"))
        assert r["F"] == pytest.approx(ref.loc[key, "F"], rel=1e-6)
    main = analyze_results_folder(out.folder, transform="log", model="main")
    assert [r["term"] for r in main.anova_rows] == ["threads", "batch", "cache", "pin",
                                                    "Residual"]
    ref = anova_lm(smf.ols("ly ~ C(threads) + C(batch) + C(cache) + C(pin)", data=runs).fit())
    for r in main.anova_rows[:-1]:
        assert r["F"] == pytest.approx(ref.loc[f"C({r['term']})", "F"], rel=1e-6)


def test_blocked_run_end_to_end(tmp_path):
    # Planted answer: a 2^4 in 4 blocks per replicate, with a block-to-block shift the
    # analysis must absorb; the effects confounded with blocks are reported, not estimated.
    import json

    from benchharness.analysis.fraction import add_to_results_folder
    from benchharness.execute.simulated import SimulatedExecutor, SimulatedModel
    from benchharness.experiment.file import Experiment
    from benchharness.execute.runner import run_experiment

    text = ("experiment: router\ncommand: [python3, -c, pass, '{threads}', '{batch}', '{cache}',"
            " '{pin}']\nfactors:\n  threads: [4, 16]\n  batch: [1, 64]\n  cache: [off, on]\n"
            "  pin: [no, yes]\ndesign: {blocks: 4}\nreplicates: 2\nseed: 4\n")
    exp = Experiment.from_text(text)
    model = SimulatedModel(effects={"batch": {"64": 1.25}}, cv=0.02, drift_per_run=0.01)
    out = run_experiment(exp, out=tmp_path / "r", executor=SimulatedExecutor(model, seed=3))
    plan = json.loads((out.folder / "design.json").read_text())
    conf = plan["confounded_with_blocks"]
    assert len(conf) == 3
    res = add_to_results_folder(out.folder)
    assert len(res["confounded_with_blocks"]) == 3
    assert {c.split(" ")[0] for c in res["confounded_with_blocks"]} == set(conf)
    by = {e["term"]: e for e in res["effects"]}
    assert len(by) == 15 - 3
    # Drift of 1% per run is mostly absorbed by the 8 blocks; batch is found near x1.25.
    assert by["batch"]["active"]
    assert by["batch"]["ratio"] == pytest.approx(1.25, rel=0.05)


def test_analyze_command_on_a_fraction_uses_unaliased_terms_and_shows_chains(tmp_path, main_cli):
    # `benchharness analyze RESULTS` on a 2^(4-1) fraction: by default the same model as
    # after `run` (every alias chain, named by its chain) and the alias-chain estimates.
    from benchharness.execute.simulated import SimulatedExecutor, SimulatedModel
    from benchharness.experiment.file import Experiment
    from benchharness.execute.runner import run_experiment

    text = ("experiment: router\ncommand: [python3, -c, pass, '{threads}', '{batch}', '{cache}',"
            " '{pin}']\nfactors:\n  threads: [4, 16]\n  batch: [1, 64]\n  cache: [off, on]\n"
            "  pin: [no, yes]\ndesign: {resolution: 4}\nreplicates: 2\nseed: 4\n")
    exp = Experiment.from_text(text)
    model = SimulatedModel(effects={"threads": {"16": 0.8}}, cv=0.02)
    out = run_experiment(exp, out=tmp_path / "r", executor=SimulatedExecutor(model, seed=2))
    r = main_cli("analyze", out.folder)
    assert r.returncode == 0, r.stderr
    assert "inestimable: the observed cells" not in r.stdout
    assert "A (+ BCD)" in r.stdout and "AB (+ CD)" in r.stdout
    anova = r.stdout.split("Residual")[0]
    assert "threads:batch (+ cache:pin)" in anova and "cache:pin  " not in anova
