"""Shared fixtures: run the command line as a user would, from this checkout.

Two ways, with the same result object (``subprocess.CompletedProcess``: ``returncode``,
``stdout``, ``stderr``):

- ``run_cli`` (fixture ``cli``) starts ``python -m benchharness`` in a new process: the
  console-script path, exit codes as the shell sees them, a timeout, Ctrl-C, a crash that
  must not take the suite with it. Each command keeps at least one test this way.
- ``run_main`` (fixture ``main_cli``) calls ``benchharness.cli.main`` in this process, with
  its standard streams, working directory and environment swapped for the call. It checks
  the same words and exit codes without the second or so of interpreter start-up and
  imports (pandas, scipy, statsmodels) that every new process pays, which was most of the
  default suite's time.
"""

from __future__ import annotations

import contextlib
import io
import os
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent


def _cli_env(env=None) -> dict:
    """The environment a command of the suite runs with (both ways alike)."""
    e = dict(os.environ)
    e["PYTHONPATH"] = str(ROOT) + os.pathsep + e.get("PYTHONPATH", "")
    e.setdefault("NO_COLOR", "1")
    if env:
        e.update(env)
    return e


def run_cli(*args, cwd=None, env=None, timeout=300, input=None):
    """Run ``python -m benchharness ARGS`` from this checkout; returns CompletedProcess."""
    return subprocess.run(
        [sys.executable, "-m", "benchharness", *map(str, args)],
        cwd=cwd or ROOT, env=_cli_env(env), capture_output=True, text=True, timeout=timeout,
        input=input,
    )


class _Stream(io.StringIO):
    """A text stream that is not a terminal, as a pipe is not (``isatty`` is False)."""

    encoding = "utf-8"


@contextlib.contextmanager
def _environ(env: dict):
    """``os.environ`` replaced by ``env`` inside the block, restored after."""
    saved = dict(os.environ)
    os.environ.clear()
    os.environ.update(env)
    try:
        yield
    finally:
        os.environ.clear()
        os.environ.update(saved)


def run_main(*args, cwd=None, env=None, timeout=None, input=None):
    """Run ``benchharness ARGS`` in this process (``benchharness.cli.main``), as
    ``run_cli`` would in a new one: the same working directory (the checkout unless
    ``cwd``), environment, ``sys.argv``, standard input and captured output, and the exit
    code argparse or the command gives. ``timeout`` is accepted for a drop-in swap and not
    enforced."""
    from benchharness import cli, values

    argv = [str(a) for a in args]
    out, err = _Stream(), _Stream()
    values._said.clear()   # a new process says each deprecation note once again
    saved = sys.stdin, sys.stdout, sys.stderr, sys.argv
    old_cwd = os.getcwd()
    with _environ(_cli_env(env)):
        os.chdir(cwd or ROOT)
        sys.stdin, sys.stdout, sys.stderr = _Stream(input or ""), out, err
        # what `python -m benchharness ARGS` sees (a results folder records it)
        sys.argv = [str(ROOT / "benchharness" / "__main__.py"), *argv]
        try:
            code = cli.main(argv)
        except SystemExit as exc:   # argparse's --help, --version and usage errors
            code = exc.code
            if isinstance(code, str):
                print(code, file=err)
                code = 1
        finally:
            sys.stdin, sys.stdout, sys.stderr, sys.argv = saved
            os.chdir(old_cwd)
    return subprocess.CompletedProcess(["benchharness", *argv], int(code or 0),
                                       out.getvalue(), err.getvalue())


@pytest.fixture
def cli():
    return run_cli


@pytest.fixture
def main_cli():
    return run_main


@pytest.fixture
def root():
    return ROOT
