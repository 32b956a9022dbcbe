"""The results folder's name and what counts as one (results/journal.py).

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
