"""The journal's durability promises (issue: results folder): group-commit fsync at
least once a second while there is unsynced data and at the end, nothing fsynced
while idle, and the new folder (and its parent entry) fsynced when created."""

from __future__ import annotations

import os
import time

from benchharness.results import journal as J


def _record_fsyncs(monkeypatch):
    calls = []
    real = os.fsync

    def spy(fd):
        calls.append((fd, time.monotonic()))
        return real(fd)

    monkeypatch.setattr(J.os, "fsync", spy)
    return calls


def test_group_commit_fsync_while_dirty_and_at_close(tmp_path, monkeypatch):
    calls = _record_fsyncs(monkeypatch)
    jr = J.Journal(tmp_path, sync_interval_s=0.05)
    fd = jr.fd
    try:
        jr.append({"run": 0, "status": "ok"})
        t0 = time.monotonic()
        deadline = t0 + 5
        while not any(c[0] == fd for c in calls) and time.monotonic() < deadline:
            time.sleep(0.01)
        synced = [c for c in calls if c[0] == fd]
        assert synced, "an appended record was never fsynced"
        assert synced[0][1] - t0 < 1.0  # within the promised second (interval 0.05 s here)
        # idle: nothing new to sync, so no further fsync calls
        n = len([c for c in calls if c[0] == fd])
        time.sleep(0.3)
        assert len([c for c in calls if c[0] == fd]) == n
        jr.append({"run": 1, "status": "ok"})
    finally:
        jr.close()
    # close syncs whatever is left
    assert len([c for c in calls if c[0] == fd]) >= 2
    lines = (tmp_path / "runs.jsonl").read_text().splitlines()
    assert len(lines) == 2


def test_default_interval_is_at_most_a_second():
    import inspect

    assert inspect.signature(J.Journal).parameters["sync_interval_s"].default <= 1.0


def test_new_folder_is_fsynced_with_its_parent(tmp_path, monkeypatch):
    synced_dirs = []
    real = J.fsync_dir

    def spy(path):
        synced_dirs.append(os.path.realpath(path))
        return real(path)

    monkeypatch.setattr(J, "fsync_dir", spy)
    folder = J.new_folder(tmp_path, "exp", tmp_path / "res")
    assert os.path.realpath(folder) in synced_dirs
    assert os.path.realpath(tmp_path) in synced_dirs
