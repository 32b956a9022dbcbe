"""What `plan` and the run summary COUNT for a response surface: its centre copies are runs
of one cell, not further cells (docs/design.md, "Response surfaces")."""

from __future__ import annotations

import json
from pathlib import Path

from benchharness.cli import main
from benchharness.design import build_plan
from benchharness.experiment.file import load_experiment

SURFACE = Path(__file__).resolve().parent.parent / "experiments" / "spool-surface.yaml"


def test_plan_counts_a_surface_centre_once_and_its_copies_as_runs(capsys):
    # Reference: a central composite design in k = 2 settings has 2^k corner points,
    # 2k axial points and one centre point, 9 distinct points (Box & Wilson 1951);
    # with centre_runs: 5 and replicates: 2 it makes (4 + 4 + 5) x 2 = 26 runs, 10 of
    # them at the centre.
    assert main(["plan", str(SURFACE)]) == 0
    out = capsys.readouterr().out
    assert "cells       9\n" in out
    assert ("timed runs  26 (2 per cell; 10 at the centre buffer_kib=64, workers=5: 5 in "
            "each of 2 replicates)") in out
    assert main(["plan", str(SURFACE), "--json"]) == 0
    d = json.loads(capsys.readouterr().out)
    assert d["cells"] == 9 and d["runs"] == 26
    timed = [tuple(sorted(r["levels"].items())) for r in d["order"] if not r["warmup"]]
    assert len(set(timed)) == 9 and len(timed) == 26
    centre = (("buffer_kib", "64"), ("workers", "5"))
    assert timed.count(centre) == 10


def test_the_run_summary_shows_the_centre_as_one_cell_with_all_its_runs():
    # the run summary's per-cell rows (`cell_summary`), given a record of every planned
    # run as it would come back ok: 9 rows, the centre's with its 10 runs
    from benchharness.execute.runner import cell_summary

    exp = load_experiment(SURFACE)
    plan = build_plan(exp)
    records = [{"levels": dict(r.levels), "status": "ok", "wall_s": 0.01 + 0.001 * r.run}
               for r in plan.runs if not r.warmup]
    rows = cell_summary(records, exp.factor_names)
    assert len(rows) == 9
    assert [r["n"] for r in rows if r["levels"] == {"buffer_kib": "64", "workers": "5"}] == [10]


def test_plain_plans_keep_their_counts():
    # a full factorial and a blocked order: every listed cell distinct, nothing repeated
    from benchharness.experiment.file import parse_experiment

    exp = parse_experiment("experiment: t\ncommand: [x, '{a}', '{b}']\nfactors:\n"
                           "  a: [1, 2, 3]\n  b: [x, y]\nreplicates: 2\norder: blocked\n"
                           "seed: 1\n", "t.yaml")
    plan = build_plan(exp)
    assert plan.cells == 6 and plan.timed_runs == 12 and plan.repeated == ()
    assert {r.block for r in plan.runs} == {1, 2}
