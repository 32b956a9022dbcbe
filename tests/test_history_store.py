"""The history record (benchharness.history.store): import, idempotence, transactions, git.

Results folders are written by hand following the DESIGN.md contract
(tests/history_helpers.py); expected summaries come from scipy/numpy.
"""

from __future__ import annotations

import json
import math
import sqlite3
import subprocess

import numpy as np
import pytest
from scipy import stats

from benchharness.errors import BenchharnessError, DataError, UsageError
from benchharness.history import store
from benchharness.history.store import add_results, read_history
from history_helpers import HOST_A, HOST_B, write_folder

FACTORS = {"codec": ["zlib", "lzma"], "level": ["1", "1.10"]}
VALUES = {("zlib", "1"): [1.00, 1.10, 1.05, 0.98], ("zlib", "1.10"): [2.0, 2.1, 2.2, 2.05],
          ("lzma", "1"): [3.0, 3.1, 3.3, 3.2], ("lzma", "1.10"): [5.0]}


def _folder(tmp_path, name="archive-codecs-20261130T120000Z", values=VALUES, host=None, **kw):
    return write_folder(tmp_path / name, "archive-codecs", FACTORS, values, host=host,
                        failed=1, **kw)


def test_round_trip_matches_reference_summaries(tmp_path):
    f = _folder(tmp_path)
    db = tmp_path / "h.sqlite"
    assert add_results(db, f, commit="1234abcd", branch="main", cwd=tmp_path) == 4
    df = read_history(db)
    assert len(df) == 4
    assert set(df["commit_id"]) == {"1234abcd"} and set(df["branch"]) == {"main"}
    assert set(df["experiment"]) == {"archive-codecs"}
    for cell, vals in VALUES.items():
        key = json.dumps({"codec": cell[0], "level": cell[1]}, sort_keys=True,
                         separators=(",", ":"))
        row = df[df["cell"] == key].iloc[0]
        logs = np.log(vals)
        assert row["n"] == len(vals)          # warm-up and failed runs left out
        assert row["scale"] == "log"
        # reference: scipy.stats.gmean and scipy.stats.t.interval on the logs
        assert row["center"] == pytest.approx(stats.gmean(vals), rel=1e-12)
        if len(vals) > 1:
            lo, hi = stats.t.interval(0.95, len(vals) - 1, loc=logs.mean(),
                                      scale=stats.sem(logs))
            assert row["ci_low"] == pytest.approx(math.exp(lo), rel=1e-12)
            assert row["ci_high"] == pytest.approx(math.exp(hi), rel=1e-12)
            assert row["noise_sd"] == pytest.approx(np.std(logs, ddof=1), rel=1e-12)
        else:
            assert math.isnan(row["ci_low"]) and math.isnan(row["noise_sd"])
    # cells in the experiment's level order (codec: [zlib, lzma], level: [1, 1.10])
    assert [json.loads(c) for c in df["cell"]] == [
        {"codec": "zlib", "level": "1"}, {"codec": "zlib", "level": "1.10"},
        {"codec": "lzma", "level": "1"}, {"codec": "lzma", "level": "1.10"}]
    # level labels kept as written: 1.10 is not 1.1
    assert any('"1.10"' in c for c in df["cell"])
    facts = json.loads(df["host_facts"].iloc[0])
    assert facts["cpu_model"] == {"cpu_model": "Example CPU 3000"}
    assert "memory_available_bytes" not in json.dumps(facts)   # volatile facts left out
    assert set(facts) == {"cpu_model", "cores", "memory", "os", "python"}


def test_second_import_adds_nothing(tmp_path):
    f = _folder(tmp_path)
    db = tmp_path / "h.sqlite"
    assert add_results(db, f, commit="aaa1", cwd=tmp_path) == 4
    assert add_results(db, f, commit="aaa1", cwd=tmp_path) == 0
    assert add_results(db, f, cwd=tmp_path, commit="aaa1") == 0
    with sqlite3.connect(db) as conn:
        assert conn.execute("SELECT COUNT(*) FROM cells").fetchone()[0] == 4
        assert conn.execute("SELECT COUNT(*) FROM folders").fetchone()[0] == 1
    # the same folder under another commit is refused, not silently duplicated
    with pytest.raises(DataError, match="already recorded as commit aaa1"):
        add_results(db, f, commit="bbb2", cwd=tmp_path)
    # another response of the same folder adds its own rows
    assert add_results(db, f, commit="aaa1", responses=("user_s",), cwd=tmp_path) == 4


def test_copied_folder_is_the_same_folder(tmp_path):
    import shutil

    f = _folder(tmp_path)
    db = tmp_path / "h.sqlite"
    assert add_results(db, f, commit="aaa1", cwd=tmp_path) == 4
    copy = tmp_path / "elsewhere"
    copy.mkdir()
    shutil.copytree(f, copy / f.name)
    assert add_results(db, copy / f.name, commit="aaa1", cwd=tmp_path) == 0


def test_interrupted_import_leaves_no_partial_rows(tmp_path, monkeypatch):
    f = _folder(tmp_path)
    db = tmp_path / "h.sqlite"
    real = store._insert_cell
    calls = {"n": 0}

    def failing(conn, row):
        calls["n"] += 1
        if calls["n"] == 3:
            raise RuntimeError("disk pulled out mid-import")
        return real(conn, row)

    # an existing history file (a first add that fails removes the file it made:
    # tests/test_cli_grammar.py::test_a_refused_first_history_add_leaves_no_file)
    store.connect(db).close()
    monkeypatch.setattr(store, "_insert_cell", failing)
    with pytest.raises(RuntimeError):
        add_results(db, f, commit="aaa1", cwd=tmp_path)
    assert calls["n"] == 3
    with sqlite3.connect(db) as conn:
        assert conn.execute("SELECT COUNT(*) FROM cells").fetchone()[0] == 0
        assert conn.execute("SELECT COUNT(*) FROM folders").fetchone()[0] == 0
    monkeypatch.setattr(store, "_insert_cell", real)
    assert add_results(db, f, commit="aaa1", cwd=tmp_path) == 4


def test_host_fingerprint_follows_the_machine(tmp_path):
    db = tmp_path / "h.sqlite"
    a1 = _folder(tmp_path, "a1", host=HOST_A)
    a2 = _folder(tmp_path, "a2", host=dict(HOST_A, load_average_start=[3.5, 2, 1],
                                           memory_available_bytes=1, hostname="ci-runner-9",
                                           cpu_mhz_now=3100.0,
                                           memory_pressure={"some": {"avg10": 9.5}},
                                           memory_bytes=HOST_A["memory_bytes"]
                                           - 3 * 2 ** 20))   # a few pages less after a reboot
    b = _folder(tmp_path, "b", host=HOST_B)
    for i, f in enumerate((a1, a2, b)):
        add_results(db, f, commit=f"c{i}", cwd=tmp_path)
    df = read_history(db)
    fp = df.groupby("folder_name")["host_fingerprint"].first()
    assert fp["a1"] == fp["a2"] != fp["b"]
    # more memory is another machine
    c = _folder(tmp_path, "c", host=dict(HOST_A, memory_bytes=16 * 2 ** 30))
    add_results(db, c, commit="c9", cwd=tmp_path)
    fp = read_history(db).groupby("folder_name")["host_fingerprint"].first()
    assert fp["c"] != fp["a1"]


def test_fingerprint_of_a_foreign_host_json():
    # a host.json not written by benchharness: facts found by key patterns
    from benchharness.history.fingerprint import host_facts, host_fingerprint

    h = {"cpu": {"model": "Example CPU"}, "mem_total_kib": 8_000_000, "mem_free_kib": 12345,
         "platform": "Linux-6.1-x86_64", "python_version": "3.12.1", "load": [1, 2, 3]}
    facts = host_facts(h)
    assert facts == {"cpu_model": {"cpu.model": "Example CPU"},
                     "memory": {"mem_total_kib": "7.5 GiB"},
                     "os": {"platform": "Linux-6.1-x86_64"},
                     "python": {"python_version": "3.12.1"}}
    assert host_fingerprint(dict(h, mem_free_kib=1, load=[9])) == host_fingerprint(h)
    assert host_fingerprint({}) == "unknown"


def test_commit_read_from_git(tmp_path):
    repo = tmp_path / "repo"
    repo.mkdir()
    env = {"GIT_AUTHOR_NAME": "t", "GIT_AUTHOR_EMAIL": "t@example.org",
           "GIT_COMMITTER_NAME": "t", "GIT_COMMITTER_EMAIL": "t@example.org",
           "GIT_COMMITTER_DATE": "2026-11-29T10:00:00+00:00", "PATH": "/usr/bin:/bin"}
    run = lambda *a: subprocess.run(["git", *a], cwd=repo, env=env, check=True,  # noqa: E731
                                    capture_output=True, text=True).stdout.strip()
    run("init", "-q", "-b", "trunk")
    (repo / "x.txt").write_text("x")
    run("add", "x.txt")
    run("commit", "-q", "-m", "first")
    head = run("rev-parse", "HEAD")
    f = _folder(tmp_path)
    db = tmp_path / "h.sqlite"
    assert add_results(db, f, cwd=repo) == 4
    row = read_history(db).iloc[0]
    assert row["commit_id"] == head and row["branch"] == "trunk"
    assert row["commit_time"].startswith("2026-11-29T10:00:00")
    # a short id given on the command line is resolved to the full one
    f2 = _folder(tmp_path, "second")
    add_results(db, f2, commit=head[:7], cwd=repo)
    assert set(read_history(db)["commit_id"]) == {head}


def test_no_commit_outside_a_repository_is_a_clear_error(tmp_path):
    f = _folder(tmp_path)
    plain = tmp_path / "plain"
    plain.mkdir()
    with pytest.raises(UsageError, match="not a git repository; pass --commit"):
        add_results(tmp_path / "h.sqlite", f, cwd=plain)


def test_bad_inputs_are_one_line_errors(tmp_path):
    with pytest.raises(BenchharnessError, match="not a results folder"):
        add_results(tmp_path / "h.sqlite", tmp_path / "nope", commit="x")
    junk = tmp_path / "junk.sqlite"
    junk.write_bytes(b"this is not a database at all" * 100)
    with pytest.raises(DataError, match="not a benchharness history file"):
        add_results(junk, _folder(tmp_path), commit="x")
    with pytest.raises(UsageError, match="no history file"):
        read_history(tmp_path / "missing.sqlite")
    with pytest.raises(UsageError, match="factor=level"):
        store.parse_cell_filter("codec")


def test_series_order_and_cell_filter(tmp_path):
    from datetime import datetime, timezone

    db = tmp_path / "h.sqlite"
    # imported out of order; no commit times (no git) -> ordered by run start
    for day in (3, 1, 2):
        f = _folder(tmp_path, f"d{day}",
                    start=datetime(2026, 11, day, tzinfo=timezone.utc))
        add_results(db, f, commit=f"c{day}", cwd=tmp_path)
    df = read_history(db, cell_filter={"codec": "zlib", "level": "1"})
    assert list(df["commit_id"]) == ["c1", "c2", "c3"]
    assert read_history(db, experiment="other").empty


def test_resumed_folder_replaces_its_earlier_rows(tmp_path):
    f = _folder(tmp_path)
    db = tmp_path / "h.sqlite"
    assert add_results(db, f, commit="aaa1", branch="main", cwd=tmp_path) == 4
    # the run is resumed: one more timed run of zlib/1 is appended to the journal
    lines = (f / "runs.jsonl").read_text().splitlines()
    last = json.loads([ln for ln in lines if '"zlib"' in ln and '"ok"' in ln][0])
    last.update(run=999, position=999, wall_s=1.02)
    with open(f / "runs.jsonl", "a") as fh:
        fh.write(json.dumps(last) + "\n")
    assert add_results(db, f, cwd=tmp_path) == 4        # no --commit needed: it is known
    with sqlite3.connect(db) as conn:
        assert conn.execute("SELECT COUNT(*) FROM folders").fetchone()[0] == 1
        assert conn.execute("SELECT COUNT(*) FROM cells").fetchone()[0] == 4
    row = read_history(db, cell_filter={"codec": "zlib", "level": "1"}).iloc[0]
    assert row["n"] == 5 and row["commit_id"] == "aaa1" and row["branch"] == "main"
    assert row["center"] == pytest.approx(stats.gmean([1.00, 1.10, 1.05, 0.98, 1.02]))
    assert add_results(db, f, cwd=tmp_path) == 0


def test_selected_side_of_an_interleaved_folder(tmp_path):
    # a folder that interleaved two builds: each side recorded under its own commit
    vals = {("old", "zlib"): [1.0, 1.02, 0.99], ("new", "zlib"): [1.2, 1.21, 1.19],
            ("old", "lzma"): [3.0, 3.1, 2.9], ("new", "lzma"): [3.0, 3.05, 2.95]}
    f = write_folder(tmp_path / "gate-run", "archive-codecs",
                     {"build": ["old", "new"], "codec": ["zlib", "lzma"]}, vals)
    db = tmp_path / "h.sqlite"
    assert add_results(db, f, commit="base1", cwd=tmp_path, select={"build": "old"}) == 2
    assert add_results(db, f, commit="head2", cwd=tmp_path, select={"build": "new"}) == 2
    assert add_results(db, f, commit="head2", cwd=tmp_path, select={"build": "new"}) == 0
    df = read_history(db, cell_filter={"codec": "zlib"})
    assert list(df["cell"]) == ['{"codec":"zlib"}', '{"codec":"zlib"}']
    assert dict(zip(df["commit_id"], df["center"].round(6))) == {
        "base1": round(stats.gmean([1.0, 1.02, 0.99]), 6),
        "head2": round(stats.gmean([1.2, 1.21, 1.19]), 6)}
    # every factor fixed: one cell with no levels
    assert add_results(db, f, commit="head2", cwd=tmp_path,
                       select={"build": "new", "codec": "lzma"}) == 1
    assert "{}" in set(read_history(db)["cell"])
    with pytest.raises(DataError, match="not a level of `build`"):
        add_results(db, f, commit="x", cwd=tmp_path, select={"build": "newest"})
    with pytest.raises(DataError, match="not a factor"):
        add_results(db, f, commit="x", cwd=tmp_path, select={"arch": "x86"})
