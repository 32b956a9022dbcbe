"""The plan's numbering and blocks as its docstring states them (design/plan.py).

Planted truths: every number below follows from the plan's definition (``run`` and
``position`` count from ``first_run``; warm-up runs have replicate 0 and block 0;
a design that confounds effects with blocks runs each of its blocks complete,
numbered ``(replicate - 1) * blocks + block + 1``). These were written to kill
mutants that survived the rest of the suite (DEVELOPERS.md, "Mutation testing").
"""

from __future__ import annotations

import collections
import itertools
import textwrap

import pytest

from benchharness.design.plan import draw_seed, full_factorial_cells, make_plan
from benchharness.experiment.file import Experiment

BASE = """\
experiment: numbering
command: [echo, "{a}", "{b}"]
factors:
  a: [x, y]
  b: ["1", "2"]
replicates: 3
warmup: 2
seed: 5
"""


def exp(extra=""):
    return Experiment.from_text(textwrap.dedent(BASE + extra))


@pytest.mark.parametrize("order", ["randomized", "blocked", "listed"])
def test_warmup_runs_have_replicate_zero_block_zero_and_come_first(order):
    plan = make_plan(exp(f"order: {order}\n"))
    warm = [r for r in plan.runs if r.warmup]
    timed = [r for r in plan.runs if not r.warmup]
    assert len(warm) == 2 * 4 and len(timed) == 3 * 4
    assert plan.runs[: len(warm)] == tuple(warm)
    assert {(r.replicate, r.block) for r in warm} == {(0, 0)}
    assert collections.Counter(r.cell for r in warm) == {0: 2, 1: 2, 2: 2, 3: 2}
    assert plan.warmup_runs == 8 and plan.timed_runs == 12
    want_blocks = {"randomized": {1}, "listed": {1}, "blocked": {1, 2, 3}}[order]
    assert {r.block for r in timed} == want_blocks
    if order == "blocked":
        assert all(r.block == r.replicate for r in timed)


def test_appended_replicates_continue_the_numbering():
    # adaptive replication appends complete replicates: ids and positions continue from
    # first_run, replicates from first_replicate, and the cells are the same
    plan = make_plan(exp(), seed=7, replicates=2, first_replicate=4, warmup=0, first_run=12)
    assert [r.run for r in plan.runs] == list(range(12, 20))
    assert [r.position for r in plan.runs] == list(range(12, 20))
    assert sorted(r.replicate for r in plan.runs) == [4] * 4 + [5] * 4
    assert plan.warmup_runs == 0 and plan.timed_runs == 8
    rows = plan.rows()
    assert [row["run"] for row in rows] == list(range(12, 20))
    assert [row["position"] for row in rows] == list(range(12, 20))
    assert set(rows[0]) == {"run", "position", "block", "replicate", "warmup", "a", "b"}


def test_listed_warmups_are_in_the_files_order_whatever_the_seed():
    for seed in (1, 2, 3):
        plan = make_plan(exp("order: listed\n"), seed=seed)
        assert [r.cell for r in plan.runs if r.warmup] == [0, 1, 2, 3, 0, 1, 2, 3]


def test_cells_are_the_full_factorial_first_factor_slowest():
    cells = full_factorial_cells(exp())
    assert cells == [{"a": "x", "b": "1"}, {"a": "x", "b": "2"},
                     {"a": "y", "b": "1"}, {"a": "y", "b": "2"}]
    plan = make_plan(exp("order: listed\n"))
    timed = [r for r in plan.runs if not r.warmup]
    assert [(r.cell, r.replicate) for r in timed] == [(c, k) for c in range(4) for k in (1, 2, 3)]
    assert all(r.levels == cells[r.cell] for r in plan.runs)


def test_design_blocks_run_complete_and_numbered_per_replicate():
    # blocks_of_cell: cells 0 and 3 in design block 0, cells 1 and 2 in block 1 (AB
    # confounded with blocks). Each replicate runs both blocks, each complete, one after
    # the other; block numbers are (replicate - 1) * 2 + design block + 1.
    of = [0, 1, 1, 0]
    for seed in range(1, 30):
        plan = make_plan(exp(), seed=seed, blocks_of_cell=of, warmup=0)
        timed = list(plan.runs)
        assert len(timed) == 12
        for r in timed:
            assert r.block == (r.replicate - 1) * 2 + of[r.cell] + 1
        # contiguous blocks in execution order, each with its two cells
        groups = [list(g) for _, g in itertools.groupby(timed, key=lambda r: r.block)]
        assert len(groups) == 6
        assert sorted(g[0].block for g in groups) == [1, 2, 3, 4, 5, 6]
        for g in groups:
            assert sorted(r.cell for r in g) == ([0, 3] if of[g[0].cell] == 0 else [1, 2])
        # replicates follow one another
        assert [r.replicate for r in timed] == sorted(r.replicate for r in timed)
    firsts = {make_plan(exp(), seed=s, blocks_of_cell=of, warmup=0).runs[0].block
              for s in range(1, 30)}
    assert firsts == {1, 2}          # which design block goes first is drawn, not fixed


def test_listed_order_with_design_blocks_numbers_blocks_too():
    of = [0, 1, 1, 0]
    plan = make_plan(exp("order: listed\n"), blocks_of_cell=of, warmup=0)
    assert [(r.cell, r.replicate, r.block) for r in plan.runs][:3] == [(0, 1, 1), (0, 2, 3),
                                                                         (0, 3, 5)]
    assert [r.block for r in plan.runs if r.cell == 1] == [2, 4, 6]


def test_seed_recorded_and_drawn_when_absent():
    plan = make_plan(exp())
    assert plan.seed == 5 and plan.order == "randomized" and plan.factors == ("a", "b")
    assert plan.cells == 4
    no_seed = Experiment.from_text(BASE.replace("seed: 5\n", ""))
    drawn = {make_plan(no_seed).seed for _ in range(5)}
    assert all(1 <= s < 2**31 for s in drawn) and len(drawn) > 1
    # a drawn seed is uniform over 1 .. 2^31 - 1: fifty draws are all distinct (a repeat has
    # probability about 6e-7) and at least one is above 2^30 (all below: 2^-50)
    seeds = [draw_seed() for _ in range(50)]
    assert all(1 <= s < 2**31 for s in seeds)
    assert len(set(seeds)) == 50 and max(seeds) > 2**30


def test_plan_json_counts_and_info():
    plan = make_plan(exp(), info={"design": "full"})
    d = plan.to_json_dict()
    assert (d["cells"], d["runs"], d["warmup_runs"], d["seed"]) == (4, 12, 8, 5)
    assert d["design"] == "full"
    assert len(d["order"]) == 20
    first = d["order"][0]
    assert first == {"run": 0, "block": 0, "replicate": 0, "warmup": True,
                     "levels": plan.runs[0].levels}


def test_appended_runs_after_warmups_number_from_first_run():
    # run ids and positions count from first_run through the warm-up runs too: 4 warm-up
    # runs then 8 timed runs are runs 5..16, each id once
    plan = make_plan(exp(), seed=3, replicates=2, warmup=1, first_run=5)
    assert [r.run for r in plan.runs] == list(range(5, 17))
    assert [r.position for r in plan.runs] == list(range(5, 17))
    assert [r.warmup for r in plan.runs] == [True] * 4 + [False] * 8


@pytest.mark.parametrize("end", ["lowest", "highest"])
def test_a_seed_drawn_at_either_end_of_the_range_is_valid(monkeypatch, end):
    # the random source at its extremes (randbelow(n) gives 0 .. n - 1) gives the ends
    # of 1 .. 2^31 - 1; such a seed gives a plan and is recorded as drawn
    import secrets

    monkeypatch.setattr(secrets, "randbelow", (lambda n: 0) if end == "lowest" else
                        (lambda n: n - 1))
    want = 1 if end == "lowest" else 2**31 - 1
    assert draw_seed() == want
    no_seed = Experiment.from_text(BASE.replace("seed: 5\n", ""))
    plan = make_plan(no_seed)
    assert plan.seed == want and plan.timed_runs == 12


def test_a_plan_and_its_runs_cannot_be_changed_after_planning():
    # a plan is plain data shared by the stages after it (frozen dataclasses): the runner,
    # the journal and the report all read the same runs
    import dataclasses

    plan = make_plan(exp())
    with pytest.raises(dataclasses.FrozenInstanceError):
        plan.seed = 6
    with pytest.raises(dataclasses.FrozenInstanceError):
        plan.runs[0].block = 9
