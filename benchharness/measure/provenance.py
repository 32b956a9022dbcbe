"""Provenance of a results folder: which code and which executables ran.

A timing is only meaningful together with what produced it.  This module
records, as plain dicts for ``provenance.json``:

* the git revision, branch and dirty state (with the changed paths) of the
  experiment's directory when it lies in a git repository;
* for each cell, the executable the command resolves to — ``shutil.which``
  on ``argv[0]`` with the run's ``PATH`` and working directory, the same
  lookup ``execve`` by name performs — and its SHA-256; plus the SHA-256 of
  every other argument that names an existing file (the script an interpreter
  runs, an input file), because ``python3 bench.py`` changes when ``bench.py``
  does.

Hashes are computed once per distinct path and file state.
"""

from __future__ import annotations

import hashlib
import os
import shlex
import shutil
import subprocess
from pathlib import Path
from typing import Iterable, Mapping

HASH_LIMIT_BYTES = 1 << 30     # files larger than 1 GiB are recorded without a hash


def sha256_file(path: str | os.PathLike, limit: int = HASH_LIMIT_BYTES) -> str | None:
    """Hex SHA-256 of a file's content (None when unreadable or above ``limit``)."""
    try:
        if os.path.getsize(path) > limit:
            return None
        h = hashlib.sha256()
        with open(path, "rb") as fh:
            for chunk in iter(lambda: fh.read(1 << 20), b""):
                h.update(chunk)
        return h.hexdigest()
    except OSError:
        return None


def _git(args: list[str], cwd: str) -> str | None:
    try:
        r = subprocess.run(["git", *args], cwd=cwd, capture_output=True, text=True, timeout=20)
    except (OSError, subprocess.SubprocessError):
        return None
    return r.stdout if r.returncode == 0 else None


_HEADS = ["rev-parse", "--show-toplevel", "HEAD", "--abbrev-ref", "HEAD"]
_STATUS = ["status", "--porcelain", "--untracked-files=normal"]
_PENDING: dict = {}   # directory -> git processes started ahead by `prefetch_git`


def _start_git(args: list[str], cwd: str):
    try:
        return subprocess.Popen(["git", *args], cwd=cwd, stdout=subprocess.PIPE,
                                stderr=subprocess.DEVNULL, stdin=subprocess.DEVNULL, text=True)
    except OSError:
        return None


def _finish_git(p) -> str | None:
    if p is None:
        return None
    try:
        text, _ = p.communicate(timeout=20)
    except subprocess.TimeoutExpired:
        p.kill()
        p.communicate()
        return None
    return text if p.returncode == 0 else None


def prefetch_git(directory: str | os.PathLike) -> None:
    """Start the git processes `git_state` needs for ``directory`` now (they run
    while the caller sets up other things); `git_state` then collects them."""
    d = str(directory)
    if d in _PENDING or not shutil.which("git") or not os.path.isdir(d):
        return
    _PENDING[d] = (_start_git(_HEADS, d), _start_git(_STATUS, d))


def git_state(directory: str | os.PathLike) -> dict | None:
    """``{root, revision, branch, dirty, changed}`` of the repository holding ``directory``.

    None when git is missing or the directory is not in a repository.
    ``changed`` lists ``git status --porcelain`` lines (at most 50).
    """
    d = str(directory)
    if not shutil.which("git") or not os.path.isdir(d):
        return None
    # Two git processes side by side (this is part of every run's start-up):
    # top level, revision and branch in one, the working tree's state in the other.
    procs = _PENDING.pop(d, None) or (_start_git(_HEADS, d), _start_git(_STATUS, d))
    heads, status = _finish_git(procs[0]), _finish_git(procs[1])
    lines = heads.splitlines() if heads is not None else []
    if len(lines) == 3:
        root, rev, branch = lines
    else:  # not a repository, or one without commits (HEAD does not resolve)
        root = _git(["rev-parse", "--show-toplevel"], d)
        if root is None:
            return None
        rev = _git(["rev-parse", "HEAD"], d)
        branch = _git(["rev-parse", "--abbrev-ref", "HEAD"], d)
    changed = [ln for ln in (status or "").splitlines() if ln.strip()]
    return {
        "root": root.strip(),
        "revision": rev.strip() if rev else None,      # None in a repository without commits
        "branch": branch.strip() if branch else None,
        "dirty": bool(changed) if status is not None else None,
        "changed": changed[:50],
        "changed_count": len(changed),
    }


def resolve_executable(name: str, env: Mapping[str, str] | None = None,
                       cwd: str | None = None) -> str | None:
    """Absolute path ``name`` runs as: relative to ``cwd`` if it has a slash, else on PATH."""
    cwd = cwd or os.getcwd()
    if os.sep in name or (os.altsep and os.altsep in name):
        p = name if os.path.isabs(name) else os.path.join(cwd, name)
        return os.path.realpath(p) if os.path.isfile(p) and os.access(p, os.X_OK) else None
    path = (env or os.environ).get("PATH", os.defpath)
    # relative PATH entries are relative to the child's working directory
    parts = [e if os.path.isabs(e) else os.path.join(cwd, e or ".") for e in path.split(os.pathsep)]
    found = shutil.which(name, path=os.pathsep.join(parts))
    return os.path.realpath(found) if found else None


class _Hasher:
    def __init__(self):
        self.cache: dict[tuple, str | None] = {}

    def __call__(self, path: str) -> str | None:
        try:
            st = os.stat(path)
        except OSError:
            return None
        key = (path, st.st_mtime_ns, st.st_size, st.st_ino)
        if key not in self.cache:
            self.cache[key] = sha256_file(path)
        return self.cache[key]


def command_files(argv: tuple[str, ...] | None, shell_command: str | None,
                  env: Mapping[str, str] | None, cwd: str | None, hasher=None) -> dict:
    """Executable and file arguments of one rendered command, with hashes."""
    hasher = hasher or _Hasher()
    cwd = cwd or os.getcwd()
    note = ""
    if argv is None:
        try:
            words = shlex.split(shell_command or "")
        except ValueError:
            words = (shell_command or "").split()
        note = "shell command: the first word is taken as the executable"
        # skip leading VAR=value assignments
        while words and "=" in words[0] and not words[0].startswith(("/", ".")):
            words = words[1:]
        argv = tuple(words)
    if not argv:
        return {"executable": None, "executable_sha256": None, "files": [],
                "note": "empty command"}
    exe = resolve_executable(argv[0], env, cwd)
    files = []
    seen = {exe} if exe else set()
    for arg in argv[1:]:
        cand = arg.split("=", 1)[1] if arg.startswith("--") and "=" in arg else arg
        if not cand or cand.startswith("-") and cand == arg:
            continue
        p = cand if os.path.isabs(cand) else os.path.join(cwd, cand)
        if os.path.isfile(p):
            rp = os.path.realpath(p)
            if rp not in seen:
                seen.add(rp)
                files.append({"argument": arg, "path": rp, "sha256": hasher(rp)})
    out = {"command": list(argv) if shell_command is None else shell_command,
           "executable": exe, "executable_sha256": hasher(exe) if exe else None,
           "files": files}
    if exe is None:
        out["note"] = f"{argv[0]!r} was not found on PATH or relative to {cwd}"
    elif note:
        out["note"] = note
    return out


def collect_provenance(directory: str | os.PathLike,
                       cells: Iterable[tuple[Mapping[str, str], tuple[str, ...] | None,
                                             str | None, Mapping[str, str], str | None]]) -> dict:
    """``provenance.json`` content.

    ``cells`` yields ``(levels, argv, shell_command, env, cwd)`` per cell,
    rendered exactly as the runner will run them.
    """
    from benchharness.results.journal import utc_iso

    hasher = _Hasher()
    out_cells = []
    for levels, argv, shell_command, env, cwd in cells:
        entry = {"levels": dict(levels)}
        entry.update(command_files(argv, shell_command, env, cwd, hasher))
        out_cells.append(entry)
    return {"recorded_at": utc_iso(), "directory": str(Path(directory).resolve()),
            "git": git_state(directory), "cells": out_cells}
