"""The Python API: load_experiment, plan, run; and the command line's end-of-run output."""

from __future__ import annotations

import sys
import textwrap

import pandas as pd

import benchharness


def test_api_load_plan_run(tmp_path):
    p = tmp_path / "e.yaml"
    p.write_text(textwrap.dedent(f"""\
        experiment: api
        command: [{sys.executable}, -c, "pass", "{{n}}"]
        factors:
          n: [1, 1.0, "010"]
        replicates: 2
        seed: 8
        """))
    exp = benchharness.load_experiment(p)
    plan = benchharness.plan(exp)
    assert plan.cells == 3 and plan.timed_runs == 6
    out = benchharness.run(exp, out=tmp_path / "res")
    assert out.folder == tmp_path / "res"
    csv = pd.read_csv(out.folder / "runs.csv", dtype={"n": str}, keep_default_na=False)
    runs = out.runs
    assert list(runs.columns) == list(csv.columns)
    assert len(runs) == len(csv) == 6
    assert runs["n"].astype(str).tolist() == csv["n"].tolist()
    assert set(runs["n"].astype(str)) == {"1", "1.0", "010"}
    pd.testing.assert_series_equal(runs["wall_s"].astype(float), csv["wall_s"].astype(float),
                                   check_names=False)


def test_cli_run_prints_progress_lines_summary_and_location(tmp_path, cli):
    p = tmp_path / "e.yaml"
    p.write_text(textwrap.dedent(f"""\
        experiment: cli-run
        command: [{sys.executable}, -c, "pass", "{{n}}"]
        factors:
          n: [a, b]
        replicates: 2
        """))
    r = cli("run", p, "--out", tmp_path / "res")
    assert r.returncode == 0, r.stderr
    out = r.stdout
    assert "running 4 runs into" in r.stderr  # progress: standard error (docs/cli.md)
    assert "[4/4]" in r.stderr       # plain progress line (stderr is not a terminal)
    assert "median wall" in out and "IQR" in out
    assert "seed" in out and "drawn" in out   # no seed in the file: drawn and reported
    assert f"results: {tmp_path / 'res'}" in out


def test_summary_with_a_factor_named_like_a_summary_column(tmp_path, main_cli):
    p = tmp_path / "e.yaml"
    p.write_text(textwrap.dedent(f"""\
        experiment: named-n
        command: [{sys.executable}, -c, "pass", "{{n}}", "{{median}}"]
        factors:
          n: [1, 3]
          median: [lo, hi]
        replicates: 2
        seed: 1
        """))
    r = main_cli("run", p, "--out", tmp_path / "res", "--no-analysis")
    assert r.returncode == 0, r.stderr
    lines = [ln.split() for ln in r.stdout.splitlines() if ln.split()[:1] in (["1"], ["3"])]
    assert sorted((ln[0], ln[1], ln[2]) for ln in lines) == [
        ("1", "hi", "2"), ("1", "lo", "2"), ("3", "hi", "2"), ("3", "lo", "2")]


def test_run_adds_to_history_database(tmp_path, main_cli):
    import sqlite3
    import subprocess

    subprocess.run(["git", "init", "-q"], cwd=tmp_path, check=True)
    p = tmp_path / "e.yaml"
    p.write_text(textwrap.dedent(f"""\
        experiment: hist
        command: [{sys.executable}, -c, "pass", "{{n}}"]
        factors:
          n: [a, b]
        replicates: 2
        seed: 2
        """))
    subprocess.run(["git", "add", "."], cwd=tmp_path, check=True)
    subprocess.run(["git", "-c", "user.name=t", "-c", "user.email=t@t", "commit", "-qm", "x"],
                   cwd=tmp_path, check=True)
    db = tmp_path / "h.sqlite"
    r = main_cli("run", p, "--out", tmp_path / "res", "--no-analysis", "--history-db", db,
            cwd=tmp_path)
    assert r.returncode == 0, r.stderr
    assert "history: 2 cell rows added" in r.stdout
    with sqlite3.connect(db) as con:
        assert con.execute("select count(*) from cells").fetchone()[0] == 2


def test_gate_records_the_candidate_in_history(tmp_path, main_cli):
    import sqlite3
    import subprocess

    subprocess.run(["git", "init", "-q"], cwd=tmp_path, check=True)
    (tmp_path / "f").write_text("x")
    subprocess.run(["git", "add", "."], cwd=tmp_path, check=True)
    subprocess.run(["git", "-c", "user.name=t", "-c", "user.email=t@t", "commit", "-qm", "x"],
                   cwd=tmp_path, check=True)
    db = tmp_path / "h.sqlite"
    r = main_cli("gate", "--baseline", "true", "--candidate", "true", "--max-pairs", "8",
            "--out", tmp_path / "g", "--history-db", db, cwd=tmp_path)
    # the verdict on two equal 1 ms commands is not the point (a load spike on a shared
    # CI host may sway it); the record is
    assert r.returncode in (0, 1, 3) and "Traceback" not in r.stderr, r.stderr
    assert "history: 1 cell row of the candidate added" in r.stdout   # one workload, one row
    with sqlite3.connect(db) as con:
        assert con.execute("select count(*) from cells").fetchone()[0] == 1


def test_an_internal_error_is_never_exit_1(monkeypatch, capsys):
    # exit 1 means "regression" to a CI job; a bug must exit with its own code
    from benchharness import cli

    def boom(args):
        raise RuntimeError("planted bug")

    parser = cli.build_parser()
    monkeypatch.setattr(cli, "build_parser", lambda: parser)
    parser._subparsers._group_actions[0].choices["plan"].set_defaults(func=boom)
    assert cli.main(["plan", "x.yaml"]) == 70
    assert "internal error" in capsys.readouterr().err


def test_run_says_host_warnings_as_warning_lines_on_stderr(tmp_path, monkeypatch, capsys):
    """docs/cli.md: warnings, the host's included, are `warning: ...` lines on standard
    error, so a script filtering `^warning:` sees them. Planted: the host check finds one
    warning (an invented one); stdout must not carry it."""
    from benchharness.cli import main
    from benchharness.measure import host

    planted = {"severity": "warning", "message": "planted: the kettle is boiling",
               "fix": "wait for it"}
    monkeypatch.setattr(host, "preflight", lambda *a, **k: [planted])
    p = tmp_path / "e.yaml"
    p.write_text(textwrap.dedent(f"""\
        experiment: kettle-note
        command: [{sys.executable}, -c, "pass"]
        factors:
          n: [a, b]
        replicates: 1
        seed: 3
        """))
    assert main(["run", str(p), "--out", str(tmp_path / "res"), "--no-analysis"]) == 0
    out, err = capsys.readouterr()
    assert "warning: planted: the kettle is boiling; fix: wait for it" in err.splitlines()
    assert "kettle is boiling" not in out
