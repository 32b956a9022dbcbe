"""End-to-end runs through the real launcher: steps, failures, injection, crash and resume."""

from __future__ import annotations

import csv
import json
import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pytest

from benchharness.results import journal as J
from benchharness.execute.runner import resume_experiment, run_experiment
ROOT = Path(__file__).resolve().parent.parent

PY = sys.executable


def exp_text(tmp_path, body):
    text = textwrap.dedent(body).replace("PY", PY).replace("TMP", str(tmp_path))
    p = tmp_path / "exp.yaml"
    p.write_text(text)
    return p


def load(p):
    from benchharness.experiment.file import load_experiment

    return load_experiment(p)


def test_results_folder_contract(tmp_path):
    p = exp_text(tmp_path, """\
        experiment: contract
        command: [PY, -c, "import sys; print(sys.argv[1:])", "{a}", "{b}"]
        factors:
          a: [x, "y z"]
          b: [1, 1.0]
        replicates: 2
        warmup: 1
        seed: 5
        """)
    out = run_experiment(load(p), out=tmp_path / "res")
    folder = out.folder
    for name in ("experiment.yaml", "plan.csv", "runs.jsonl", "runs.csv", "host.json",
                 "session.json"):
        assert (folder / name).exists(), name
    assert (folder / "experiment.yaml").read_text() == p.read_text()
    with open(folder / "runs.csv") as fh:
        rows = list(csv.DictReader(fh))
    header = list(rows[0])
    assert header[:4] == ["run", "position", "block", "replicate"]
    assert header[4:6] == ["a", "b"]
    assert header[6:] [:len(J.CORE_COLUMNS)] == list(J.CORE_COLUMNS)
    assert len(rows) == 12
    assert sum(r["status"] == "warmup" for r in rows) == 4
    assert sum(r["status"] == "ok" for r in rows) == 8
    assert {r["b"] for r in rows} == {"1", "1.0"}
    for r in rows:
        # ISO 8601 UTC with microseconds
        assert r["started_at"].endswith("+00:00") and "." in r["started_at"]
        assert float(r["wall_s"]) > 0
    lines = (folder / "runs.jsonl").read_text().splitlines()
    rec = json.loads(lines[0])
    assert set(rec["levels"]) == {"a", "b"}
    host = json.loads((folder / "host.json").read_text())
    for key in ("cpu_model", "logical_cores", "memory_bytes", "os", "kernel", "python",
                "load_average_start", "load_average_end"):
        assert key in host
    assert out.runs.shape[0] == 12
    assert list(out.runs.columns) == header


def test_reset_before_every_timed_run_and_build_once_per_form(tmp_path):
    log = tmp_path / "log.txt"
    p = exp_text(tmp_path, f"""\
        experiment: steps
        build: [PY, -c, "open('{log}','a').write('build {{a}}\\\\n')"]
        reset: [PY, -c, "open('{log}','a').write('reset\\\\n')"]
        teardown: [PY, -c, "open('{log}','a').write('teardown\\\\n')"]
        command: [PY, -c, "open('{log}','a').write('run {{a}} {{b}}\\\\n')"]
        factors:
          a: [x, y]
          b: [1, 2]
        replicates: 3
        warmup: 1
        seed: 1
        """)
    run_experiment(load(p), out=tmp_path / "res")
    events = log.read_text().split("\n")[:-1]
    assert sorted(e for e in events if e.startswith("build")) == ["build x", "build y"]
    runs = [i for i, e in enumerate(events) if e.startswith("run")]
    assert len(runs) == 16
    # every timed run (the last 12 runs) is preceded by a reset
    for i in runs[4:]:
        assert events[i - 1] == "reset"
    assert events.count("reset") == 12
    assert events.count("teardown") == 16
    # the first build happens before the first run needing it
    assert events[0].startswith("build")


def test_failing_cell_recorded_others_complete(tmp_path):
    p = exp_text(tmp_path, """\
        experiment: failing
        command: [PY, -c, "import sys; a=sys.argv[1]; sys.stderr.write('bad input ' + a); sys.exit(3 if a == 'bad' else 0)", "{a}"]
        factors:
          a: [good, bad]
        replicates: 3
        seed: 2
        """)
    out = run_experiment(load(p), out=tmp_path / "res")
    df = out.runs
    bad = df[df["a"] == "bad"]
    good = df[df["a"] == "good"]
    assert (bad["status"] == "failed").all() and (bad["exit_code"] == 3).all()
    assert bad["message"].str.contains("bad input bad").all()
    assert (good["status"] == "ok").all() and len(good) == 3


def test_failing_build_fails_only_its_cells(tmp_path):
    p = exp_text(tmp_path, """\
        experiment: buildfail
        build: [PY, -c, "import sys; sys.exit(1 if sys.argv[1] == 'broken' else 0)", "{v}"]
        command: [PY, -c, "pass", "{v}"]
        factors:
          v: [fine, broken]
        replicates: 2
        seed: 3
        """)
    df = run_experiment(load(p), out=tmp_path / "res").runs
    assert (df[df["v"] == "broken"]["status"] == "failed").all()
    assert df[df["v"] == "broken"]["message"].str.startswith("build failed").all()
    assert (df[df["v"] == "fine"]["status"] == "ok").all()


@pytest.mark.parametrize("value", ["$(touch X)", "; touch X", "`touch X`", "a && touch X"])
def test_level_values_are_literal(tmp_path, value):
    marker = tmp_path / "X"
    p = exp_text(tmp_path, """\
        experiment: inject
        command: echo {v}
        workdir: TMP
        factors:
          v: ["VALUE"]
        """.replace("VALUE", value.replace('"', '\\"')))
    out = run_experiment(load(p), out=tmp_path / "res")
    assert not marker.exists()
    assert (out.runs["status"] == "ok").all()


def test_shell_mode_quotes_values(tmp_path):
    marker = tmp_path / "X"
    p = exp_text(tmp_path, """\
        experiment: inject-shell
        shell: true
        command: echo {v} > out.txt
        workdir: TMP
        factors:
          v: ["; touch X", "$(touch X)"]
        """)
    out = run_experiment(load(p), out=tmp_path / "res")
    assert not marker.exists()
    assert (out.runs["status"] == "ok").all()
    assert (tmp_path / "out.txt").read_text().strip() in ("; touch X", "$(touch X)")


def test_existing_folder_never_written(tmp_path):
    p = exp_text(tmp_path, """\
        experiment: once
        command: [PY, -c, "pass"]
        factors: {a: [x]}
        """)
    folder = tmp_path / "res"
    folder.mkdir()
    (folder / "keep.txt").write_text("precious")
    from benchharness.errors import ResultsFolderError

    with pytest.raises(ResultsFolderError):
        run_experiment(load(p), out=folder)
    assert (folder / "keep.txt").read_text() == "precious"
    assert sorted(x.name for x in folder.iterdir()) == ["keep.txt"]


def test_locked_folder_refused(tmp_path):
    p = exp_text(tmp_path, """\
        experiment: lock
        command: [PY, -c, "pass"]
        factors: {a: [x]}
        """)
    out = run_experiment(load(p), out=tmp_path / "res")
    from benchharness.errors import ResultsFolderError

    lock = J.FolderLock(out.folder)
    try:
        with pytest.raises(ResultsFolderError, match="another benchharness"):
            resume_experiment(out.folder)
    finally:
        lock.release()


def test_torn_last_line_tolerated(tmp_path):
    p = exp_text(tmp_path, """\
        experiment: torn
        command: [PY, -c, "pass"]
        factors: {a: [x, y]}
        replicates: 3
        seed: 4
        """)
    out = run_experiment(load(p), out=tmp_path / "res")
    jl = out.folder / "runs.jsonl"
    lines = jl.read_bytes().splitlines(keepends=True)
    jl.write_bytes(b"".join(lines[:-2]) + lines[-2][:25])  # last run lost, one torn
    assert len(J.read_journal(jl)) == 4
    res = resume_experiment(out.folder)
    recs = J.read_journal(jl)
    assert sorted(r["run"] for r in recs) == list(range(6))
    assert (out.folder / "runs.jsonl.torn").exists()
    assert res.counts.get("ok") == 6


def test_sigkill_mid_experiment_then_resume(tmp_path):
    p = exp_text(tmp_path, """\
        experiment: crash
        command: [PY, -c, "import time; time.sleep(0.15)", "{a}"]
        factors:
          a: [x, y, z]
        replicates: 6
        seed: 9
        """)
    folder = tmp_path / "res"
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    proc = subprocess.Popen([PY, "-m", "benchharness", "run", str(p), "--out", str(folder),
                             "--quiet", "--no-analysis"], env=env, cwd=ROOT,
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                            start_new_session=True)
    deadline = time.time() + 30
    while time.time() < deadline:
        jl = folder / "runs.jsonl"
        if jl.exists() and len(jl.read_bytes().splitlines()) >= 5:
            break
        time.sleep(0.05)
    os.killpg(proc.pid, signal.SIGKILL)
    proc.wait()
    before = J.read_journal(folder / "runs.jsonl")
    assert 5 <= len(before) < 18
    from conftest import run_main   # the resume in this process; the killed run was not

    r = run_main("run", "--resume", folder, "--quiet", "--no-analysis")
    assert r.returncode == 0, r.stderr
    recs = J.read_journal(folder / "runs.jsonl")
    ids = [rec["run"] for rec in recs]
    assert sorted(ids) == list(range(18))  # each id exactly once
    assert sum(rec["status"] == "ok" for rec in recs) == 18
    # what was measured before the crash is untouched
    assert recs[:len(before)] == before


def test_ctrl_c_stops_cleanly_and_says_how_to_resume(tmp_path):
    p = exp_text(tmp_path, """\
        experiment: interrupt
        command: [PY, -c, "import time; time.sleep(0.3)"]
        factors:
          a: [x, y]
        replicates: 20
        seed: 9
        """)
    folder = tmp_path / "res"
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    proc = subprocess.Popen([PY, "-m", "benchharness", "run", str(p), "--out", str(folder),
                             "--no-analysis"], env=env, cwd=ROOT, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, start_new_session=True,
                            # Ctrl-C reaches it even when the suite was started with
                            # SIGINT ignored (`cmd &` in a script): the child inherits that
                            preexec_fn=lambda: signal.signal(signal.SIGINT, signal.SIG_DFL))
    deadline = time.time() + 30
    while time.time() < deadline:
        jl = folder / "runs.jsonl"
        if jl.exists() and len(jl.read_bytes().splitlines()) >= 3:
            break
        time.sleep(0.05)
    os.killpg(proc.pid, signal.SIGINT)
    stdout, stderr = proc.communicate(timeout=30)
    assert proc.returncode == 130, stderr
    assert f"benchharness run --resume {folder}" in stdout
    assert "Traceback" not in stderr
    recs = J.read_journal(folder / "runs.jsonl")
    assert 3 <= len(recs) < 40
    assert (folder / "runs.csv").exists()
    assert json.loads((folder / "session.json").read_text())["state"] == "interrupted"


def test_run_with_analysis_when_a_cell_always_fails(tmp_path, main_cli):
    # One cell fails every run, the other has two ok runs: one residual degree of
    # freedom. The run analyses without a traceback (it used to crash in the outlier
    # check) and exits 4, since timed runs failed (0 with --allow-failures).
    p = exp_text(tmp_path, """\
        experiment: halfbad
        command: [sh, -c, "exit {code}"]
        factors:
          code: [0, 3]
        replicates: 2
        seed: 1
        """)
    r = main_cli("run", p, "--out", tmp_path / "res")
    assert r.returncode == 4, r.stderr
    assert "Traceback" not in r.stderr
    assert (tmp_path / "res" / "analysis.json").exists()
    rows = list(csv.DictReader(open(tmp_path / "res" / "runs.csv")))
    assert sorted(row["status"] for row in rows) == ["failed", "failed", "ok", "ok"]


def test_build_rendered_form_includes_its_environment(tmp_path):
    # `env: {CFLAGS: "-O{opt}"}` with a plain `build: make` must build once per level
    # of opt (the cluster and gate paths do; see tests/test_cluster.py).
    log = tmp_path / "build.log"
    p = exp_text(tmp_path, f"""\
        experiment: envbuild
        env: {{FLAGS: "-O{{opt}}"}}
        build: [sh, -c, 'echo "$FLAGS" >> {log}']
        command: [PY, -c, "pass", "{{opt}}"]
        factors:
          opt: [0, 2]
        replicates: 2
        seed: 1
        """)
    run_experiment(load(p), out=tmp_path / "res")
    assert sorted(log.read_text().split()) == ["-O0", "-O2"]
