"""Shared fixtures: run the command line as a user would, from this checkout."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent


def run_cli(*args, cwd=None, env=None, timeout=300, input=None):
    """Run ``python -m benchharness ARGS`` from this checkout; returns CompletedProcess."""
    e = dict(os.environ)
    e["PYTHONPATH"] = str(ROOT) + os.pathsep + e.get("PYTHONPATH", "")
    e.setdefault("NO_COLOR", "1")
    if env:
        e.update(env)
    return subprocess.run(
        [sys.executable, "-m", "benchharness", *map(str, args)],
        cwd=cwd or ROOT, env=e, capture_output=True, text=True, timeout=timeout, input=input,
    )


@pytest.fixture
def cli():
    return run_cli


@pytest.fixture
def root():
    return ROOT
