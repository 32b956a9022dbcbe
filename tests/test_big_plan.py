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


def test_distinct_levels_merges_equal_cells_like_sorting_their_items():
    from benchharness.execute.engine import distinct_levels

    exp = Experiment.from_text(TRICKY)
    plan = make_plan(exp)
    # reference: the plain definition, each dict keyed by its sorted items
    def reference(dicts):
        return list({tuple(sorted(d.items())): d for d in dicts}.values())

    shared = [r.levels for r in plan.runs]                       # a fresh plan
    per_row = [dict(r.levels) for r in plan.runs]                # resumed: a dict per row
    mixed = per_row + [dict(reversed(list(d.items()))) for d in per_row[:7]] + [{"a": "new"}]
    for dicts in (shared, per_row, mixed):
        got = distinct_levels(dicts)
        assert got == reference(dicts)
    assert len(distinct_levels(shared)) == 30 and len(distinct_levels(mixed)) == 31


def test_collector_is_off_during_set_up_and_restored_after(tmp_path, monkeypatch):
    """Set-up (plan, folder, provenance) runs with the cyclic collector off; the runs
    with it on, set-up's objects frozen; afterwards everything is as before."""
    import gc

    from benchharness.execute import collector
    from benchharness.execute import runner as R
    from benchharness.execute.simulated import SimulatedExecutor

    seen = {}
    real_build, real_settle = R._write_new_folder, collector.settle

    def write_folder(*a, **k):
        seen["set-up"] = gc.isenabled()
        return real_build(*a, **k)

    def settle():
        real_settle()
        seen["runs"] = (gc.isenabled(), gc.get_freeze_count() > 0)

    exp = Experiment.from_text("experiment: t\ncommand: [x, '{a}']\nfactors: {a: [1, 2]}\n"
                               "replicates: 2\nseed: 2\n")
    monkeypatch.setattr(R, "_write_new_folder", write_folder)
    monkeypatch.setattr(collector, "settle", settle)
    out = R.run_experiment(exp, out=tmp_path / "out", executor=SimulatedExecutor())
    assert out.counts.get("ok") == 4
    assert seen == {"set-up": False, "runs": (True, True)}
    assert gc.isenabled() and gc.get_freeze_count() == 0
