"""conftest's `run_main` (a command in the test's own process) answers as `run_cli` (a new
`python -m benchharness` process) does: the same exit code, standard output and standard
error, and it leaves the test's process as it found it (working directory, environment,
`sys.argv`, standard streams). Most command-line tests rely on this to skip a second of
start-up per command."""

from __future__ import annotations

import os
import sys

import pytest

from conftest import ROOT, run_cli, run_main


@pytest.mark.parametrize("args", [
    ("plan", "experiments/archive-codecs.yaml"),              # a result, relative to the checkout
    ("gate", "--baseline", "true"),                            # argparse's usage error: exit 2
    ("plan", "--no-such-option", "experiments/archive-codecs.yaml"),
    ("--version",),                                            # argparse exits 0 itself
], ids=["plan", "usage", "unknown-option", "version"])
def test_in_process_answers_as_a_new_process(args, tmp_path):
    new, here = run_cli(*args), run_main(*args)
    assert (here.returncode, here.stdout, here.stderr) == \
        (new.returncode, new.stdout, new.stderr)


def test_a_note_said_once_per_process_is_said_again_by_each_call():
    # `values.deprecated` says each note once per process; each call stands for a process
    args = ("analyze", "missing.csv", "--factors", "a", "--json", "out.json")
    first, second = run_main(*args), run_main(*args)
    assert "note: --json FILE is deprecated" in first.stderr
    assert first.stderr == second.stderr


def test_the_process_is_left_as_it_was(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    before = (os.getcwd(), dict(os.environ), list(sys.argv), sys.stdin, sys.stdout, sys.stderr)
    # a path relative to the checkout, from elsewhere: the call's own working directory
    r = run_main("plan", "experiments/archive-codecs.yaml", cwd=ROOT,
                 env={"BENCHHARNESS_TEST_MARK": "1"})
    assert r.returncode == 0, r.stderr
    assert (os.getcwd(), dict(os.environ), list(sys.argv), sys.stdin, sys.stdout,
            sys.stderr) == before
