"""Large plans: built from arrays, written once per cell, nothing copied per run.

The run order of a seed is the one numpy's PCG64 permutation gives (the
reference: numpy's Generator itself, drawn here the way the plan documents
it); plan.csv written from the planned runs is byte for byte what the
row-by-row writer (the csv module) writes, tricky labels included, and reads
back; runs of a cell share one levels dict and cells with the same templated
variables share one environment, so memory grows with cells, not with runs
times environment size.
"""

from __future__ import annotations

import numpy as np

from benchharness.design.plan import make_plan
from benchharness.experiment.file import Experiment
from benchharness.results import journal as J

TRICKY = ('experiment: t\ncommand: [x, "{a}", "{b}"]\nfactors:\n'
          '  a: ["1,2", "say \\"hi\\"", plain, " sp ", "1.10", "010"]\n'
          '  b: [x, "é", "line\\nbreak", "\\"", "a b"]\nreplicates: 2\nwarmup: 1\nseed: 5\n')


def test_randomized_order_is_the_documented_permutation():
    exp = Experiment.from_text("experiment: t\ncommand: [x]\nfactors: {a: [1, 2, 3], "
                               "b: [p, q]}\nreplicates: 4\nseed: 11\n")
    plan = make_plan(exp)
    # reference: numpy's PCG64 permutation of (cell, replicate), replicate-major
    perm = np.random.Generator(np.random.PCG64(11)).permutation(6 * 4)
    cells = [(a, b) for a in "123" for b in "pq"]
    assert [(r.levels["a"], r.levels["b"]) for r in plan.runs] == \
        [cells[i % 6] for i in perm]
    assert [r.replicate for r in plan.runs] == [1 + i // 6 for i in perm]
    assert [r.position for r in plan.runs] == list(range(24))


def test_plan_csv_from_planned_runs_equals_the_row_writer(tmp_path):
    exp = Experiment.from_text(TRICKY)
    plan = make_plan(exp)
    (tmp_path / "rows").mkdir()
    (tmp_path / "runs").mkdir()
    J.write_plan_csv(tmp_path / "rows", exp.factor_names, plan.rows())   # csv module per row
    J.write_plan_csv(tmp_path / "runs", exp.factor_names, plan.runs)
    assert (tmp_path / "rows" / "plan.csv").read_bytes() == \
        (tmp_path / "runs" / "plan.csv").read_bytes()
    back = J.read_plan_csv(tmp_path / "runs", exp.factor_names)
    assert [dict(r["levels"]) for r in back] == [dict(r.levels) for r in plan.runs]
    assert [r["warmup"] for r in back] == [r.warmup for r in plan.runs]


def test_runs_share_levels_and_cells_share_one_environment():
    from benchharness.execute.cells import CellCache

    exp = Experiment.from_text("experiment: t\ncommand: [x, '{a}', '{b}']\n"
                               "factors: {a: [1, 2, 3, 4], b: [p, q, r]}\nreplicates: 5\n"
                               "env: {MODE: fixed}\nseed: 2\n")
    plan = make_plan(exp)
    assert len(plan.runs) == 60
    assert len({id(r.levels) for r in plan.runs}) == 12          # one dict per cell
    cells = CellCache(exp, {})
    envs = {id(cells.get(r.levels)["env"]) for r in plan.runs}
    assert len(envs) == 1                                        # not one copy per cell
    assert cells.get(plan.runs[0].levels)["env"]["MODE"] == "fixed"
    templated = Experiment.from_text("experiment: t\ncommand: [x]\nfactors: {a: [1, 2]}\n"
                                     "env: {LEVEL: '{a}'}\n")
    tc = CellCache(templated, {})
    assert tc.get({"a": "1"})["env"]["LEVEL"] == "1" and tc.get({"a": "2"})["env"]["LEVEL"] == "2"
