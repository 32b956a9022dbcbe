"""The results folder: its name, what counts as one, damaged lines, edited inputs
(results/journal.py).

Planted truths written to kill mutants that survived the rest of the suite
(DEVELOPERS.md, "Mutation testing"): two harnesses publishing the same experiment in
the same second get two folders (``-2``), neither replacing the other; a folder is a
results folder when it holds its frozen experiment and either the journal or runs.csv.
"""

from __future__ import annotations

from benchharness.results import journal as J


def test_same_name_same_second_gets_a_suffix_and_replaces_nothing(tmp_path, monkeypatch):
    monkeypatch.setattr(J, "utc_stamp", lambda now=None: "20261205T101500Z")
    finals = []
    for i in range(3):
        folder = J.start_folder(tmp_path, "codecs", None)
        (folder / "runs.jsonl").write_text(f"harness {i}\n")
        finals.append(J.publish_folder(folder, tmp_path, "codecs", None))
    assert [f.name for f in finals] == ["codecs-20261205T101500Z", "codecs-20261205T101500Z-2",
                                        "codecs-20261205T101500Z-3"]
    assert [(f / "runs.jsonl").read_text() for f in finals] == [f"harness {i}\n"
                                                               for i in range(3)]
    assert sorted(p.name for p in tmp_path.iterdir()) == [f.name for f in finals]


def test_results_folder_needs_the_experiment_and_the_journal_or_runs_csv(tmp_path):
    def folder(name, *files):
        d = tmp_path / name
        d.mkdir()
        for f in files:
            (d / f).write_text("x")
        return d

    assert J.is_results_folder(folder("both", "experiment.yaml", "runs.jsonl", "runs.csv"))
    assert J.is_results_folder(folder("journal", "experiment.yaml", "runs.jsonl"))
    assert J.is_results_folder(folder("csv", "experiment.yaml", "runs.csv"))
    assert not J.is_results_folder(folder("no-runs", "experiment.yaml"))
    assert not J.is_results_folder(folder("no-experiment", "runs.jsonl", "runs.csv"))
    (tmp_path / "file.csv").write_text("x")
    assert not J.is_results_folder(tmp_path / "file.csv")
    assert not J.is_results_folder(tmp_path / "missing")


def test_a_journal_line_that_is_not_utf8_is_named_not_a_crash(tmp_path):
    # Planted: three records, the middle line replaced by bytes that are not UTF-8. The
    # reader names that line and what is wrong, and counts the runs on the others.
    import json

    import pytest

    from benchharness.errors import ResultsFolderError

    recs = [json.dumps({"run": i, "status": "ok", "wall_s": 1.0, "levels": {"a": "x"}})
            for i in range(3)]
    p = tmp_path / "runs.jsonl"
    p.write_bytes(recs[0].encode() + b"\n\xff\xfe half a record\n" + recs[2].encode() + b"\n")
    with pytest.raises(ResultsFolderError) as e:
        J.read_journal(p)
    msg = str(e.value)
    assert msg.startswith(f"{p}:2: the line is not UTF-8 text")
    assert "the 2 runs recorded on the other lines are kept" in msg


def test_resume_refuses_an_edited_experiment_naming_the_file(tmp_path):
    # the frozen experiment.yaml changed after the start: its SHA-256 (hashlib, outside
    # reference) differs from the one recorded, and the error names the file
    import hashlib
    from types import SimpleNamespace

    import pytest

    from benchharness.errors import ResultsFolderError

    text = "experiment: frozen\n"
    session = {"experiment_sha256": hashlib.sha256(text.encode()).hexdigest()}
    J.check_frozen(tmp_path, SimpleNamespace(source_text=text), session)   # unchanged: fine
    with pytest.raises(ResultsFolderError) as e:
        J.check_frozen(tmp_path, SimpleNamespace(source_text=text + "# edited\n"), session)
    assert str(e.value).startswith(f"{tmp_path / 'experiment.yaml'}: changed since")


def _records(n):
    import json

    return [json.dumps({"run": i, "status": "ok", "wall_s": 1.0,
                        "levels": {"a": "x"}}).encode() for i in range(n)]


def test_a_record_without_its_newline_is_a_write_that_did_not_finish(tmp_path):
    # A record counts once its line is complete (newline included): a power cut between
    # the record and its newline leaves a run that the resume runs again, not half-kept.
    r = _records(3)
    p = tmp_path / "runs.jsonl"
    p.write_bytes(r[0] + b"\n" + r[1] + b"\n" + r[2])
    assert [x["run"] for x in J.read_journal(p)] == [0, 1]
    J.read_journal(p, repair=True, notes=[])
    assert p.read_bytes() == r[0] + b"\n" + r[1] + b"\n"     # cut back to complete lines


def test_a_first_line_torn_by_a_crash_leaves_an_empty_journal_not_an_error(tmp_path):
    # the harness was killed while writing its first record: nothing was measured yet
    p = tmp_path / "runs.jsonl"
    p.write_bytes(b'{"run": 0, "sta\n')
    assert J.read_journal(p) == []
    p.write_bytes(_records(2)[0] + b"\n" + b'{"run": 1, "st\n')
    assert [x["run"] for x in J.read_journal(p)] == [0]


def test_a_new_folder_is_named_after_the_experiment_and_the_time(tmp_path, monkeypatch):
    monkeypatch.setattr(J, "utc_stamp", lambda now=None: "20261205T101500Z")
    a = J.new_folder(tmp_path / "results", "codecs", None)
    b = J.new_folder(tmp_path / "results", "codecs", None)
    assert (a.name, b.name) == ("codecs-20261205T101500Z", "codecs-20261205T101500Z-2")
    assert a.is_dir() and b.is_dir() and not any(a.iterdir())
    c = J.new_folder(tmp_path / "results", "codecs", tmp_path / "chosen")
    assert c == tmp_path / "chosen" and c.is_dir()


def test_a_repeated_run_is_moved_beside_the_journal_on_repair(tmp_path):
    # Planted: run 1 recorded twice with other values (a resume that ran it again). On
    # repair the first record stays, the repeat goes to runs.jsonl.duplicates, and the
    # note says so; nothing is lost.
    import json

    r = _records(3)
    again = json.dumps({"run": 1, "status": "ok", "wall_s": 2.0, "levels": {"a": "x"}}).encode()
    p = tmp_path / "runs.jsonl"
    p.write_bytes(b"\n".join([r[0], r[1], again, r[2]]) + b"\n")
    notes = []
    recs = J.read_journal(p, repair=True, notes=notes)
    assert [(x["run"], x["wall_s"]) for x in recs] == [(0, 1.0), (1, 1.0), (2, 1.0)]
    assert (tmp_path / "runs.jsonl.duplicates").read_bytes() == again + b"\n"
    assert p.read_bytes() == b"\n".join(r) + b"\n"
    assert any("moved to runs.jsonl.duplicates" in n for n in notes), notes


def test_a_record_missing_its_levels_is_named(tmp_path):
    import json

    import pytest

    from benchharness.errors import ResultsFolderError

    p = tmp_path / "runs.jsonl"
    p.write_bytes(_records(1)[0] + b"\n"
                  + json.dumps({"run": 1, "status": "ok", "wall_s": 1.0}).encode() + b"\n")
    with pytest.raises(ResultsFolderError) as e:
        J.read_journal(p)
    assert str(e.value).startswith(f"{p}:2: the record has no 'levels'")


def test_plan_csv_with_columns_that_are_not_factors_names_the_first(tmp_path):
    import pytest

    from benchharness.errors import ResultsFolderError

    (tmp_path / "plan.csv").write_text("run,position,block,replicate,warmup,a,zz,yy\n"
                                       "0,0,1,1,False,x,1,2\n")
    with pytest.raises(ResultsFolderError) as e:
        J.read_plan_csv(tmp_path, ["a"])
    assert str(e.value).startswith(f"{tmp_path / 'plan.csv'}:1: the column 'zz' is not a factor")


def test_records_whose_levels_the_experiment_no_longer_lists_are_refused(tmp_path):
    import pytest

    from benchharness.errors import ResultsFolderError
    from benchharness.experiment.file import Experiment

    exp = Experiment.from_text("experiment: e\ncommand: [echo, '{a}']\nfactors:\n"
                               "  a: [x, y]\n  b: [p, q]\n")
    J.check_levels(tmp_path, exp, [{"run": 0, "levels": {"a": "x", "b": "p"}}])
    with pytest.raises(ResultsFolderError) as e:
        J.check_levels(tmp_path, exp, [{"run": 3, "levels": {"a": "x"}}])
    assert str(e.value).startswith(
        f"{tmp_path / 'experiment.yaml'}: run 3 was recorded without the factor 'b'")
    with pytest.raises(ResultsFolderError) as e:
        J.check_levels(tmp_path, exp, [{"run": 4, "levels": {"a": "w", "b": "p"}}])
    assert str(e.value).startswith(
        f"{tmp_path / 'experiment.yaml'}: run 4 was recorded with the level 'w' of 'a'")


def test_plan_csv_with_a_run_number_that_is_not_a_number_is_named(tmp_path):
    import pytest

    from benchharness.errors import ResultsFolderError

    (tmp_path / "plan.csv").write_text("run,position,block,replicate,warmup,a\n"
                                       "0,0,1,1,false,x\nseven,1,1,1,false,y\n")
    with pytest.raises(ResultsFolderError) as e:
        J.read_plan_csv(tmp_path, ["a"])
    msg = str(e.value)
    assert msg.startswith(f"{tmp_path / 'plan.csv'}:3: invalid literal for int()")
    assert "put back the file as `benchharness run` wrote it" in msg


def test_repeated_runs_are_counted_as_identical_or_with_other_values(tmp_path):
    # Planted: run 1 is recorded four times: the first record, one identical repeat and
    # two repeats with other values. The first record is used; the note counts the three
    # repeats and splits them 1 identical, 2 with other values.
    import json

    r = _records(3)
    other = [json.dumps({"run": 1, "status": "ok", "wall_s": w, "levels": {"a": "x"}}).encode()
             for w in (2.0, 3.0)]
    p = tmp_path / "runs.jsonl"
    p.write_bytes(b"\n".join([r[0], r[1], other[0], r[1], other[1], r[2]]) + b"\n")
    notes = []
    recs = J.read_journal(p, notes=notes)
    assert [(x["run"], x["wall_s"]) for x in recs] == [(0, 1.0), (1, 1.0), (2, 1.0)]
    assert any("3 lines repeat a run already recorded (1 identical, 2 with other values; "
               "run 1)" in n for n in notes), notes


def test_an_old_in_flight_record_names_a_group_whose_first_process_is_gone(tmp_path):
    # Planted: a process group whose first process exited, leaving a member running (a
    # background sleep), and an in-flight record without start times (an older harness).
    # The group cannot be told apart from an unrelated one, so it is not signalled, but
    # the note says it may have been left running.
    import os
    import signal
    import subprocess

    leader = subprocess.Popen(["sh", "-c", "sleep 30 & echo $!"], stdout=subprocess.PIPE,
                              start_new_session=True)
    member = int(leader.stdout.readline())
    leader.wait()
    pgid = leader.pid
    try:
        note = J.stop_run({"pgid": pgid, "run": 3}, "the earlier harness")
        assert note is not None and note.startswith(
            f"process group {pgid} (run 3) may have been left running by the earlier harness")
        os.kill(member, 0)                      # not signalled: still there
    finally:
        os.killpg(pgid, signal.SIGKILL)
        leader.stdout.close()


def test_runs_csv_written_along_is_kept_only_when_its_columns_are_the_exports(tmp_path):
    # runs.csv grows as runs finish, with the columns the first run shows; at the end it
    # is put in place only if an export of all the records would have the same columns.
    # Planted: two runs alike (kept), then two where the second brings a metric the first
    # did not have (not kept: the export writes it whole).
    import csv

    def rec(i, **metrics):
        r = {"run": i, "status": "ok", "wall_s": 1.0 + i, "levels": {"a": "x"}}
        return {**r, "metrics": metrics} if metrics else r

    for name, recs, kept in (("alike", [rec(0), rec(1)], True),
                             ("later", [rec(0), rec(1, hits=3)], False)):
        folder = tmp_path / name
        folder.mkdir()
        (folder / "runs.jsonl").write_bytes(b"")
        mirror = J.JournalMirror(folder / "runs.jsonl", limit=10, factors=("a",))
        for r in recs:
            mirror.add(r)
        assert mirror.commit_csv(recs) is kept
        assert (folder / "runs.csv").exists() is kept
        if kept:
            with open(folder / "runs.csv", newline="") as fh:
                rows = list(csv.DictReader(fh))
            assert [(r["run"], r["a"], r["wall_s"]) for r in rows] == [("0", "x", "1.0"),
                                                                        ("1", "x", "2.0")]
