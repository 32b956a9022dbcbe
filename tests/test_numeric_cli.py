"""Numeric factors from the user's side: the ``numeric:`` section, `plan`, `analyze`, `report`."""

from __future__ import annotations

import json
import textwrap

import numpy as np
import pandas as pd
import pytest

from benchharness.errors import ExperimentError
from benchharness.experiment.file import Experiment
from benchharness.experiment.quantities import numeric_factors

BASE = """\
experiment: scaling
command: [./job, "{pool}", "{n}", "{level}"]
factors:
  pool: [1, 2, 4]
  n: [1000, 10000]
  level: [1, 6, 9]
"""


def _exp(extra=""):
    from benchharness.experiment.sections import validate_sections

    e = Experiment.from_text(textwrap.dedent(BASE + extra), path="scaling.yaml")
    validate_sections(e)
    return e


def test_quantities_are_recognised_declared_and_turned_off():
    q = numeric_factors(_exp())
    assert set(q) == {"pool", "n", "level"} and not q["pool"]["parallel"]
    assert q["n"]["values"] == [1000.0, 10000.0]
    q = numeric_factors(_exp("numeric:\n  pool: parallel\n  level: no\n"))
    assert set(q) == {"pool", "n"} and q["pool"]["parallel"] and q["pool"]["source"] == "declared"
    assert set(numeric_factors(_exp("numeric: [n]\n"))) == {"pool", "n", "level"}


@pytest.mark.parametrize("extra, line, words", [
    ("numeric:\n  pol: yes\n", 8, "'numeric' names 'pol', which is not a factor; did you "
                                  "mean 'pool'?"),
    ("numeric:\n  size: yes\n", 8, "'numeric' names 'size', which is not a factor; factors: "
                                   "pool, n, level"),
    ("numeric:\n  pool: sometimes\n", 8, "'numeric: pool' is 'sometimes'; use yes, no or "
                                         "parallel"),
    ("numeric: 3\n", 7, "'numeric' lists the factors that are quantities"),
])
def test_a_bad_numeric_section_is_one_located_line(extra, line, words):
    with pytest.raises(ExperimentError) as e:
        _exp(extra)
    assert str(e.value).startswith(f"scaling.yaml:{line}:") and words in str(e.value)


def test_declared_numeric_levels_must_be_numbers():
    from benchharness.experiment.sections import validate_sections

    text = BASE.replace("level: [1, 6, 9]", "level: [fast, 6, 9]") + "numeric: {level: yes}\n"
    with pytest.raises(ExperimentError, match="s.yaml:7:11: .*declared numeric but its levels"):
        validate_sections(Experiment.from_text(text, "s.yaml"))
    text = BASE + "numeric: {n: parallel}\n"
    assert numeric_factors(Experiment.from_text(text, "s.yaml"))["n"]["parallel"]


def test_plan_says_which_factors_get_a_trend(main_cli, tmp_path):
    p = tmp_path / "s.yaml"
    p.write_text(BASE + "numeric:\n  pool: parallel\n  level: no\n")
    out = main_cli("plan", p)
    assert out.returncode == 0, out.stderr
    line = [x for x in out.stdout.splitlines() if x.startswith("numeric")][0]
    assert "pool (parallel: speed-up, efficiency, serial fraction)" in line
    assert "n (trend over log n)" in line and "analysed as labels only: level" in line
    p.write_text(BASE + "numeric:\n  pol: parallel\n")
    bad = main_cli("plan", p)
    assert bad.returncode == 2 and bad.stdout == ""
    assert bad.stderr.strip().count("\n") == 0 and "did you mean 'pool'" in bad.stderr


def test_analyze_of_a_csv_says_the_planted_exponent(tmp_path, capsys):
    from benchharness.cli import main

    rng = np.random.default_rng(21)
    rows = [{"workers": str(w), "n": str(n),
             "wall_s": 1e-3 * (n / 1e3) ** 1.5 * (0.2 + 0.8 / w) * np.exp(rng.normal(0, .04))}
            for w in (1, 2, 4, 8) for n in (1000, 4000, 16000) for _ in range(3)]
    src = tmp_path / "runs.csv"
    pd.DataFrame(rows).to_csv(src, index=False)
    assert main(["analyze", str(src), "--factors", "workers,n", "--json"]) == 0
    d = json.loads(capsys.readouterr().out)
    n = next(t for t in d["trends"] if t["factor"] == "n")
    assert n["slope"]["lower"] < 1.5 < n["slope"]["upper"]        # planted n^1.5
    w = next(t for t in d["trends"] if t["factor"] == "workers")
    sf = w["scaling"]["serial_fraction"]
    assert sf["lower"] < 0.2 < sf["upper"]                         # planted s = 0.2
    kinds = [f["kind"] for f in d["findings"]]
    assert "trend" in kinds and "scaling" in kinds
    assert main(["analyze", str(src), "--factors", "workers,n"]) == 0
    text = capsys.readouterr().out
    head = text.splitlines()[0]
    assert "wall_s grows as n^1.5" in head or "wall_s grows as n^1.4" in head
    assert "workers=8 is " in head and "as fast as workers=1" in head


@pytest.mark.slow
def test_the_scaling_demo_runs_end_to_end_and_recovers_its_formula(main_cli, tmp_path):
    out = tmp_path / "demo"
    r = main_cli("run", "experiments/thread-scaling.yaml", "--out", out)
    assert r.returncode == 0, r.stderr
    # the file's response: work_s is what run analysed and what analyze reads by default
    assert json.loads((out / "analysis.json").read_text())["response"] == "work_s"
    a = main_cli("analyze", out, "--json")
    assert a.returncode == 0, a.stderr
    d = json.loads(a.stdout)
    assert d["response"] == "work_s"
    rec = next(t for t in d["trends"] if t["factor"] == "records")
    # the workload's formula: work grows as records^1.25, 10% of it serial; a busy machine
    # wakes the threads late, which adds serial time (0.13 at load 14), so the bounds are wide
    assert rec["slope"]["estimate"] == pytest.approx(1.25, abs=0.12)
    th = next(t for t in d["trends"] if t["factor"] == "threads")
    assert 0.07 < th["scaling"]["serial_fraction"]["estimate"] < 0.16
    rep = main_cli("report", out)
    assert rep.returncode == 0, rep.stderr
    assert (out / "figures" / "trend-threads.png").exists()
    assert "## Trend over records" in (out / "report.md").read_text()


def test_versions_are_labels_unless_declared():
    text = BASE.replace("  level: [1, 6, 9]\n", "  level: [1, 6, 9]\n  python: ['3.9', '3.10']\n"
                        "  build: ['010', '011']\n").replace('"{level}"]', '"{level}", "{python}", "{build}"]')
    e = Experiment.from_text(text, "s.yaml")
    assert "python" not in numeric_factors(e) and "build" not in numeric_factors(e)
    e = Experiment.from_text(text + "numeric: {build: yes}\n", "s.yaml")
    assert "build" in numeric_factors(e)


def test_a_quantity_confounded_with_the_blocks_gets_no_trend(tmp_path, capsys):
    """Planted: time = 20 ms × mp^0.75 × 1.2 for build=next, each block (a pair of runs
    back to back, as a gate makes them) at one mp level with its own ±3% offset. mp is
    confounded with the blocks: the ANOVA says it cannot be tested, and the trend must not
    claim an exponent either (least squares split the effect between the slope and the
    block columns and gave mp^0.70 [0.66 to 0.74] on such a gate folder, whose cell means
    give 0.745). Without the block term the planted exponent comes back."""
    from benchharness.cli import main

    rng = np.random.default_rng(8)
    rows = []
    for block in range(16):
        mp = (1, 4)[block % 2]
        offset = np.exp(rng.normal(0, 0.03))
        for build, slow in (("main", 1.0), ("next", 1.2)):
            rows.append({"build": build, "mp": str(mp), "pair": str(block),
                         "t_s": 0.02 * mp ** 0.75 * slow * offset
                         * np.exp(rng.normal(0, 0.02))})
    src = tmp_path / "pairs.csv"
    pd.DataFrame(rows).to_csv(src, index=False)
    assert main(["analyze", str(src), "--factors", "build,mp", "--block", "pair",
                 "--response", "t_s", "--json"]) == 0
    d = json.loads(capsys.readouterr().out)
    (mp,) = [t for t in d["trends"] if t["factor"] == "mp"]
    assert "slope" not in mp and "cannot be told apart" in mp["skipped"]
    said = " ".join(f["statement"] for f in d["findings"])
    assert "grows as mp^" not in said and "mp could not be tested" in said
    assert main(["analyze", str(src), "--factors", "build,mp", "--no-block",
                 "--response", "t_s", "--json"]) == 0
    d = json.loads(capsys.readouterr().out)
    (mp,) = [t for t in d["trends"] if t["factor"] == "mp"]
    # the pairs share their offset, so these runs are not independent: the estimate, not
    # its interval, is what this fit can vouch for
    assert mp["slope"]["estimate"] == pytest.approx(0.75, abs=0.04)
