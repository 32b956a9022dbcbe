"""The design section of the experiment file feeds the plan and `benchharness plan`."""

from __future__ import annotations

import json
import textwrap

import pytest

from benchharness.design import build_plan
from benchharness.errors import ExperimentError
from benchharness.experiment.file import Experiment

BASE = """\
experiment: pool-screen
about: Which thread pool settings matter for the request router?
command: [python3, -c, "pass", "{threads}", "{batch}", "{cache}", "{pin}"]
factors:
  threads: [4, 16]
  batch: [1, 64]
  cache: [off, on]
  pin: [no, yes]
replicates: 2
seed: 11
"""


def exp(design: str, base: str = BASE) -> Experiment:
    return Experiment.from_text(base + textwrap.dedent(design), path="pool.yaml")


def test_half_fraction_replaces_full_factorial():
    e = exp('design: {type: fractional, generators: ["pin = threads*batch*cache"]}\n')
    plan = build_plan(e)
    assert plan.cells == 8
    assert plan.timed_runs == 16
    coded = {"4": -1, "16": 1, "1": -1, "64": 1, "off": -1, "on": 1, "no": -1, "yes": 1}
    for r in plan.runs:
        lv = r.levels
        assert coded[lv["pin"]] == coded[lv["threads"]] * coded[lv["batch"]] * coded[lv["cache"]]
    assert plan.info["resolution"] == 4
    assert plan.info["defining_relation"] == ["ABCD"]
    assert plan.info["aliases"]["AB"] == ["CD"]


def test_resolution_and_cells_requests():
    assert build_plan(exp("design: {type: fractional, resolution: 4}\n")).cells == 8
    assert build_plan(exp("design: {cells: 8}\n")).cells == 8
    assert build_plan(exp("design: {type: full}\n")).cells == 16


def test_blocks_set_the_block_column():
    plan = build_plan(exp("design: {blocks: 4}\n"))
    assert plan.cells == 16
    conf = plan.info["confounded_with_blocks"]
    assert len(conf) == 3
    timed = [r for r in plan.runs if not r.warmup]
    # 2 replicates x 4 blocks, numbered 1..8; each block has 4 runs, run contiguously.
    assert sorted({r.block for r in timed}) == list(range(1, 9))
    seq = [r.block for r in timed]
    for b in set(seq):
        idx = [i for i, x in enumerate(seq) if x == b]
        assert len(idx) == 4 and idx == list(range(idx[0], idx[0] + 4))


def test_block_on_with_names():
    plan = build_plan(exp('design: {block_on: ["threads*batch*cache", "batch*cache*pin"]}\n'))
    assert sorted(plan.info["confounded_with_blocks"]) == ["ABC", "AD", "BCD"]


@pytest.mark.parametrize("design, fragment", [
    ('design: {type: fractional, generators: ["pin = threads*speed"]}\n', "not a factor"),
    ("design: {type: fractional}\n", "needs 'generators'"),
    ("design: {cells: 8, resolution: 4}\n", "only one of"),
    ("design: {blocks: 3}\n", "power of two"),
    ("design: {kind: half}\n", "unknown key 'kind'"),
    ("design: {type: half}\n", "not known"),
    ("design: {type: full, cells: 8}\n", "'type' is 'full'"),
])
def test_design_errors_point_at_the_line(design, fragment):
    e = exp(design)
    with pytest.raises(ExperimentError) as info:
        build_plan(e)
    msg = str(info.value)
    assert fragment in msg
    assert msg.startswith("pool.yaml:11:")


def test_generator_error_points_at_that_generator():
    e = exp('design:\n  type: fractional\n  generators:\n    - "pin = threads*batch*cache"\n'
            '    - "D = AB"\n')
    with pytest.raises(ExperimentError, match=r"^pool.yaml:15:7: design: generator"):
        build_plan(e)


def test_three_level_factor_is_refused():
    base = BASE.replace("threads: [4, 16]", "threads: [4, 8, 16]")
    with pytest.raises(ExperimentError, match="'threads' has 3 levels"):
        build_plan(exp("design: {cells: 8}\n", base))


def test_plan_command_shows_design(cli, tmp_path):
    f = tmp_path / "pool.yaml"
    f.write_text(BASE + 'design: {type: fractional, generators: ["D = ABC"], blocks: 2}\n')
    r = cli("plan", f)
    assert r.returncode == 0, r.stderr
    assert "fractional factorial 2^(4-1)" in r.stdout
    assert "defining relation: I = ABCD" in r.stdout
    assert "AB = CD" in r.stdout
    assert "confounded with blocks" in r.stdout
    r = cli("plan", f, "--json")
    d = json.loads(r.stdout)
    assert d["resolution"] == 4 and d["defining_relation"] == ["ABCD"]
    assert d["aliases"]["A"] == ["BCD"]
    assert len(d["confounded_with_blocks"]) == 1
    f.write_text(BASE + 'design: {type: fractional, generators: ["D = AE"]}\n')
    r = cli("plan", f)
    assert r.returncode == 2 and "Traceback" not in r.stderr
    assert "pool.yaml:11:" in r.stderr and "letter E names no factor" in r.stderr
