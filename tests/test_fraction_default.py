"""A two-level fraction is analysed as a fraction by default: every estimable alias chain,
named by its chain, with Lenth's (1989) method when there are no replicates.

Each scenario plants a known truth (simulated runs with a fixed seed), runs the command a
user would (`benchharness analyze`), and asserts what it says: which chains are active, how
they are named, and that no inactive chain is called significant.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass

import numpy as np
import pandas as pd
import pytest

from benchharness.execute.simulated import SimulatedExecutor, SimulatedModel

FACTORS = ("  threads: [4, 16]\n  batch: [1, 64]\n  cache: [off, on]\n  pin: [no, yes]\n")


@dataclass(frozen=True)
class InteractingModel(SimulatedModel):
    """The simulated system plus planted two-factor interactions on the log scale:
    ``pairs[(f, g)] = r`` multiplies the mean by r ** (x_f * x_g), x = -1 at the first
    listed level, +1 at the second, so the chain's effect (mean at +1 minus mean at -1
    of the product column) is the ratio r**2."""

    pairs: dict = None
    hi: dict = None

    def mean_s(self, levels, position=0):
        m = super().mean_s(levels, position)
        for (f, g), r in (self.pairs or {}).items():
            xf = 1 if str(levels.get(f)) == self.hi[f] else -1
            xg = 1 if str(levels.get(g)) == self.hi[g] else -1
            m *= r ** (xf * xg)
        return m


HI = {"threads": "16", "batch": "64", "cache": "on", "pin": "yes", "log": "async"}


def run_folder(tmp_path, text, model, seed):
    from benchharness.experiment.file import Experiment
    from benchharness.execute.runner import run_experiment

    exp = Experiment.from_text(text)
    return run_experiment(exp, out=tmp_path / "r", executor=SimulatedExecutor(model, seed=seed))


def analysis_json(main_cli, source, *args):
    r = main_cli("analyze", source, *args, "--json")
    assert r.returncode == 0, r.stderr
    return json.loads(r.stdout)


def significant(adict, alpha=0.05):
    return {r["term"] for r in adict["anova"]
            if r["term"] != "Residual" and r.get("p") is not None and r["p"] < alpha}


RES4 = ("experiment: router\ncommand: [python3, -c, pass, '{threads}', '{batch}', '{cache}',"
        " '{pin}']\nfactors:\n" + FACTORS + "design: {resolution: 4}\nreplicates: 2\nseed: 4\n")


@pytest.fixture(scope="module")
def res4_folder(tmp_path_factory):
    # Planted: threads x0.7, cache x1.3, and the threads:batch chain x2.25 (the
    # interaction of the issue); batch, pin and every other chain do nothing.
    model = InteractingModel(effects={"threads": {"16": 0.7}, "cache": {"on": 1.3}}, cv=0.05,
                             pairs={("threads", "batch"): 1.5}, hi=HI)
    return run_folder(tmp_path_factory.mktemp("res4"), RES4, model, seed=14)


def test_res4_default_model_finds_and_names_the_active_chain(res4_folder, main_cli):
    a = analysis_json(main_cli, res4_folder.folder)
    terms = [r["term"] for r in a["anova"]]
    assert terms == ["threads", "batch", "cache", "pin", "threads:batch", "threads:cache",
                     "threads:pin", "Residual"]
    chains = {r["term"]: r.get("chain") for r in a["anova"]}
    assert chains["threads:batch"] == "threads:batch (+ cache:pin)"
    assert chains["threads:cache"] == "threads:cache (+ batch:pin)"
    assert chains["threads"] == "threads"          # resolution IV: aliased only with 3FIs
    by = {r["term"]: r for r in a["anova"]}
    assert by["threads"]["aliases"] == ["batch:cache:pin"]
    assert a["model"]["spec"] == "every alias chain"
    # The planted truth and nothing else.
    assert significant(a) == {"threads", "cache", "threads:batch"}
    frac = a["fraction"]
    assert frac["design"] == "2^(4-1)" and frac["resolution"] == 4
    eff = {e["term"]: e for e in frac["effects"]}
    assert eff["threads:batch"]["ratio"] == pytest.approx(2.25, rel=0.1)
    assert eff["threads"]["ratio"] == pytest.approx(0.7, rel=0.1)
    assert {t for t, e in eff.items() if e["active"]} == {"threads", "cache", "threads:batch"}
    # What it says: the chain is an interaction finding, named with its alias; the main
    # effects found are the planted ones; a best or tied cell that did not run is said to be
    # a prediction; a fraction's unrun cells are not a caution.
    said = {(f["kind"], f["terms"][0]) for f in a["findings"]
            if f.get("significant") and f["kind"] in ("main", "interaction")}
    assert said == {("interaction", "threads:batch (+ cache:pin)"), ("main", "cache")}
    inter = [f for f in a["findings"] if f["kind"] == "interaction"][0]
    assert "cannot tell threads:batch from cache:pin" in inter["statement"]
    ran = {tuple(c.values()) for c in res4_folder.runs[["threads", "batch", "cache", "pin"]]
           .astype(str).to_dict("records")}
    best = [f for f in a["findings"] if f["kind"] == "best"][0]
    unrun = [c for c in best["cells"] if tuple(c[f] for f in ("threads", "batch", "cache", "pin"))
             not in ran]
    assert unrun, "the planted truth ties a cell the fraction did not run"
    assert best["not_run"] == unrun and "not run in this fraction" in best["statement"]
    assert not any(f.get("check") == "missing_cells" for f in a["findings"])


def test_res4_terminal_names_the_chain_in_the_verdict(res4_folder, main_cli):
    r = main_cli("analyze", res4_folder.folder)
    assert r.returncode == 0, r.stderr
    out = " ".join(r.stdout.split())
    assert "threads:batch (+ cache:pin)" in out
    assert "cannot tell threads:batch from cache:pin" in out
    # the fraction table follows, in letters
    assert "AB (+ CD)" in out and "active" in out
    plain = main_cli("analyze", res4_folder.folder, "--plain")
    assert "threads:batch (+ cache:pin)" in plain.stdout


def test_res4_sums_of_squares_match_statsmodels(res4_folder, main_cli):
    # Reference: statsmodels ols + anova_lm(typ=2) of the model with each chain's
    # representative term (threads:batch for threads:batch = cache:pin, ...).
    import statsmodels.api as sm
    import statsmodels.formula.api as smf

    a = analysis_json(main_cli, res4_folder.folder, "--transform", "log")
    runs = res4_folder.runs
    d = pd.DataFrame({"ft": runs["threads"].astype(str), "fb": runs["batch"].astype(str),
                      "fc": runs["cache"].astype(str), "fp": runs["pin"].astype(str),
                      "ly": np.log(runs["wall_s"].astype(float))})
    m = smf.ols("ly ~ C(ft) + C(fb) + C(fc) + C(fp) + C(ft):C(fb) + C(ft):C(fc) + C(ft):C(fp)",
                d).fit()
    ref = sm.stats.anova_lm(m, typ=2)
    names = {"threads": "C(ft)", "batch": "C(fb)", "cache": "C(fc)", "pin": "C(fp)",
             "threads:batch": "C(ft):C(fb)", "threads:cache": "C(ft):C(fc)",
             "threads:pin": "C(ft):C(fp)", "Residual": "Residual"}
    for r in a["anova"]:
        assert r["sum_sq"] == pytest.approx(ref.loc[names[r["term"]], "sum_sq"], rel=1e-9)
        if r["term"] != "Residual":
            assert r["p"] == pytest.approx(ref.loc[names[r["term"]], "PR(>F)"], rel=1e-6)


def test_main_effects_model_on_request(res4_folder, main_cli):
    a = analysis_json(main_cli, res4_folder.folder, "--model", "main")
    assert [r["term"] for r in a["anova"]] == ["threads", "batch", "cache", "pin", "Residual"]
    assert a["model"]["spec"] == "main"


def test_csv_of_a_fraction_is_recognised_from_its_cells(res4_folder, main_cli, tmp_path):
    # The same runs as a plain CSV (no experiment file): the defining relation is found
    # from the observed cells, and the analysis is the same.
    csv = tmp_path / "runs.csv"
    res4_folder.runs.to_csv(csv, index=False)
    a = analysis_json(main_cli, csv, "--factors", "threads,batch,cache,pin")
    assert a["fraction"]["defining_relation"] == ["ABCD"]
    assert {r["term"]: r.get("chain") for r in a["anova"]}["threads:batch"] == \
        "threads:batch (+ cache:pin)"
    assert significant(a) == {"threads", "cache", "threads:batch"}


RES3 = ("experiment: codecs\ncommand: [python3, -c, pass, '{codec}', '{level}', '{dict}']\n"
        "factors:\n  codec: [zlib, lzma]\n  level: [1, 9]\n  dict: [no, yes]\n"
        "design: {resolution: 3}\nreplicates: 3\nseed: 8\n")


def test_res3_names_main_effects_with_their_two_factor_aliases(tmp_path, main_cli):
    # Planted: codec x1.6, dict x0.8 (main effects only) in a replicated 2^(3-1).
    model = SimulatedModel(effects={"codec": {"lzma": 1.6}, "dict": {"yes": 0.8}}, cv=0.04)
    out = run_folder(tmp_path, RES3, model, seed=5)
    a = analysis_json(main_cli, out.folder)
    chains = [r.get("chain") for r in a["anova"][:-1]]
    assert chains == ["codec (+ level:dict)", "level (+ codec:dict)", "dict (+ codec:level)"]
    assert significant(a) == {"codec", "dict"}
    r = main_cli("analyze", out.folder)
    text = " ".join(r.stdout.split())
    assert "codec (+ level:dict) matters" in text or "codec (+ level:dict) and" in text
    assert "level (+ codec:dict)" in text


RES3_5 = ("experiment: service\ncommand: [python3, -c, pass, '{a}', '{b}', '{c}', '{d}', '{e}']\n"
          "factors:\n  a: [lo, hi]\n  b: [lo, hi]\n  c: [lo, hi]\n  d: [lo, hi]\n  e: [lo, hi]\n"
          "design: {generators: ['D = AB', 'E = AC']}\nseed: 3\n")


def test_unreplicated_2_5_2_uses_lenth(tmp_path, main_cli):
    # Planted: a x2 and e x0.6 in a 2^(5-2) run once (8 runs, 7 chains, no residual df).
    model = SimulatedModel(effects={"a": {"hi": 2.0}, "e": {"hi": 0.6}}, cv=0.03)
    out = run_folder(tmp_path, RES3_5, model, seed=2)
    a = analysis_json(main_cli, out.folder, "--transform", "log")
    rows = {r["term"]: r for r in a["anova"]}
    assert rows["Residual"]["df"] == 0
    assert rows["a"]["chain"] == "a (+ b:d + c:e)"
    assert rows["b:c"]["chain"] == "b:c (+ d:e)"
    assert all(r.get("test") == "Lenth (1989)" for t, r in rows.items() if t != "Residual")
    assert significant(a) == {"a", "e"}
    ln = a["fraction"]["lenth"]
    eff = {e["term"]: e for e in a["fraction"]["effects"]}
    # p < 0.05 exactly when |effect| is beyond Lenth's margin of error
    for t, e in eff.items():
        assert (e["p"] < 0.05) == (abs(e["estimate"]) > ln["me"])
    assert eff["a"]["ratio"] == pytest.approx(2.0, rel=0.1)
    assert any("Lenth" in n for n in a["notes"])
    # What it says: a and e matter (intervals from Lenth's PSE agree with the p-values),
    # nothing else; the caution names Lenth's method instead of "nothing could be tested".
    mains = {f["terms"][0]: f for f in a["findings"] if f["kind"] == "main"}
    assert {t for t, f in mains.items() if f["significant"]} == {"a (+ b:d + c:e)",
                                                                 "e (+ a:c)"}
    lo, hi = mains["a (+ b:d + c:e)"]["lower"], mains["a (+ b:d + c:e)"]["upper"]
    assert lo == pytest.approx(math.exp(eff["a"]["estimate"] - ln["me"]), rel=1e-6)
    assert hi == pytest.approx(math.exp(eff["a"]["estimate"] + ln["me"]), rel=1e-6)
    cautions = " ".join(f["statement"] for f in a["findings"] if f["kind"] == "caution")
    assert "Lenth's method" in cautions and "nothing could be tested" not in cautions
    r = main_cli("analyze", out.folder, "--transform", "log")
    head = r.stdout.splitlines()[0].lower()
    assert "a (+ b:d + c:e) matters" in head and "e (+ a:c) matters" in head


def test_unreplicated_two_level_factorial_published_example(tmp_path, main_cli):
    # Published worked example, from memory: the filtration-rate pilot-plant experiment in
    # Montgomery, Design and Analysis of Experiments (ch. 6), a 2^4 run once; data in
    # standard order (1), a, b, ab, c, ..., abcd. Its effects are A 21.625, C 9.875,
    # D 14.625, AC -18.125, AD 16.625 (the active ones) and the rest small.
    y = [45, 71, 48, 65, 68, 60, 80, 65, 43, 100, 45, 104, 75, 86, 70, 96]
    rows = []
    for i, v in enumerate(y):
        rows.append({f: ("lo", "hi")[(i >> b) & 1] for b, f in enumerate("ABCD")} | {"rate": v})
    csv = tmp_path / "filtration.csv"
    pd.DataFrame(rows).to_csv(csv, index=False)
    a = analysis_json(main_cli, csv, "--factors", "A,B,C,D", "--response", "rate",
                      "--transform", "none")
    eff = {e["term"]: e["estimate"] for e in a["fraction"]["effects"]}
    assert eff["A"] == pytest.approx(21.625) and eff["A:C"] == pytest.approx(-18.125)
    # Lenth (1989) by hand: |effects| sorted 0.125 0.375 1.125 1.375 1.625 1.875 2.375 2.625
    # 3.125 4.125 9.875 14.625 16.625 18.125 21.625; s0 = 1.5 * 2.625 = 3.9375; those below
    # 2.5 s0 = 9.84375 are the first ten, median (1.625 + 1.875) / 2 = 1.75;
    # PSE = 1.5 * 1.75 = 2.625; ME = t(0.975; 15/3 = 5) * PSE = 2.5706 * 2.625 = 6.75.
    from scipy import stats

    ln = a["fraction"]["lenth"]
    assert ln["s0"] == pytest.approx(3.9375)
    assert ln["pse"] == pytest.approx(2.625)
    assert ln["me"] == pytest.approx(stats.t.ppf(0.975, 5) * 2.625)
    assert ln["me"] == pytest.approx(6.748, abs=1e-3)
    assert significant(a) == {"A", "C", "D", "A:C", "A:D"}


def test_lenth_p_matches_its_margin(tmp_path):
    # Unit check of the t-ratio p: p = 2 P(T_{m/3} > |c| / PSE) (Lenth 1989).
    from scipy import stats

    from benchharness.analysis.fraction import estimate_chains
    from benchharness.design.fractional import design_from_generators

    d = design_from_generators([(n, ["-", "+"]) for n in "abcd"], ["D = ABC"])
    X = np.array(d.coded_cells(), dtype=float)
    y = X[:, 0] * 0.5 + np.array([0.01, -0.02, 0.03, 0.0, -0.01, 0.02, -0.03, 0.015])
    res = estimate_chains(X, y, d, scale="none")
    ln = res["lenth"]
    for e in res["effects"]:
        assert e["p"] == pytest.approx(2 * stats.t.sf(abs(e["estimate"]) / ln["pse"], 7 / 3))
    assert math.isclose(ln["df"], 7 / 3)


def test_reports_show_the_chains_the_fraction_table_and_the_half_normal_plot(res4_folder, main_cli):
    r = main_cli("report", res4_folder.folder)
    assert r.returncode == 0, r.stderr
    md = (res4_folder.folder / "report.md").read_text()
    anova = md.split("## Analysis of variance")[1].split("## Alias chains of the fraction")[0]
    assert "| **threads:batch (+ cache:pin)** |" in anova
    assert "| threads:cache (+ batch:pin) |" in anova
    frac = md.split("## Alias chains of the fraction")[1].split("## Comparisons")[0]
    assert "defining relation I = ABCD" in frac
    assert "Active: threads:batch (+ cache:pin); threads; cache." in frac
    rows = [line for line in frac.splitlines() if line.startswith("| ")]
    active_rows = [line for line in rows if line.rstrip().endswith("| active |")]
    assert [line.split("|")[1].strip() for line in active_rows] == [
        "**threads:batch (+ cache:pin)**", "**threads**", "**cache**"]
    assert "figures/half-normal.png" in frac
    assert (res4_folder.folder / "figures" / "half-normal.png").stat().st_size > 1000
    html = (res4_folder.folder / "report.html").read_text()
    section = html.split('<section id="fraction">')[1].split("</section>")[0]
    assert "threads:batch (+ cache:pin)" in section and 'id="fig-half-normal"' in section
    assert 'href="#fraction"' in html
    assert "<td>threads:batch (+ cache:pin)</td>" in html.split('<section id="anova">')[1]


def test_report_of_an_unreplicated_fraction_explains_lenth(tmp_path, main_cli):
    model = SimulatedModel(effects={"a": {"hi": 2.0}, "e": {"hi": 0.6}}, cv=0.03)
    out = run_folder(tmp_path, RES3_5, model, seed=2)
    r = main_cli("report", out.folder)
    assert r.returncode == 0, r.stderr
    md = (out.folder / "report.md").read_text()
    frac = md.split("## Alias chains of the fraction")[1].split("## Comparisons")[0]
    assert "No replicates, so the noise is judged from the effects themselves (Lenth 1989)" in frac
    assert "Active: a (+ b:d + c:e); e (+ a:c)." in frac
    assert "| a (+ b:d + c:e) |" in md.split("## Analysis of variance")[1].replace("**", "")


def test_fraction_in_confounded_blocks_enters_its_blocks(tmp_path, main_cli):
    # Planted: cache x1.3 and a shift of the later blocks (a slowing machine); the design
    # confounds one chain with the blocks, which must be reported, not estimated.
    text = ("experiment: router\ncommand: [python3, -c, pass, '{threads}', '{batch}', '{cache}',"
            " '{pin}', '{log}']\nfactors:\n" + FACTORS + "  log: [sync, async]\n"
            "design: {resolution: 4, blocks: 2}\nreplicates: 2\nseed: 3\n")
    model = SimulatedModel(effects={"cache": {"on": 1.3}}, cv=0.03, drift_per_run=0.01)
    out = run_folder(tmp_path, text, model, seed=6)
    a = analysis_json(main_cli, out.folder, "--transform", "log")
    assert a["block"] == "block"
    confounded = a["fraction"]["confounded_with_blocks"]
    assert len(confounded) == 1
    assert len(a["fraction"]["effects"]) == 15 - 1
    rows = {r["term"]: r for r in a["anova"]}
    assert rows["block"]["df"] == 3
    assert significant(a) == {"block", "cache"}
    eff = {e["term"]: e for e in a["fraction"]["effects"]}
    assert eff["cache"]["ratio"] == pytest.approx(1.3, rel=0.05)
