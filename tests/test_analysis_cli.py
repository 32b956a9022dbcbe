"""The analyze command, the results-folder entry point and the analysis.json contract."""

from __future__ import annotations

import json
import sys
import textwrap

import numpy as np
import pandas as pd
import pytest

from benchharness.analysis import analyze, analyze_results_folder, write_analysis_json
from analysis_refs import battery_frame

ANOVA_KEYS = {"term", "df", "sum_sq", "mean_sq", "F", "p", "partial_eta_sq", "omega_sq"}


def _csv(tmp_path):
    d = battery_frame()
    d["status"] = "ok"
    d["run"] = range(len(d))
    d["position"] = range(len(d))
    p = tmp_path / "battery.csv"
    d.to_csv(p, index=False)
    return p


def test_analysis_json_contract_shapes():
    an = analyze(battery_frame(), response="life_h", factors=["material", "temperature"])
    d = an.to_dict()
    json.dumps(d, allow_nan=False)  # strictly valid JSON
    for key in ("response", "transform", "anova", "means", "diagnostics", "effects",
                "comparisons"):
        assert key in d
    t = d["transform"]
    assert {"name", "lambda", "lambda_hat", "lambda_ci", "reason"} <= set(t)
    assert t["name"] in ("none", "log", "boxcox")
    terms = [r["term"] for r in d["anova"]]
    assert terms == ["material", "temperature", "material:temperature", "Residual"]
    assert all(ANOVA_KEYS <= set(r) for r in d["anova"])
    res = d["anova"][-1]
    assert res["F"] is None and res["p"] is None
    for e in d["effects"]:
        assert {"factor", "level", "reference", "ratio", "lower", "upper"} <= set(e)
    assert {e["reference"] for e in d["effects"] if e["factor"] == "material"} == {"1"}
    for c in d["comparisons"]:
        assert {"method", "factor", "within", "a", "b", "ratio", "lower", "upper",
                "p_adj"} <= set(c)
        assert c["method"] in ("pairwise", "tukey", "simple", "declared")
    for m in d["means"]:
        assert {"term", "levels", "mean", "lower", "upper", "n"} <= set(m)
    dg = d["diagnostics"]
    assert {"test", "statistic", "p", "verdict"} <= set(dg["normality"])
    assert {"test", "statistic", "p", "verdict"} <= set(dg["equal_variance"])
    assert isinstance(dg["outliers"], list)
    assert {"slope_per_100_runs", "p", "verdict"} <= set(dg["drift"])
    # .anova is the same table as a DataFrame
    assert list(an.anova.columns) == ["term", "df", "sum_sq", "mean_sq", "F", "p",
                                      "partial_eta_sq", "omega_sq"]
    assert an.anova["sum_sq"].iloc[0] == pytest.approx(d["anova"][0]["sum_sq"])


def test_none_transform_effects_carry_difference():
    an = analyze(battery_frame(), response="life_h", factors=["material", "temperature"],
                 transform="none", reference={"temperature": "70"})
    e = [x for x in an.effects if x["factor"] == "temperature"]
    assert {x["level"] for x in e} == {"15", "125"}
    d = battery_frame()
    m = d.groupby("temperature")["life_h"].mean()
    x15 = next(x for x in e if x["level"] == "15")
    assert x15["difference"] == pytest.approx(m["15"] - m["70"])  # balanced: plain means
    assert x15["ratio"] == pytest.approx(m["15"] / m["70"])
    assert x15["approximate"] is True


def test_cli_analyze_csv_and_json(cli, main_cli, tmp_path):
    # the first command in a new process (the console script), the rest in this one
    p = _csv(tmp_path)
    out = tmp_path / "a.json"
    r = cli("analyze", p, "--response", "life_h", "--factors", "material,temperature",
            "--transform", "none", "--json-out", out, "--reference", "temperature=70")
    assert r.returncode == 0, r.stderr
    assert "Sum of squares" in r.stdout and "material:temperature" in r.stdout
    d = json.loads(out.read_text())
    ss = {x["term"]: x["sum_sq"] for x in d["anova"]}
    # Montgomery battery-life example, from memory
    assert ss["material"] == pytest.approx(10683.72, abs=0.01)
    assert d["model"]["references"]["temperature"] == "70"
    r = main_cli("analyze", p, "--response", "life_h", "--factors", "material,temperature",
            "--json", "--ss-type", "3", "--model", "main")
    assert r.returncode == 0, r.stderr
    d = json.loads(r.stdout)
    assert [x["term"] for x in d["anova"]] == ["material", "temperature", "Residual"]


@pytest.mark.parametrize("args,needle", [
    (["--factors", "material,nope"], "nope"),
    (["--factors", "material", "--response", "speed"], "speed"),
    (["--factors", "material", "--reference", "material=9"], "9"),
    (["--factors", "material", "--model", "wild"], "wild"),
    ([], "factors"),
])
def test_cli_bad_input_one_line_exit_2(main_cli, tmp_path, args, needle):
    p = _csv(tmp_path)
    r = main_cli("analyze", p, *(["--response", "life_h"] if "--response" not in args else []),
                 *args)
    assert r.returncode == 2
    assert len(r.stderr.strip().splitlines()) == 1, r.stderr
    assert needle in r.stderr and "Traceback" not in r.stderr


def test_cli_missing_source(main_cli, tmp_path):
    r = main_cli("analyze", tmp_path / "none.csv", "--factors", "a")
    assert r.returncode == 2 and "none.csv" in r.stderr


def test_results_folder_analysis_and_json(tmp_path):
    from benchharness.experiment.file import load_experiment
    from benchharness.execute.runner import run_experiment

    exp = tmp_path / "exp.yaml"
    exp.write_text(textwrap.dedent(f"""\
        experiment: tiny-sleep
        command: [{sys.executable}, -c, "import time; time.sleep(0.02 * {{n}})"]
        factors:
          n: [1, 4]
          pad: ["a", "1.0"]
        replicates: 3
        order: blocked
        seed: 3
        compare:
          - n: ["4", "1"]
        """))
    out = run_experiment(load_experiment(exp), out=tmp_path / "res")
    an = analyze_results_folder(out.folder)
    assert an.factors == ("n", "pad")
    assert an.levels["pad"] == ["a", "1.0"]
    assert an.block == "block"  # blocked experiment: block is the additive term
    assert an.anova_rows[0]["term"] == "block"
    dec = [c for c in an.comparisons if c["method"] == "declared"]
    assert len(dec) == 1 and (dec[0]["a"], dec[0]["b"]) == ("4", "1")
    assert dec[0]["lower"] > 1.0  # sleeping 80 ms against 20 ms (plus start-up)
    path = write_analysis_json(an, out.folder / "analysis.json")
    assert json.loads(path.read_text())["response"] == "wall_s"


def test_bad_declared_comparison_points_at_the_experiment_file(tmp_path):
    from benchharness.errors import ExperimentError
    from benchharness.experiment.file import load_experiment
    from benchharness.execute.runner import run_experiment

    exp = tmp_path / "exp.yaml"
    exp.write_text(textwrap.dedent(f"""\
        experiment: tiny-compare
        command: [{sys.executable}, -c, "pass", "{{n}}"]
        factors:
          n: [1, 2]
        replicates: 2
        seed: 3
        compare:
          - n: ["1", "2"]
          - n: ["1", "7"]
        """))
    # refused before anything runs (it used to surface only in the analysis afterwards)
    with pytest.raises(ExperimentError) as info:
        run_experiment(load_experiment(exp), out=tmp_path / "res")
    msg = str(info.value)
    assert "'7' is not a level of 'n'" in msg and f"{exp}:9:" in msg  # line of the bad item
    assert not (tmp_path / "res").exists()
    # a frozen copy edited afterwards is still pointed at by the analysis
    exp.write_text(exp.read_text().replace('["1", "7"]', '["2", "1"]'))
    out = run_experiment(load_experiment(exp), out=tmp_path / "res")
    frozen = out.folder / "experiment.yaml"
    frozen.write_text(frozen.read_text().replace('["2", "1"]', '["1", "7"]'))
    with pytest.raises(ExperimentError) as info:
        analyze_results_folder(out.folder)
    msg = str(info.value)
    assert "'7' is not a level of 'n'" in msg and f"{frozen}:9:" in msg


def test_cli_hostile_factor_names(main_cli, tmp_path):
    rng = np.random.default_rng(3)
    names = ["C", "I", "it's \"Q\" a.b"]
    d = pd.DataFrame({names[0]: np.tile(["1", "1.0"], 12), names[1]: np.repeat(["x", "y"], 12),
                      names[2]: np.tile(["p", "p", "q", "q"], 6),
                      "wall_s": rng.lognormal(0, 0.1, 24)})
    p = tmp_path / "hostile.csv"
    d.to_csv(p, index=False)
    r = main_cli("analyze", p, "--factors", ",".join(names), "--json")
    assert r.returncode == 0, r.stderr
    out = json.loads(r.stdout)
    assert [f["levels"] for f in out["factors"]][0] == ["1", "1.0"]
    assert f"C:I:{names[2]}" in [x["term"] for x in out["anova"]]


def test_large_table_uses_anderson_darling_and_skips_rank_check():
    rng = np.random.default_rng(6)
    n = 60_000
    d = pd.DataFrame({"a": rng.choice(["x", "y", "z"], n), "b": rng.choice(["p", "q"], n)})
    d["wall_s"] = np.exp(rng.standard_t(3, n) * 0.05 + 0.3 * (d.a == "z"))
    an = analyze(d, factors=["a", "b"], transform="log")
    assert an.diagnostics["normality"]["test"] == "anderson-darling"
    assert an.diagnostics["normality"]["ok"] is False  # t(3) tails are heavy
    assert an.art is None
    assert any("runs only on request" in x for x in an.notes)
    d.loc[5, "a"] = None
    from benchharness.errors import DataError

    with pytest.raises(DataError, match="no level in 1 row"):
        analyze(d, factors=["a", "b"])


def test_text_layout_shows_failures_timeouts_and_notes():
    from benchharness.analysis import format_analysis

    rng = np.random.default_rng(2)
    d = pd.DataFrame({"threads": np.repeat(["1", "4", "16"], 6),
                      "wall_s": rng.lognormal(0, 0.1, 18), "status": "ok"})
    d.loc[[13, 14], "status"] = "timeout"
    text = format_analysis(analyze(d, factors=["threads"]))
    assert text.splitlines()[0].startswith("Analysis of wall_s — 16 runs in 3 cells")
    assert "threads=16: 4 of 6 ok (0 failed, 2 timed out) — has timeouts" in text
    assert "look faster than the configuration is" in text
    for word in ("Source", "df", "Sum of squares", "Mean square", "F", "p", "Residual"):
        assert word in text


def test_cli_awkward_inputs_one_line_or_a_result(main_cli, tmp_path):
    """No traceback: a text response, an unwritable --json path, one residual df."""
    text = tmp_path / "text.csv"
    text.write_text("a,wall_s\nx,fast\ny,slow\n")
    r = main_cli("analyze", text, "--factors", "a")
    assert r.returncode == 2 and len(r.stderr.strip().splitlines()) == 1, r.stderr
    assert "'fast'" in r.stderr and "--response" in r.stderr
    p = _csv(tmp_path)
    r = main_cli("analyze", p, "--response", "life_h", "--factors", "material",
            "--json-out", tmp_path / "no" / "such" / "dir" / "a.json")
    assert r.returncode == 2 and len(r.stderr.strip().splitlines()) == 1, r.stderr
    assert "cannot write" in r.stderr
    # two runs of one level: one residual degree of freedom, too few to look for outliers
    tiny = tmp_path / "tiny.csv"
    tiny.write_text("a,wall_s\nx,1\nx,2\n")
    r = main_cli("analyze", tiny, "--factors", "a", "--json")
    assert r.returncode == 0, r.stderr
    d = json.loads(r.stdout)
    assert d["anova"][-1]["df"] == 1
    assert "not enough residual degrees of freedom" in d["diagnostics"]["outlier_verdict"]
    r = main_cli("report", tiny, "--factors", "a", "--html", "/proc/no/such/r.html")
    assert r.returncode == 2 and "cannot write the report" in r.stderr, r.stderr
