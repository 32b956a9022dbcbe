"""Plans: counts, replicates, seeded orders, complete blocks."""

from __future__ import annotations

import collections
import json
import textwrap

from benchharness.design.plan import make_plan
from benchharness.experiment.file import Experiment

BASE = """\
experiment: p
command: [echo, "{a}", "{b}", "{c}"]
factors:
  a: [x, y, z]
  b: [1, 2]
  c: [p, q]
replicates: 4
warmup: 1
seed: 11
"""


def exp(extra=""):
    return Experiment.from_text(textwrap.dedent(BASE + extra))


def cellkey(r):
    return tuple(sorted(r.levels.items()))


def test_counts_and_replicates():
    plan = make_plan(exp())
    assert plan.cells == 12
    assert plan.timed_runs == 48 and plan.warmup_runs == 12
    timed = [r for r in plan.runs if not r.warmup]
    per_cell = collections.Counter(cellkey(r) for r in timed)
    assert len(per_cell) == 12 and set(per_cell.values()) == {4}
    for key in per_cell:
        reps = sorted(r.replicate for r in timed if cellkey(r) == key)
        assert reps == [1, 2, 3, 4]
    # warm-ups come first, one per cell
    first = plan.runs[:12]
    assert all(r.warmup for r in first)
    assert len({cellkey(r) for r in first}) == 12
    assert [r.position for r in plan.runs] == list(range(60))
    assert len({r.run for r in plan.runs}) == 60


def test_same_seed_same_order_different_seed_different():
    a = [(r.run, cellkey(r), r.replicate) for r in make_plan(exp()).runs]
    b = [(r.run, cellkey(r), r.replicate) for r in make_plan(exp()).runs]
    c = [(r.run, cellkey(r), r.replicate) for r in make_plan(exp(), seed=12).runs]
    assert a == b
    assert a != c


def test_blocked_order_each_block_complete():
    plan = make_plan(exp("order: blocked\n"))
    timed = [r for r in plan.runs if not r.warmup]
    blocks = collections.defaultdict(list)
    for r in timed:
        blocks[r.block].append(r)
    assert sorted(blocks) == [1, 2, 3, 4]
    for b, runs in blocks.items():
        assert len({cellkey(r) for r in runs}) == 12 == len(runs)
        assert {r.replicate for r in runs} == {b}
    # blocks run one after another
    positions = [(r.block, r.position) for r in timed]
    assert [b for b, _ in sorted(positions, key=lambda t: t[1])] == sorted(b for b, _ in positions)


def test_listed_order_is_the_file_order():
    plan = make_plan(exp("order: listed\n"))
    timed = [r for r in plan.runs if not r.warmup]
    assert timed[0].levels == {"a": "x", "b": "1", "c": "p"}
    assert [r.replicate for r in timed[:4]] == [1, 2, 3, 4]


def test_randomized_is_not_listed():
    plan = make_plan(exp())
    timed = [cellkey(r) for r in plan.runs if not r.warmup]
    listed = [cellkey(r) for r in make_plan(exp("order: listed\n")).runs if not r.warmup]
    assert timed != listed and sorted(timed) == sorted(listed)


def test_plan_json_shape(cli, tmp_path):
    p = tmp_path / "e.yaml"
    p.write_text(BASE)
    r = cli("plan", p, "--json")
    assert r.returncode == 0, r.stderr
    d = json.loads(r.stdout)
    assert d["cells"] == 12 and d["runs"] == 48 and d["warmup_runs"] == 12 and d["seed"] == 11
    assert len(d["order"]) == 60
    first = d["order"][0]
    assert set(first) >= {"run", "block", "replicate", "warmup", "levels"}
    assert all(isinstance(v, str) for v in first["levels"].values())


def test_drawn_seed_is_reported(cli, tmp_path):
    p = tmp_path / "e.yaml"
    p.write_text(BASE.replace("seed: 11\n", ""))
    r = cli("plan", p, "--json")
    assert isinstance(json.loads(r.stdout)["seed"], int)


def test_plan_imports_no_heavy_libraries(root):
    import subprocess
    import sys

    code = ("import sys, runpy; sys.argv=['benchharness','plan',%r]; "
            "import benchharness.cli as c\n"
            "try: c.main(sys.argv[1:])\nexcept SystemExit: pass\n"
            "bad=[m for m in ('statsmodels','scipy','matplotlib','dask','pandas') "
            "if m in sys.modules]\nprint('HEAVY', bad)") % str(root / "tests" / "data" / "tiny.yaml")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=root)
    assert "HEAVY []" in out.stdout, out.stdout + out.stderr
    code2 = ("import sys; import benchharness.cli as c\n"
             "try: c.main(['--help'])\nexcept SystemExit: pass\n"
             "print('HEAVY', [m for m in ('statsmodels','scipy','matplotlib','dask','pandas') "
             "if m in sys.modules])")
    out = subprocess.run([sys.executable, "-c", code2], capture_output=True, text=True, cwd=root)
    assert "HEAVY []" in out.stdout, out.stdout + out.stderr


def test_plan_piped_has_no_trailing_spaces(cli, tmp_path):
    """docs/cli.md: piped output has no line ending in spaces. The last factor's levels
    (``tiny``, ``enormous``) are longer than its name, so a padded header would end in
    spaces; the rows with the short level would too."""
    p = tmp_path / "e.yaml"
    p.write_text(BASE.replace("  c: [p, q]", "  c: [tiny, enormous]"))
    r = cli("plan", p)
    assert r.returncode == 0, r.stderr
    lines = r.stdout.splitlines()
    assert any(ln.lstrip().startswith("#") and ln.endswith(" c") for ln in lines), r.stdout
    assert any(ln.endswith(" tiny") for ln in lines)
    assert [ln for ln in lines if ln != ln.rstrip()] == []
