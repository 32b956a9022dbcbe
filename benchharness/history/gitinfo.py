"""Which commit a results folder measured: asking git in the working directory.

Owns: reading the commit id, commit time (ISO 8601, committer date) and branch
from ``git`` when the working directory is a repository, and resolving a commit
given on the command line to its full id and time when it can be.
"""

from __future__ import annotations

import subprocess
from dataclasses import dataclass
from pathlib import Path

from benchharness.errors import UsageError


@dataclass(frozen=True)
class CommitInfo:
    commit: str
    commit_time: str | None
    branch: str | None


def _git(args: list[str], cwd: Path) -> str | None:
    try:
        proc = subprocess.run(["git", *args], cwd=cwd, capture_output=True, text=True,
                              timeout=20)
    except (OSError, subprocess.TimeoutExpired):
        return None
    if proc.returncode != 0:
        return None
    return proc.stdout.strip() or None


def resolve_commit(commit: str | None = None, branch: str | None = None,
                   cwd: str | Path | None = None) -> CommitInfo:
    """Commit id/time/branch for a history row.

    With ``commit`` given it is kept as typed unless git in ``cwd`` knows it (then
    the full id and its committer time are used). Without it, ``HEAD`` of the
    repository in ``cwd`` is used; if ``cwd`` is not a repository, UsageError.
    """
    cwd = Path(cwd or ".")
    in_repo = _git(["rev-parse", "--is-inside-work-tree"], cwd) == "true"
    if commit is None:
        if not in_repo:
            raise UsageError(f"no --commit given and {cwd.resolve()} is not a git repository; "
                             "pass --commit SHA (and --branch NAME) to say what was measured")
        commit = _git(["rev-parse", "HEAD"], cwd)
        if commit is None:
            raise UsageError(f"{cwd.resolve()}: the git repository has no commit yet; "
                             "pass --commit SHA")
    commit = commit.strip()
    if not commit:
        raise UsageError("--commit is empty; give the commit id that was measured")
    time = None
    if in_repo:
        full = _git(["rev-parse", "--verify", "--quiet", f"{commit}^{{commit}}"], cwd)
        if full:
            commit = full
            time = _git(["show", "-s", "--format=%cI", full], cwd)
        if branch is None:
            b = _git(["rev-parse", "--abbrev-ref", "HEAD"], cwd)
            if b and b != "HEAD" and (full is None or full == _git(["rev-parse", "HEAD"], cwd)):
                branch = b
    return CommitInfo(commit=commit, commit_time=time, branch=branch)
