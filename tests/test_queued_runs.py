"""Queued runs: the launcher runs an experiment's runs back to back and journals
the ones that end ok itself.

These tests hold that path to the one-run-at-a-time path (the same executor
behind a wrapper without the capability): the same journal, the same runs.csv,
the same statuses and messages; that a queued run's journal line is exactly
what the harness's own encoder writes; that kept output pipes never carry one
run's output into the next; that closing a stream starts nothing more; and
that a resume stops a launcher a dead harness left behind.
"""

from __future__ import annotations

import json
import os
import time
from pathlib import Path

import pytest

from benchharness.results import journal as J
from benchharness.execute.base import RunSpec
from benchharness.execute.local import LocalExecutor
from benchharness.experiment.file import Experiment
from benchharness.execute.runner import run_experiment
from executor_wrappers import Counting, OneByOne

PATH = os.environ.get("PATH", "/usr/bin:/bin")

MIXED = """experiment: queued
command: [sh, -c, 'echo "$MODE" >&2; case "$MODE" in bad) exit 3;; slow) sleep 5;; esac']
env:
  MODE: "{mode}"
factors:
  mode: [good, bad, slow, other]
replicates: 2
warmup: 1
timeout: 0.3s
seed: 5
host_check: off
"""

# how a killed tree came apart varies from run to run, not between the paths
TREE_NOTES = {"orphans_counted", "leftover_processes"}
MEASURED = TREE_NOTES | {"wall_s", "user_s", "sys_s", "max_rss_kib", "minor_faults", "major_faults",
            "voluntary_switches", "involuntary_switches", "in_blocks", "out_blocks",
            "started_at", "load_1m", "cpu_mhz"}


def _lines(folder: Path) -> list[bytes]:
    return (folder / "runs.jsonl").read_bytes().splitlines(keepends=True)


def test_queued_and_one_by_one_paths_record_the_same_runs(tmp_path):
    exp = Experiment.from_text(MIXED)
    with LocalExecutor() as ex:
        counting = Counting(ex)
        a = run_experiment(exp, out=tmp_path / "a", executor=counting)
        b = run_experiment(exp, out=tmp_path / "b", executor=OneByOne(ex))
    assert counting.streams == 1
    ra = [json.loads(x) for x in _lines(a.folder)]
    rb = [json.loads(x) for x in _lines(b.folder)]
    assert len(ra) == len(rb) == 4 * 2 + 4
    for x, y in zip(ra, rb):
        # the same fields in the same order
        assert [k for k in x if k not in TREE_NOTES] == [k for k in y if k not in TREE_NOTES]
        assert {k: v for k, v in x.items() if k not in MEASURED} == \
            {k: v for k, v in y.items() if k not in MEASURED}
    by = {(r["levels"]["mode"], r["status"]) for r in ra if r["status"] != "warmup"}
    assert by == {("good", "ok"), ("other", "ok"), ("bad", "failed"), ("slow", "timeout")}
    assert a.counts == b.counts == {"warmup": 4, "ok": 4, "failed": 2, "timeout": 2}
    # a failed warm-up is still a warm-up, with what went wrong
    warm_bad = [r for r in ra if r["status"] == "warmup" and r["levels"]["mode"] == "bad"]
    assert warm_bad[0]["message"].startswith("warm-up run failed: exit code 3")


def test_launcher_written_lines_are_the_harness_encoding_and_runs_csv_matches(tmp_path):
    # the launcher renders ok runs' lines itself; each must be byte for byte what
    # the harness's encoder makes of the same record (common practice: one
    # canonical form, so readers and the end-of-run check agree)
    text = ("experiment: lines\ncommand: [true]\nfactors:\n  k: ['1', '1.0', 'a b']\n"
            "replicates: 4\nwarmup: 1\naslr: off\nhost_check: off\nseed: 2\n")
    out = run_experiment(Experiment.from_text(text), out=tmp_path / "x")
    lines = _lines(out.folder)
    assert len(lines) == 3 * 4 + 3
    for line in lines:
        assert J.encode_record(json.loads(line)) == line
    # runs.csv, written while the runs went on, equals a fresh export of the journal
    made = (out.folder / "runs.csv").read_bytes()
    session = json.loads((out.folder / "session.json").read_text())
    J.export_runs_csv(tmp_path, ["k"], J.read_journal(out.folder / "runs.jsonl"),
                      J.session_floor_kib(session))
    assert (tmp_path / "runs.csv").read_bytes() == made
    assert "max_rss_at_floor" in made.splitlines()[0].decode().split(",")
    assert not (out.folder / "runs.csv.partial").exists()
    assert out.runs["aslr"].nunique() == 1  # off, or on where the kernel refuses


def test_end_of_run_check_falls_back_to_the_journal(tmp_path):
    # the records kept while runs streamed serve runs.csv only if the journal
    # holds exactly their lines; anything else and the journal is read again
    path = tmp_path / "runs.jsonl"
    path.write_bytes(b"")
    m = J.JournalMirror(path, limit=10, factors=["k"])
    rec = {"run": 0, "position": 0, "block": 0, "replicate": 1, "levels": {"k": "a"},
           "status": "ok", "exit_code": 0, "wall_s": 0.5, "started_at": "", "message": ""}
    m.add(rec)
    path.write_bytes(J.encode_record(rec))
    assert m.verified() == [rec]
    path.write_bytes(J.encode_record(dict(rec, wall_s=0.25)))
    assert m.verified() is None
    m.drop()
    assert not (tmp_path / "runs.csv.partial").exists()


def test_kept_output_pipes_never_carry_output_into_the_next_run(tmp_path):
    env = {"PATH": PATH}
    with LocalExecutor(linger_s=0.05) as ex:
        first = ex.execute(RunSpec(argv=("sh", "-c", "echo one; echo err1 >&2"), env=env))
        second = ex.execute(RunSpec(argv=("true",), env=env))
        assert first.stdout_tail == b"one\n" and first.stderr_tail == b"err1\n"
        assert second.stdout_tail == b"" and second.stderr_tail == b""
        # a process the run leaves behind keeps the pipe and writes later: the
        # pipes are given up, so the next runs never see its output
        third = ex.execute(RunSpec(argv=("sh", "-c", "(sleep 0.3; echo late) & echo now"),
                                   env=env))
        fourth = ex.execute(RunSpec(argv=("sleep", "0.5"), env=env))
        fifth = ex.execute(RunSpec(argv=("true",), env=env))
        assert third.stdout_tail == b"now\n"
        assert b"late" not in fourth.stdout_tail + fifth.stdout_tail
        assert third.extra.get("leftover_processes", 0) >= 1  # the subshell and its sleep


def test_closing_a_stream_starts_no_further_run(tmp_path):
    marks = tmp_path / "marks"
    journal = tmp_path / "runs.jsonl"
    journal.write_bytes(b"")
    env = {"PATH": PATH, "MARKS": str(marks)}
    spec = RunSpec(argv=("sh", "-c", 'echo x >> "$MARKS"; sleep 0.05'), env=env)
    with LocalExecutor() as ex:
        stream = ex.open_stream(journal)
        for i in range(40):
            stream.submit(spec, i, J.record_head({"run": i, "position": i, "block": 0,
                                                  "replicate": 1, "levels": {}}, "ok"))
        stream.flush()
        seen = []
        while not seen:
            seen += stream.events(timeout_s=5)
        late = stream.close()
        started = len(marks.read_text().splitlines())
        time.sleep(0.3)
        assert len(marks.read_text().splitlines()) == started < 40
        written = len(journal.read_bytes().splitlines())
        assert written == len([e for e in seen + late if e.written]) <= started
        # the executor serves single runs again afterwards
        assert ex.execute(RunSpec(argv=("true",), env=env)).status == "ok"


def test_resume_stops_a_launcher_the_dead_harness_left(tmp_path):
    ex = LocalExecutor()
    try:
        (tmp_path / "inflight").write_text(json.dumps(
            {"run": 3, "pid": 0, "pgid": 0, "boot": J.boot_id(),
             "launcher": ex.launcher_pid, "lstart": ex._hello()["start"]}).ljust(160))
        J.kill_leftover(tmp_path)
        deadline = time.monotonic() + 5
        while ex._proc.poll() is None and time.monotonic() < deadline:
            time.sleep(0.01)
        assert ex._proc.poll() is not None
    finally:
        ex._closed = True


def test_a_pid_that_is_no_launcher_is_left_alone(tmp_path):
    # the record names a pid that now belongs to another process (here: ours)
    (tmp_path / "inflight").write_text(json.dumps(
        {"run": 3, "pid": 0, "pgid": 0, "boot": J.boot_id(),
         "launcher": os.getpid()}).ljust(160))
    assert J.kill_leftover(tmp_path) is None  # and we are still here


@pytest.mark.parametrize("text", [
    "experiment: b\ncommand: [true]\nbuild: [true]\nfactors:\n  k: [a]\nhost_check: off\n",
    "experiment: b\ncommand: [true]\nfactors:\n  k: [a]\npad_env: true\nhost_check: off\n",
    "experiment: b\ncommand: [true]\nfactors:\n  k: [a]\nexpect:\n  exit: 0\n"
    "host_check: off\n",
])
def test_runs_that_need_the_harness_between_them_are_not_queued(tmp_path, text):
    with LocalExecutor() as ex:
        counting = Counting(ex)
        out = run_experiment(Experiment.from_text(text), out=tmp_path / "x", executor=counting)
    assert counting.streams == 0
    assert out.counts == {"ok": 1}


def test_each_queued_run_is_the_one_in_the_inflight_record_while_it_runs(tmp_path):
    # The stream builds one request per cell and copies it per run with that
    # run's id: each run, reading the in-flight record while it runs, must find
    # its own run id and its own pid there (what a resume relies on to stop
    # the right process; common practice: the record names the live run). The
    # launcher stores it right after the spawn while the child already runs,
    # so the command waits (up to 3 s) for its own pid to appear first.
    out = tmp_path / "res"
    seen = tmp_path / "seen.txt"
    wait = (f'for i in $(seq 300); do grep -qE "\\"pid\\": *$$," {out}/inflight && break; '
            'sleep 0.01; done; ')
    text = ("experiment: inflight\n"
            f"command: [sh, -c, '{wait}echo $$ $(cat {out}/inflight) >> {seen}']\n"
            "factors:\n  k: [a, b]\nreplicates: 3\nseed: 4\nhost_check: off\n")
    with LocalExecutor() as ex:
        counting = Counting(ex)
        res = run_experiment(Experiment.from_text(text), out=out, executor=counting)
    assert counting.streams == 1 and res.counts == {"ok": 6}
    recs = J.sorted_records(json.loads(x) for x in _lines(res.folder))
    got = [line.split(" ", 1) for line in seen.read_text().splitlines()]
    assert len(got) == len(recs) == 6
    for (pid, record), rec in zip(got, recs):
        record = json.loads(record)
        assert record["run"] == rec["run"]
        assert record["pid"] == record["pgid"] == int(pid)
    assert len({r["run"] for r in recs}) == 6
