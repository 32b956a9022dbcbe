"""Excluded combinations and conditional factors (``exclude:`` / ``only_when:``): what
`plan` says, what each cell renders, and the located errors (exit 2)."""

from __future__ import annotations

import itertools
import json
import subprocess

import pytest

from benchharness.design import build_plan
from benchharness.errors import ExperimentError
from benchharness.experiment.file import parse_experiment
from benchharness.experiment.space import NOT_APPLIED

BASE = """\
experiment: spill
command: [./spill, --codec, "{codec}", "--level={level}", --rows, "{rows}"]
factors:
  codec: [none, zlib, lzma]
  level: [1, 6, 9]
  rows: [small, large]
"""
SPACE = """\
only_when:
  level: {codec: {not: none}}
exclude:
  - {codec: lzma, level: 9, rows: large, why: too slow}
"""


def exp_of(extra: str = SPACE, base: str = BASE, **kw):
    return parse_experiment(base + extra, "space.yaml")


def test_cells_that_remain_follow_the_rules_exactly():
    exp = exp_of(SPACE + "replicates: 3\nseed: 5\n")
    plan = build_plan(exp)
    # the truth, counted by hand from the rules: none has no level (2 cells), zlib 3x2,
    # lzma 3x2 less lzma/9/large
    want = {("none", NOT_APPLIED, r) for r in ("small", "large")}
    want |= {(c, lv, r) for c, lv, r in itertools.product(("zlib", "lzma"), ("1", "6", "9"),
                                                          ("small", "large"))}
    want.discard(("lzma", "9", "large"))
    got = {(r.levels["codec"], r.levels["level"], r.levels["rows"]) for r in plan.runs}
    assert got == want and plan.cells == 13
    assert plan.timed_runs == 39
    # every remaining cell runs exactly `replicates` times
    counts = {c: 0 for c in want}
    for r in plan.runs:
        counts[(r.levels["codec"], r.levels["level"], r.levels["rows"])] += 1
    assert set(counts.values()) == {3}
    info = plan.to_json_dict()["space"]
    assert info["combinations"] == 18 and info["cells"] == 13
    assert info["excluded"][0]["removed"] == 1 and info["excluded"][0]["why"] == "too slow"
    assert info["conditional"]["level"]["cells_without"] == 2


def test_blocked_order_makes_each_block_the_cells_that_remain():
    exp = exp_of(SPACE + "replicates: 2\norder: blocked\nseed: 3\n")
    plan = build_plan(exp)
    by_block: dict = {}
    for r in plan.runs:
        by_block.setdefault(r.block, []).append(tuple(r.levels.values()))
    assert sorted(by_block) == [1, 2]
    for cells in by_block.values():
        assert len(cells) == 13 and len(set(cells)) == 13


def test_a_conditional_factor_is_left_out_of_the_command_where_it_does_not_apply():
    exp = exp_of()
    off = {"codec": "none", "level": NOT_APPLIED, "rows": "small"}
    on = {"codec": "zlib", "level": "6", "rows": "small"}
    assert exp.render_command(exp.command, off)[0] == ("./spill", "--codec", "none",
                                                       "--rows", "small")
    assert exp.render_command(exp.command, on)[0] == ("./spill", "--codec", "zlib",
                                                      "--level=6", "--rows", "small")
    shell = BASE.replace('command: [./spill, --codec, "{codec}", "--level={level}", --rows, '
                         '"{rows}"]', 'shell: true\ncommand: "echo {codec} L{level}."')
    sexp = exp_of(base=shell)
    for levels, said in ((off, "none L.\n"), (on, "zlib L6.\n")):   # empty where it does not apply
        text = sexp.render_command(sexp.command, levels)[1]
        assert subprocess.run(["/bin/sh", "-c", text], capture_output=True,
                              text=True).stdout == said
    assert exp.levels_of("level") == ("1", "6", "9", NOT_APPLIED)
    assert exp.levels_of("codec") == ("none", "zlib", "lzma")


@pytest.mark.parametrize("extra, line, col, words", [
    ("exclude:\n  - {codek: lzma}\n", 8, 6, "did you mean 'codec'"),
    ("exclude:\n  - {codec: zstd}\n", 8, 13, "'zstd' is not a level of 'codec'"),
    ("exclude:\n  - {codec: [none, zlib]}\n  - {codec: lzma}\n", 9, 5, "remove every combination"),
    ("only_when:\n  level: {codec: [none, zlib, lzma]}\n", 8, 3, "always applies"),
    ("only_when:\n  level: {level: 1}\n", 8, 11, "cannot depend on itself"),
    ("only_when:\n  level: {codec: {not: [none, zlib, lzma]}}\n", 8, 18, "leaves no level"),
    ("only_when:\n  lvl: {codec: zlib}\n", 8, 3, "did you mean 'level'"),
    ("only_when:\n  level: {codec: zlib}\n  rows: {level: 1}\n", 9, 3, "conditional itself"),
    ("design: {type: fractional, generators: ['C = AB']}\nexclude:\n  - {codec: zlib, rows: large}\n",
     7, 1, "cannot be combined"),
])
def test_bad_rules_are_one_located_error(extra, line, col, words):
    base = BASE
    if "design" in extra:
        base = BASE.replace("[none, zlib, lzma]", "[none, zlib]").replace("[1, 6, 9]", "[1, 9]")
    with pytest.raises(ExperimentError) as e:
        exp = exp_of(extra, base=base)
        build_plan(exp)
    msg = str(e.value)
    assert f"space.yaml:{line}:{col}:" in msg and words in msg, msg


def test_a_level_spelt_like_the_marker_is_refused_for_a_conditional_factor():
    with pytest.raises(ExperimentError, match="rename that level"):
        exp_of(base=BASE.replace("[1, 6, 9]", "[1, '-']"))


def test_a_rule_that_removes_nothing_is_a_located_warning():
    exp = exp_of(SPACE + "  - {codec: none, level: 6}\n")
    assert any(w.startswith("space.yaml:11:5:") and "removes no combination" in w
               for w in exp.warnings)


def test_plan_says_what_was_removed_and_why(main_cli, tmp_path):
    f = tmp_path / "e.yaml"
    f.write_text(BASE + SPACE + "replicates: 2\nseed: 1\n")
    r = main_cli("plan", str(f), "--show", "0")
    assert r.returncode == 0, r.stderr
    assert "cells       13" in r.stdout and "timed runs  26" in r.stdout
    assert "13 of 18 combinations run" in r.stdout
    assert "level applies only where codec is not none" in r.stdout
    assert "excluded codec=lzma, level=9, rows=large (line 10): too slow: 1 combination " \
           "removed" in r.stdout
    r = main_cli("plan", str(f), "--json")
    assert json.loads(r.stdout)["space"]["cells"] == 13
    f.write_text(BASE + "exclude:\n  - {codec: [none, zlib, lzma]}\n")
    r = main_cli("plan", str(f))
    assert r.returncode == 2 and "Traceback" not in r.stderr
    assert len(r.stderr.strip().splitlines()) == 1 and ":8:5:" in r.stderr


def test_run_analyze_and_choose_on_a_space_with_a_planted_truth(tmp_path, main_cli):
    """End to end on the simulated system (no processes): the excluded setting would be the
    fastest where it ran, yet choose never picks it; analyze reads level within codec."""
    from benchharness.analysis import analyze
    from benchharness.choose import choose
    from benchharness.execute.runner import run_experiment
    from benchharness.execute.simulated import SimulatedExecutor, SimulatedModel
    from benchharness.results.journal import load_results

    exp = exp_of(SPACE.replace("lzma, level: 9, rows: large", "lzma, level: 9, rows: large")
                 + "roles: {workload: [rows]}\nreplicates: 3\nseed: 2\n")
    truth = SimulatedModel(base_s=0.05, cv=0.03, effects={
        "codec": {"none": 1.0, "zlib": 0.9, "lzma": 0.7},
        "level": {"1": 1.0, "6": 1.1, "9": 0.5},
        "rows": {"small": 1.0, "large": 2.0}})
    run_experiment(exp, out=tmp_path / "r", executor=SimulatedExecutor(truth, seed=4))
    res = load_results(tmp_path / "r")
    ran = {(r["levels"]["codec"], r["levels"]["level"], r["levels"]["rows"]) for r in res.records}
    assert ("lzma", "9", "large") not in ran and ("none", NOT_APPLIED, "large") in ran
    an = analyze(res)
    said = " | ".join(f["statement"] for f in an.findings)
    assert "level matters within codec" in said and "rows matters" in said
    ch = choose(res)
    # lzma/9 (0.35 on small) is faster than zlib/9 (0.45) but never ran on large rows
    assert ch.best == {"codec": "zlib", "level": "9"}
    assert len(ch.candidates) == 6 and {"codec": "lzma", "level": "9"} not in [
        c["setting"] for c in ch.candidates]
    assert ch.unavailable == [{"setting": {"codec": "lzma", "level": "9"},
                               "missing": [{"rows": "large"}]}]
    assert any("lzma, level=9 is not a candidate" in r for r in ch.reasons)
    # what a user reads, and the exit codes
    r = main_cli("analyze", str(tmp_path / "r"), "--plain")
    assert r.returncode == 0, r.stderr
    assert "level matters within codec" in r.stdout and "level within codec" in r.stdout
    r = main_cli("choose", str(tmp_path / "r"))
    assert r.returncode == 0, r.stderr
    assert "Recommended default: codec=zlib, level=9" in r.stdout
    assert "codec=lzma, level=9 is not a candidate" in r.stdout


def test_the_gate_compares_builds_on_the_workloads_that_exist():
    from benchharness.gate.config import gate_settings
    from benchharness.gate.session import workloads_of

    base = """\
experiment: g
command: [./app, "{build}", "--level={level}", "{rows}"]
factors:
  build: [old, new]
  codec: [none, zlib]
  level: [1, 9]
  rows: [small, large]
only_when:
  level: {codec: zlib}
gate: {factor: build, baseline: old}
"""
    exp = parse_experiment(base + "exclude:\n  - {codec: zlib, level: 9, rows: large}\n", "g.yaml")
    gate_settings(exp)
    assert sorted(workloads_of(exp, "build")) == [
        "codec=none level=- rows=large", "codec=none level=- rows=small",
        "codec=zlib level=1 rows=large", "codec=zlib level=1 rows=small",
        "codec=zlib level=9 rows=small"]
    exp = parse_experiment(base + "exclude:\n  - {build: new, rows: large}\n", "g.yaml")
    with pytest.raises(ExperimentError, match=r"g\.yaml:10:16: 'gate: factor' 'build' is named"):
        gate_settings(exp)
