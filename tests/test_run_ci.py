"""`run` as CI sees it: exit codes for failed runs, stopping early when the command
cannot work, and relative paths that resolve the same from any working directory.

Planted truths: commands whose outcome is known by construction (a script that is
missing, a cell that exits 3, a run that sleeps past its timeout).
"""

from __future__ import annotations

import csv
import json
import os
import sys
import textwrap
from pathlib import Path

import pytest

from benchharness.results import journal as J

ROOT = Path(__file__).resolve().parent.parent
PY = sys.executable


def write(tmp_path, body, name="exp.yaml"):
    p = tmp_path / name
    p.write_text(textwrap.dedent(body).replace("PY", PY).replace("TMP", str(tmp_path)))
    return p


def rows(folder):
    with open(folder / "runs.csv", newline="") as fh:
        return list(csv.DictReader(fh))


def test_failed_and_timed_out_runs_give_exit_4_unless_accepted(tmp_path, cli):
    p = write(tmp_path, """\
        experiment: mixed
        command: [sh, -c, 'case "$0" in slow) sleep 20;; bad) exit 3;; esac', "{a}"]
        factors:
          a: [good, bad, slow]
        replicates: 2
        timeout: 500ms
        seed: 4
        """)
    r = cli("run", p, "--out", tmp_path / "r1", "--quiet", "--no-analysis")
    assert r.returncode == 4, r.stderr
    assert "2 ok, 2 failed, 2 timed out" in r.stdout
    assert "4 timed runs failed or timed out" in r.stderr and "--allow-failures" in r.stderr
    assert "stopped early" not in r.stderr        # one cell works: the plan ran to its end
    assert len(rows(tmp_path / "r1")) == 6
    r = cli("run", p, "--out", tmp_path / "r2", "--quiet", "--no-analysis", "--allow-failures")
    assert r.returncode == 0, r.stderr
    assert "2 ok, 2 failed, 2 timed out" in r.stdout


def test_all_ok_exits_0(tmp_path, main_cli):
    p = write(tmp_path, """\
        experiment: fine
        command: [PY, -c, "pass", "{a}"]
        factors:
          a: [x, y]
        replicates: 2
        seed: 4
        """)
    r = main_cli("run", p, "--out", tmp_path / "r", "--quiet", "--no-analysis")
    assert r.returncode == 0, r.stderr
    assert "timed runs failed" not in r.stderr
    assert [x["status"] for x in rows(tmp_path / "r")] == ["ok"] * 4


@pytest.mark.parametrize("warmup", [1, 0])
def test_a_command_that_cannot_start_stops_early_and_resumes(tmp_path, main_cli, warmup):
    # 3 x 2 cells, 5 replicates: 30 timed runs (+6 warm-ups); the script does not exist
    script = tmp_path / "work" / "bench.py"
    p = write(tmp_path, f"""\
        experiment: missing-script
        command: [PY, work/bench.py, "{{codec}}", "{{size}}"]
        factors:
          codec: [a, b, c]
          size: [s, l]
        replicates: 5
        warmup: {warmup}
        order: randomized
        seed: 12
        """)
    folder = tmp_path / "res"
    (tmp_path / "elsewhere").mkdir()
    r = main_cli("run", p, "--out", folder, "--quiet", cwd=tmp_path)
    assert r.returncode == 5, (r.stdout, r.stderr)
    assert "stopped early: the first runs of all 6 cells failed the same way" in r.stderr
    assert "bench.py" in r.stderr and "No such file" in r.stderr
    assert f"benchharness run --resume {folder}" in r.stderr
    assert "hint: `work/bench.py` does not exist from" in r.stderr
    assert "Traceback" not in r.stderr
    recs = J.read_journal(folder / "runs.jsonl")
    planned = 30 + 6 * warmup
    # every cell was tried, then nothing more: with a warm-up per cell, 6 runs
    assert len({tuple(sorted(x["levels"].items())) for x in recs}) == 6
    assert (len(recs) == 6) if warmup else (6 <= len(recs) < planned)
    assert all(x["exit_code"] == 2 for x in recs)
    csv_rows = rows(folder)
    assert [int(x["run"]) for x in csv_rows] == [x["run"] for x in recs]   # consistent
    session = json.loads((folder / "session.json").read_text())
    assert session["state"] == "stopped early"
    assert "failed the same way" in session["stopped_early"][0]["reason"]
    assert not (folder / "analysis.json").exists()

    # the cause is fixed: resume runs the rest, keeping what was recorded
    script.parent.mkdir(parents=True, exist_ok=True)
    script.write_text("import sys\nsum(range(1000))\n")
    r = main_cli("run", "--resume", folder, "--quiet", "--no-analysis",
            "--allow-failures", cwd=tmp_path / "elsewhere")
    assert r.returncode == 0, r.stderr
    after = J.read_journal(folder / "runs.jsonl")
    assert after[:len(recs)] == recs                          # nothing measured is lost
    assert sorted(x["run"] for x in after) == list(range(planned))   # each run once
    assert sum(x["status"] == "ok" for x in after) >= 30 - (0 if warmup else len(recs))
    assert json.loads((folder / "session.json").read_text())["state"] == "complete"


def test_keep_going_runs_the_whole_plan(tmp_path, main_cli):
    p = write(tmp_path, """\
        experiment: missing-script
        command: [PY, nowhere/bench.py, "{a}"]
        factors:
          a: [x, y]
        replicates: 3
        warmup: 1
        seed: 3
        """)
    r = main_cli("run", p, "--out", tmp_path / "res", "--quiet", "--no-analysis", "--keep-going")
    assert r.returncode == 4, r.stderr
    assert "stopped early" not in r.stderr
    assert len(rows(tmp_path / "res")) == 8
    assert "0 ok, 6 failed" in r.stdout


def test_different_failures_or_one_broken_level_do_not_stop_early(tmp_path, main_cli):
    # every cell fails, but not the same way (exit 3 and exit 4): not one cause
    p = write(tmp_path, """\
        experiment: two-ways
        command: [sh, -c, "exit {code}"]
        factors:
          code: [3, 4]
        replicates: 3
        seed: 1
        """)
    r = main_cli("run", p, "--out", tmp_path / "r1", "--quiet", "--no-analysis")
    assert r.returncode == 4 and "stopped early" not in r.stderr
    assert len(rows(tmp_path / "r1")) == 6
    # one level cannot start, run in listed order so its cells come first: the
    # other cells still run
    p = write(tmp_path, """\
        experiment: one-broken
        command: [PY, "{tool.script}", "{n}"]
        factors:
          tool:
            broken: {script: missing.py}
            fine: {script: -c}
          n: [1, 2]
        replicates: 2
        order: listed
        seed: 1
        """, name="exp2.yaml")
    r = main_cli("run", p, "--out", tmp_path / "r2", "--quiet", "--no-analysis")
    assert r.returncode == 4, r.stderr
    assert "stopped early" not in r.stderr
    st = [(x["tool"], x["status"]) for x in rows(tmp_path / "r2")]
    assert sorted(set(st)) == [("broken", "failed"), ("fine", "ok")] and len(st) == 8


def test_failing_build_in_every_cell_stops_early(tmp_path, main_cli):
    p = write(tmp_path, """\
        experiment: no-compiler
        build: [sh, -c, "echo no C compiler found >&2; exit 1", "{opt}"]
        command: [PY, -c, "pass", "{opt}"]
        factors:
          opt: [0, 2]
          n: [1, 2]
        replicates: 4
        warmup: 1
        seed: 5
        """)
    r = main_cli("run", p, "--out", tmp_path / "res", "--quiet", "--no-analysis")
    assert r.returncode == 5, r.stderr
    assert "build failed" in r.stderr and "no C compiler found" in r.stderr
    assert len(J.read_journal(tmp_path / "res" / "runs.jsonl")) == 4


# ----------------------------------------------- relative paths and the demos

DEMOS = sorted((ROOT / "experiments").glob("*.yaml"))


@pytest.mark.parametrize("path", DEMOS, ids=[p.stem for p in DEMOS])
def test_every_demo_names_files_that_exist_from_its_run_directory(path, tmp_path,
                                                                 monkeypatch):
    # started from an unrelated directory, every relative path in each demo's
    # command and build must resolve (build outputs: produced by the build)
    from benchharness.execute.early_stop import _relative_paths
    from benchharness.experiment.file import load_experiment

    monkeypatch.chdir(tmp_path)
    exp = load_experiment(path)
    assert exp.workdir is not None, f"{path.name} depends on the directory it is started from"
    levels = {f.name: f.labels[0] for f in exp.factors}
    run_dir = (path.parent / exp.render_workdir(levels)).resolve()
    outputs = set()
    if exp.build is not None:
        argv, _ = exp.render_command(exp.build, levels)
        outputs = {a for a in argv if ".build" in a}
        assert all((run_dir / a).exists() for a in _relative_paths(argv) if a not in outputs)
    argv, _ = exp.render_command(exp.command, levels)
    rel = [a for a in _relative_paths(argv) if a not in outputs]
    assert rel or outputs, "the check would check nothing"
    for a in rel:
        assert (run_dir / a).exists(), f"{path.name}: {a} missing from {run_dir}"


def test_archive_demo_runs_from_another_directory(tmp_path, monkeypatch):
    # the shipped file, one replicate, no warm-up, started from an unrelated directory
    from benchharness.design import build_plan
    from benchharness.experiment.file import load_experiment
    from benchharness.execute.runner import run_experiment

    monkeypatch.chdir(tmp_path)
    exp = load_experiment(ROOT / "experiments" / "archive-codecs.yaml")
    plan = build_plan(exp, seed=7, replicates=1, warmup=0)
    out = run_experiment(exp, out=tmp_path / "res", plan=plan, early_stop=True)
    assert out.stopped_early is None
    assert out.counts == {"ok": 18}


@pytest.mark.slow
@pytest.mark.parametrize("path", DEMOS, ids=[p.stem for p in DEMOS])
def test_every_demo_runs_from_another_directory(path, tmp_path, cli):
    if path.stem == "c-opt-levels" and not any(
            os.access(os.path.join(d, cc), os.X_OK) for d in os.get_exec_path()
            for cc in ("cc", "gcc", "clang")):
        pytest.skip("no C compiler here: the demo then stops early by design")
    r = cli("run", path, "--out", tmp_path / "res", "--quiet", "--no-analysis",
            cwd=tmp_path)
    assert r.returncode == 0, r.stderr
    assert {x["status"] for x in rows(tmp_path / "res")} <= {"ok", "warmup"}


@pytest.mark.parametrize("levels,which", [("[a]", "the one cell"), ("[a, b]", "both cells")])
def test_stopping_early_counts_the_cells_in_words(main_cli, tmp_path, levels, which):
    """docs/cli.md: a count goes with its noun in the right number ("all 2 cells" and
    "all 1 cells" were said before)."""
    p = tmp_path / "dead.yaml"
    p.write_text(f"experiment: dead\ncommand: [/nonexistent/tool, '{{k}}']\n"
                 f"factors:\n  k: {levels}\nreplicates: 3\nseed: 1\n")
    r = main_cli("run", p, "--out", tmp_path / "res", "--quiet", "--no-analysis",
                 cwd=tmp_path)
    assert r.returncode == 5, (r.stdout, r.stderr)
    assert f"stopped early: the first runs of {which} failed the same way" in r.stderr
