"""The runner's overlapped per-run path gives the same journal as the plain one.

With an executor that supports ``while_running`` (the local launcher), the next
run's spec and request are prepared, and the current run's conditions sampled,
while a run executes (when runs are not queued: tests/test_queued_runs.py).
These tests compare that path with the plain path (the same executor behind a
wrapper that hides the capability) on real processes.
"""

from __future__ import annotations

import json
import os
import time

import pytest

from benchharness.measure import host
from benchharness.execute.base import RunSpec
from benchharness.execute.local import LocalExecutor
from benchharness.experiment.file import Experiment
from benchharness.execute.runner import run_experiment
from executor_wrappers import NoQueue, OneByOne

TEXT = """experiment: overlap
command: [sh, -c, 'echo "$MODE" >&2; test "$MODE" != bad']
env:
  MODE: "{mode}"
factors:
  mode: [good, bad, other]
replicates: 3
warmup: 1
seed: 11
host_check: off
"""


def _journal(folder):
    with open(folder / "runs.jsonl") as fh:
        return [json.loads(line) for line in fh]


def test_overlapped_and_plain_paths_record_the_same_runs(tmp_path):
    exp = Experiment.from_text(TEXT)
    with LocalExecutor() as ex:
        a = run_experiment(exp, out=tmp_path / "a", executor=NoQueue(ex))
        b = run_experiment(exp, out=tmp_path / "b", executor=OneByOne(ex))
    ra, rb = _journal(a.folder), _journal(b.folder)
    assert len(ra) == len(rb) == 3 * 3 + 3
    skip = {"wall_s", "user_s", "sys_s", "max_rss_kib", "minor_faults", "major_faults",
            "voluntary_switches", "involuntary_switches", "in_blocks", "out_blocks",
            "started_at", "load_1m", "cpu_mhz"}
    for x, y in zip(ra, rb):
        assert set(x) == set(y)
        assert {k: v for k, v in x.items() if k not in skip} == \
            {k: v for k, v in y.items() if k not in skip}
        assert "load_1m" in x and "cpu_mhz" in x  # sampled while the run executed
    # each run's own cell: the failing level fails, with its stderr in the message
    bad = [r for r in ra if r["levels"]["mode"] == "bad" and r["status"] != "warmup"]
    assert bad and all(r["status"] == "failed" and "bad" in r["message"] for r in bad)
    # journal in execution order, one line per run
    assert [r["position"] for r in ra] == sorted(r["position"] for r in ra)


def test_prepared_request_is_rebuilt_when_notify_differs(tmp_path):
    spec = RunSpec(argv=("true",), env={"PATH": os.environ.get("PATH", "/usr/bin:/bin")})
    with LocalExecutor() as ex:
        req = ex.prepare_request(spec, notify=False)
        seen = []
        m = ex.execute(spec, on_start=lambda pid, pgid: seen.append(pid), prepared=req)
        assert m.status == "ok" and len(seen) == 1  # on_start still called
        m = ex.execute(spec, prepared=ex.prepare_request(spec))
        assert m.status == "ok" and m.wall_s > 0


def test_busy_sampler_spans_the_callers_work_and_leaves_out_given_pids():
    s = host.BusySampler(interval_s=0.05).start()
    assert s.due == pytest.approx(time.monotonic() + 0.05, abs=0.05)
    s.exclude_pids([os.getppid()])
    t0 = time.monotonic()
    busy = s.result()
    assert time.monotonic() - t0 <= 0.1  # slept only for what was left
    assert os.getppid() not in {b["pid"] for b in busy}
    assert s.result() is busy  # taken once


def test_host_check_finished_before_results_even_for_a_short_experiment(tmp_path):
    # warn mode: the busy-process sample may outlast a short experiment; the
    # warnings still reach host.json before the run returns
    exp = Experiment.from_text(TEXT.replace("host_check: off", "host_check: warn")
                               .replace("replicates: 3", "replicates: 1"))
    with LocalExecutor() as ex:
        out = run_experiment(exp, out=tmp_path / "h", executor=ex)
    facts = json.loads((out.folder / "host.json").read_text())
    assert isinstance(facts["warnings"], list)
    assert ex.launcher_pid not in {w.get("pid") for w in facts["warnings"]}
    assert not any(f"pid {ex.launcher_pid}," in w["message"] for w in facts["warnings"])
