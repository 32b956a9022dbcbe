"""Cluster runs on a real local Dask scheduler with two worker processes.

Each worker stands for a host (`same_host_ok`), as the issue allows for tests.
"""

from __future__ import annotations

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

pytestmark = [pytest.mark.dask, pytest.mark.timeout(120)]
distributed = pytest.importorskip("distributed")

ROOT = Path(__file__).resolve().parent.parent
PY = sys.executable


def _env():
    return dict(os.environ, PYTHONPATH=str(ROOT), DASK_DISTRIBUTED__WORKER__DAEMON="False")


def _start_scheduler(sched_file, env, log, cwd=None):
    """A `dask scheduler` process on a free port; returns (process, address)."""
    sched = subprocess.Popen([PY, "-m", "distributed.cli.dask_scheduler", "--host", "127.0.0.1",
                              "--port", "0", "--no-dashboard", "--scheduler-file",
                              str(sched_file)], env=env, stdout=log, stderr=log,
                             start_new_session=True, cwd=cwd)
    deadline = time.time() + 30
    while time.time() < deadline:
        try:  # the scheduler may still be writing the file
            return sched, json.loads(sched_file.read_text())["address"]
        except (OSError, ValueError, KeyError):
            time.sleep(0.1)
    os.killpg(sched.pid, signal.SIGKILL)
    raise AssertionError("the scheduler did not start")


def _cluster(where):
    """A scheduler and two single-thread workers with the bench resource, as processes."""
    sched_file = where / "scheduler.json"
    procs = []
    log = open(where / "cluster.log", "w")
    sched, address = _start_scheduler(sched_file, _env(), log)
    procs.append(sched)
    workers = {}
    for name in ("hostA", "hostB"):
        w = subprocess.Popen([PY, "-m", "distributed.cli.dask_worker", address, "--nthreads", "1",
                              "--nworkers", "1", "--resources", "bench=1", "--name", name,
                              "--no-dashboard", "--host", "127.0.0.1"], env=_env(), stdout=log,
                             stderr=log, start_new_session=True, cwd=ROOT)
        procs.append(w)
        workers[name] = w
    from distributed import Client

    with Client(address, timeout=20) as c:
        c.wait_for_workers(2, timeout=30)
    yield address, workers
    for p in procs:
        try:
            os.killpg(p.pid, signal.SIGKILL)
        except ProcessLookupError:
            pass
        p.wait()
    log.close()


@pytest.fixture(scope="module")
def cluster(tmp_path_factory):
    """One cluster for the tests that leave it whole (each uses its own results folder and
    experiment, so a build one test made is not one another needs)."""
    yield from _cluster(tmp_path_factory.mktemp("cluster"))


@pytest.fixture
def own_cluster(tmp_path):
    """A cluster of the test's own, for a test that kills one of its workers."""
    yield from _cluster(tmp_path)


def _exp(tmp_path, reps=4, sleep=0.05):
    p = tmp_path / "exp.yaml"
    p.write_text(textwrap.dedent(f"""\
        experiment: cluster
        command: [{PY}, -c, "import time; time.sleep({sleep})", "{{a}}", "{{b}}"]
        factors:
          a: [x, y]
          b: [1, 2]
        replicates: {reps}
        seed: 3
        """))
    return p


def _run(args, timeout=90):
    return subprocess.run([PY, "-m", "benchharness", *map(str, args)], env=_env(), cwd=ROOT,
                          capture_output=True, text=True, timeout=timeout)


def _run_here(args):
    """`benchharness ARGS` in this process (conftest's `run_main`): the coordinator's Dask
    client is closed when the command ends; a new process would import Dask again."""
    from conftest import run_main

    return run_main(*args, env={"DASK_DISTRIBUTED__WORKER__DAEMON": "False"})


def test_every_run_recorded_once_with_hosts(cluster, tmp_path):
    address, _ = cluster
    out = tmp_path / "res"
    r = _run_here(["run", _exp(tmp_path), "--out", out, "--scheduler", address, "--same-host-ok",
              "--quiet", "--no-analysis"])
    assert r.returncode == 0, r.stderr
    recs = J.read_journal(out / "runs.jsonl")
    assert sorted(x["run"] for x in recs) == list(range(16))
    assert {x["host"] for x in recs} == {"hostA", "hostB"}
    assert all(x["worker"] for x in recs) and all(x["status"] == "ok" for x in recs)
    # blocks are nested in hosts: each block ran on one host
    by_block = {}
    for x in recs:
        by_block.setdefault(x["block"], set()).add(x["host"])
    assert all(len(h) == 1 for h in by_block.values())
    # host_position is the order on that host
    for h in ("hostA", "hostB"):
        pos = sorted(x["host_position"] for x in recs if x["host"] == h)
        assert pos == list(range(len(pos)))
    header = (out / "runs.csv").read_text().splitlines()[0].split(",")
    assert {"host", "worker", "host_position"} <= set(header)
    host = json.loads((out / "host.json").read_text())
    assert set(host) == {"coordinator", "hosts"} and set(host["hosts"]) == {"hostA", "hostB"}


def test_a_block_goes_whole_and_each_result_is_journalled_as_its_run_ends(cluster, tmp_path):
    # One block of four 0.3 s runs, sent to a worker as one task: its results must reach
    # the journal one by one while the block still runs (streamed), not all at its end.
    address, _ = cluster
    out = tmp_path / "res"
    exp = _exp(tmp_path, reps=1, sleep=0.3)
    coord = subprocess.Popen([PY, "-m", "benchharness", "run", str(exp), "--out", str(out),
                              "--scheduler", address, "--same-host-ok", "--quiet",
                              "--no-analysis"], env=_env(), cwd=ROOT, stdout=subprocess.PIPE,
                             stderr=subprocess.PIPE, text=True, start_new_session=True)
    jl = out / "runs.jsonl"
    seen = set()
    deadline = time.time() + 90
    while coord.poll() is None and time.time() < deadline:
        if jl.exists():
            seen.add(len(jl.read_bytes().splitlines()))
        time.sleep(0.02)
    _out, err = coord.communicate(timeout=30)
    assert coord.returncode == 0, err
    recs = J.read_journal(jl)
    assert sorted(x["run"] for x in recs) == [0, 1, 2, 3]
    assert len({x["host"] for x in recs}) == 1          # one block, one host
    assert seen & {1, 2, 3}, f"line counts seen while running: {sorted(seen)}"
    assert [x["host_position"] for x in recs] == sorted(x["host_position"] for x in recs)


def test_lost_worker_and_killed_coordinator(own_cluster, tmp_path):
    address, workers = own_cluster
    out = tmp_path / "res"
    exp = _exp(tmp_path, reps=6, sleep=0.2)
    coord = subprocess.Popen([PY, "-m", "benchharness", "run", str(exp), "--out", str(out),
                              "--scheduler", address, "--same-host-ok", "--quiet",
                              "--no-analysis"], env=_env(), cwd=ROOT, stdout=subprocess.PIPE,
                             stderr=subprocess.PIPE, text=True, start_new_session=True)
    jl = out / "runs.jsonl"

    def n_lines():
        return len(jl.read_bytes().splitlines()) if jl.exists() else 0

    deadline = time.time() + 60
    while n_lines() < 4 and time.time() < deadline:
        time.sleep(0.05)
    os.killpg(workers["hostB"].pid, signal.SIGKILL)   # a host is lost mid-experiment
    while n_lines() < 10 and time.time() < deadline:
        time.sleep(0.05)
    os.killpg(coord.pid, signal.SIGKILL)               # then the coordinator dies
    coord.wait()
    before = J.read_journal(jl)
    assert 10 <= len(before) < 24
    r = _run(["run", "--resume", out, "--scheduler", address, "--same-host-ok", "--quiet",
              "--no-analysis"])
    assert r.returncode == 0, r.stderr
    recs = J.read_journal(jl)
    ids = [x["run"] for x in recs]
    assert sorted(ids) == list(range(24)), "every planned run exactly once"
    assert all(x["status"] == "ok" for x in recs)
    assert recs[:len(before)] == before


def test_host_split_of_the_block_term_matches_statsmodels():
    """Between-host and within-host parts of the block SS against nested OLS fits
    (statsmodels ols + anova_lm on the same log data)."""
    import numpy as np
    import pandas as pd
    import statsmodels.formula.api as smf

    import benchharness

    rng = np.random.default_rng(5)
    rows = []
    for block in range(1, 7):
        host = "h1" if block <= 3 else "h2"
        for a in ("x", "y"):
            for b in ("1", "2"):
                mu = 0.1 * (a == "y") + 0.05 * (b == "2") + (0.08 if host == "h2" else 0) \
                    + rng.normal(0, 0.01)
                for _ in range(2):
                    rows.append({"a": a, "b": b, "block": block, "host": host, "status": "ok",
                                 "wall_s": float(np.exp(mu + rng.normal(0, 0.03)))})
    df = pd.DataFrame(rows)
    an = benchharness.analyze(df, factors=["a", "b"], transform="log")
    assert an.block == "block"
    h = an.to_dict()["diagnostics"]["hosts"]
    d = df.assign(ly=np.log(df.wall_s), blk=df.block.astype(str))
    rss0 = smf.ols("ly ~ C(a) * C(b)", d).fit().ssr
    rssh = smf.ols("ly ~ C(a) * C(b) + C(host)", d).fit().ssr
    rssb = smf.ols("ly ~ C(a) * C(b) + C(blk)", d).fit().ssr
    assert abs(h["between_hosts"]["sum_sq"] - (rss0 - rssh)) < 1e-9
    assert abs(h["blocks_within_hosts"]["sum_sq"] - (rssh - rssb)) < 1e-9
    assert h["between_hosts"]["df"] == 1 and h["blocks_within_hosts"]["df"] == 4
    assert h["differ"] is True   # a planted 8% host difference


def test_block_split_over_hosts_uses_pairs():
    import pandas as pd

    import benchharness

    rows = []
    for block in (1, 2):
        for i, a in enumerate(("x", "y", "x", "y")):
            host = "h1" if block == 1 or i < 2 else "h2"   # block 2 finished on h2
            rows.append({"a": a, "block": block, "host": host, "status": "ok",
                         "wall_s": 1.0 + 0.1 * (a == "y") + 0.01 * i + 0.02 * block})
    an = benchharness.analyze(pd.DataFrame(rows), factors=["a"], transform="log")
    assert an.block == "block@host"
    assert any("(block, host) pairs" in n for n in an.notes)


def test_workers_without_benchharness_give_one_clear_line(tmp_path):
    # A worker started where benchharness is not importable: the run stops with one line
    # naming the problem and the fix, not a Dask traceback.
    # Shadow any installed copy (CI installs the package): this worker's benchharness
    # cannot be imported.
    shadow = tmp_path / "shadow" / "benchharness"
    shadow.mkdir(parents=True)
    (shadow / "__init__.py").write_text("raise ImportError('no benchharness on this host')\n")
    env = dict(_env(), PYTHONPATH=str(tmp_path / "shadow"))
    sched_file = tmp_path / "scheduler.json"
    log = open(tmp_path / "cluster.log", "w")
    sched, address = _start_scheduler(sched_file, env, log, cwd=tmp_path)
    procs = [sched]
    try:
        procs.append(subprocess.Popen([PY, "-m", "distributed.cli.dask_worker", address,
                                       "--nthreads", "1", "--resources", "bench=1",
                                       "--no-dashboard", "--host", "127.0.0.1"], env=env,
                                      stdout=log, stderr=log, start_new_session=True,
                                      cwd=tmp_path))
        from distributed import Client

        with Client(address, timeout=20) as c:
            c.wait_for_workers(1, timeout=30)
        r = _run(["run", _exp(tmp_path, reps=1), "--out", tmp_path / "res", "--scheduler",
                  address, "--same-host-ok", "--quiet", "--no-analysis"])
        assert r.returncode == 2
        assert "Traceback" not in r.stderr and len(r.stderr.strip().splitlines()) == 1
        assert "cannot run benchharness code" in r.stderr and "PYTHONPATH" in r.stderr
    finally:
        for p in procs:
            try:
                os.killpg(p.pid, signal.SIGKILL)
            except ProcessLookupError:
                pass
            p.wait()
        log.close()


def test_two_workers_on_one_host_warn_without_same_host_ok(cluster, tmp_path):
    address, _ = cluster
    r = _run_here(["run", _exp(tmp_path, reps=1, sleep=0.01), "--out", tmp_path / "res",
              "--scheduler", address, "--quiet", "--no-analysis"])
    assert r.returncode == 0, r.stderr
    text = r.stdout + r.stderr
    assert "2 workers run on host" in text and "--same-host-ok" in text
    r = _run_here(["run", _exp(tmp_path, reps=1, sleep=0.01), "--out", tmp_path / "res2",
              "--scheduler", address, "--same-host-ok", "--quiet", "--no-analysis"])
    assert r.returncode == 0, r.stderr
    assert "workers run on host" not in r.stdout + r.stderr


def test_build_once_per_host_and_rendered_form(cluster, tmp_path):
    # The build's argv is the same for every cell; only its templated environment
    # differs. It appends that to a log; each host (worker) must build each form it needs exactly once.
    address, _ = cluster
    log = tmp_path / "build.log"
    p = tmp_path / "exp.yaml"
    p.write_text(textwrap.dedent(f"""\
        experiment: cluster-build
        env: {{FLAGS: "-O{{opt}}"}}
        build: [sh, -c, 'echo "$FLAGS" >> {log}']
        command: [{PY}, -c, "import time; time.sleep(0.02)", "{{opt}}", "{{size}}"]
        factors:
          opt: [0, 2]
          size: [s, m, l]
        replicates: 4
        seed: 5
        """))
    out = tmp_path / "res"
    r = _run_here(["run", p, "--out", out, "--scheduler", address, "--same-host-ok", "--quiet",
              "--no-analysis"])
    assert r.returncode == 0, r.stderr
    recs = J.read_journal(out / "runs.jsonl")
    assert len(recs) == 24 and all(x["status"] == "ok" for x in recs)
    need = {(x["host"], x["levels"]["opt"]) for x in recs}
    lines = log.read_text().splitlines()
    # one line per (host, form) that ran; the environment is part of the form
    assert sorted(lines) == sorted(f"-O{opt}" for _host, opt in need)
    assert len(lines) == len(need) and len(need) >= 2


@pytest.mark.parametrize("address, words", [
    ("nonsense", "not a scheduler address"),
    ("tcp://127.0.0.1", "not a scheduler address"),
    ("tcp://127.0.0.1:1", "cannot reach the Dask scheduler"),
])
def test_bad_or_unreachable_scheduler_is_one_line_and_leaves_no_folder(tmp_path, address,
                                                                       words):
    out = tmp_path / "res"
    r = _run(["run", _exp(tmp_path), "--out", out, "--scheduler", address], timeout=30)
    assert r.returncode == 2
    assert words in r.stderr and "Traceback" not in r.stderr
    assert len(r.stderr.strip().splitlines()) == 1
    assert not out.exists()  # retrying with the same --out works
