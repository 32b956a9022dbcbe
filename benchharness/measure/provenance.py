"""Provenance of a results folder: which code and which executables ran.

A timing is only meaningful together with what produced it.  This module
records, as plain dicts for ``provenance.json``:

* the git revision, branch and dirty state (with the changed paths) of the
  experiment's directory when it lies in a git repository;
* for each program the cells run, the executable the command resolves to — ``shutil.which``
  on ``argv[0]`` with the run's ``PATH`` and working directory, the same
  lookup ``execve`` by name performs — and its SHA-256; plus the SHA-256 of
  every other argument that names an existing file (the script an interpreter
  runs, an input file), because ``python3 bench.py`` changes when ``bench.py``
  does.

Hashes are computed once per distinct path and file state, and what is common
to many cells is stored once: ``provenance.json`` (layout 2) lists one entry per
distinct program, keyed by the levels of the factors that decide it (often
none: one entry for a plan of any size). `read_provenance` also reads layout 1,
written before, with one entry per cell.
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


def command_words(argv: tuple[str, ...] | None, shell_command: str | None):
    """The words of a rendered command and a note: ``argv`` as given, or a shell
    command's words with leading ``VAR=value`` assignments skipped (its first
    word is then taken as the executable)."""
    if argv is not None:
        return argv, ""
    try:
        words = shlex.split(shell_command or "")
    except ValueError:
        words = (shell_command or "").split()
    while words and "=" in words[0] and not words[0].startswith(("/", ".")):
        words = words[1:]
    return tuple(words), "shell command: the first word is taken as the executable"


def command_files(argv: tuple[str, ...] | None, shell_command: str | None,
                  env: Mapping[str, str] | None, cwd: str | None, hasher=None) -> dict:
    """Executable and file arguments of one rendered command, with hashes."""
    hasher = hasher or _Hasher()
    cwd = cwd or os.getcwd()
    argv, note = command_words(argv, shell_command)
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


#: Layout of provenance.json written by `collect_provenance` (1: one entry per cell).
LAYOUT = 2


class _Programs:
    """What each cell runs, found once per distinct executable lookup and file argument.

    Two cells whose rendered commands name the same executable (looked up with the
    same PATH from the same directory) and the same existing files run the same
    program; its hashes are computed once (`_Hasher`), and every lookup is memoised,
    so a plan of 100,000 cells costs dictionary look-ups per cell, not file-system
    calls.
    """

    def __init__(self):
        self.hasher = _Hasher()
        self.exe: dict = {}        # (name, PATH, cwd) -> resolved path or None
        self.arg: dict = {}        # (argument, cwd) -> real path of an existing file, or None
        self.hash: dict = {}       # path -> sha256 (file states do not change within a call)

    def _sha(self, path: str) -> str | None:
        if path not in self.hash:
            self.hash[path] = self.hasher(path)
        return self.hash[path]

    def _file(self, arg: str, cwd: str) -> str | None:
        key = (arg, cwd)
        if key not in self.arg:
            cand = arg.split("=", 1)[1] if arg.startswith("--") and "=" in arg else arg
            rp = None
            if cand and not (cand.startswith("-") and cand == arg):
                p = cand if os.path.isabs(cand) else os.path.join(cwd, cand)
                if os.path.isfile(p):
                    rp = os.path.realpath(p)
            self.arg[key] = rp
        return self.arg[key]

    def key(self, argv, shell_command, env, cwd) -> tuple:
        """A hashable description of the program a rendered command runs."""
        cwd = cwd or os.getcwd()
        argv, note = command_words(argv, shell_command)
        if not argv:
            return (None, (), "empty command")
        path = (env or os.environ).get("PATH", os.defpath)
        k = (argv[0], path, cwd)
        if k not in self.exe:
            self.exe[k] = resolve_executable(argv[0], env, cwd)
        exe = self.exe[k]
        files, seen = [], {exe} if exe else set()
        for arg in argv[1:]:
            rp = self._file(arg, cwd)
            if rp is not None and rp not in seen:
                seen.add(rp)
                files.append((arg, rp))
        if exe is None:
            note = f"{argv[0]!r} was not found on PATH or relative to {cwd}"
        return (exe, tuple(files), note)

    def entry(self, key: tuple) -> dict:
        exe, files, note = key
        out = {"executable": exe, "executable_sha256": self._sha(exe) if exe else None,
               "files": [{"argument": a, "path": p, "sha256": self._sha(p)} for a, p in files]}
        if note:
            out["note"] = note
        return out


def _deciding_factors(names: list[str], keys: list[tuple], ids: list[int]) -> list[str]:
    """Fewest factors (dropped greedily, last first) whose levels still decide the program."""
    if len(set(ids)) <= 1:
        return []
    keep = list(range(len(names)))
    for j in reversed(range(len(names))):
        trial = [i for i in keep if i != j]
        seen: dict = {}
        ok = True
        for k, pid in zip(keys, ids):
            proj = tuple(k[i] for i in trial)
            if seen.setdefault(proj, pid) != pid:
                ok = False
                break
        if ok:
            keep = trial
    return [names[i] for i in keep]


def collect_provenance(directory: str | os.PathLike,
                       cells: Iterable[tuple[Mapping[str, str], tuple[str, ...] | None,
                                             str | None, Mapping[str, str], str | None]]) -> dict:
    """``provenance.json`` content (layout 2: what is common is stored once).

    ``cells`` yields ``(levels, argv, shell_command, env, cwd)`` per cell,
    rendered exactly as the runner will run them. The result names the factors
    whose levels decide which program and files a cell runs
    (``programs_vary_with``; empty when every cell runs the same) and lists each
    distinct program once (``programs``): the combinations of those factors'
    levels whose cells run it (``when``), executable and its SHA-256, file
    arguments and theirs, and the command of its first cell (``example``). Its size
    grows with the number of distinct programs, not of cells. `read_provenance` reads this layout and layout 1 (one entry per cell).
    """
    from benchharness.results.journal import utc_iso

    progs = _Programs()
    names: list[str] | None = None
    pkeys: dict[tuple, int] = {}
    level_keys: list[tuple] = []
    ids: list[int] = []
    first: dict[int, tuple] = {}
    for levels, argv, shell_command, env, cwd in cells:
        if names is None:
            names = list(levels)
        pk = progs.key(argv, shell_command, env, cwd)
        pid = pkeys.setdefault(pk, len(pkeys))
        lk = tuple(levels[n] for n in names)
        if pid not in first:
            first[pid] = (lk, list(argv) if shell_command is None and argv is not None
                          else shell_command)
        level_keys.append(lk)
        ids.append(pid)
    names = names or []
    vary = _deciding_factors(names, level_keys, ids)
    by_id = list(pkeys)    # program keys in the order of their ids
    programs = []
    for pid, (ex_levels, ex_command) in sorted(first.items()):
        e = {"when": [], "cells": 0}
        e.update(progs.entry(by_id[pid]))
        e["example"] = {"levels": dict(zip(names, ex_levels)), "command": ex_command}
        programs.append(e)
    _fill_when(programs, names, vary, level_keys, ids)
    return {"layout": LAYOUT, "recorded_at": utc_iso(),
            "directory": str(Path(directory).resolve()), "git": git_state(directory),
            "factors": names, "cell_count": len(ids), "programs_vary_with": vary,
            "programs": programs}


def _fill_when(programs: list, names, vary, level_keys, ids) -> None:
    """Each program's ``cells`` count and ``when``: the combinations of the deciding
    factors' levels whose cells run it (``[{}]`` when no factor decides)."""
    idx = [names.index(n) for n in vary]
    seen: set = set()
    for lk, pid in zip(level_keys, ids):
        programs[pid]["cells"] += 1
        proj = tuple(lk[i] for i in idx)
        if proj not in seen:
            seen.add(proj)
            programs[pid]["when"].append(dict(zip(vary, proj)))


def read_provenance(source) -> dict:
    """A ``provenance.json`` (path, or its parsed content) in layout 2, whatever its layout.

    Layout 1 (folders written before layout 2: ``cells``, one full entry per
    cell) is converted: entries that agree are merged and the deciding factors
    found as `collect_provenance` finds them.
    """
    import json

    prov = source if isinstance(source, Mapping) else json.loads(Path(source).read_text())
    if prov.get("layout", 1) >= 2:
        return dict(prov)
    old = [c for c in prov.get("cells") or [] if isinstance(c, Mapping)]
    names = list(old[0].get("levels") or {}) if old else []
    keys: dict = {}
    level_keys, ids, entries = [], [], {}
    for c in old:
        content = {k: c.get(k) for k in ("executable", "executable_sha256", "files", "note")
                   if k in c}
        pid = keys.setdefault(json.dumps(content, sort_keys=True), len(keys))
        entries.setdefault(pid, (content, c))
        level_keys.append(tuple((c.get("levels") or {}).get(n) for n in names))
        ids.append(pid)
    vary = _deciding_factors(names, level_keys, ids)
    programs = []
    for pid in range(len(keys)):
        content, c = entries[pid]
        programs.append({"when": [], "cells": 0, **content,
                         "example": {"levels": dict(c.get("levels") or {}),
                                     "command": c.get("command")}})
    _fill_when(programs, names, vary, level_keys, ids)
    out = {k: v for k, v in prov.items() if k != "cells"}
    out.update({"layout": 2, "converted_from_layout": 1, "factors": names,
                "cell_count": len(old), "programs_vary_with": vary, "programs": programs})
    return out


def program_of(prov: Mapping, levels: Mapping[str, str]) -> dict | None:
    """The program entry of the cell with ``levels`` (either layout), or None."""
    prov = read_provenance(prov)
    want = {f: str(levels.get(f)) for f in prov.get("programs_vary_with") or []}
    for e in prov.get("programs") or []:
        if any({k: str(v) for k, v in w.items()} == want for w in e.get("when") or []):
            return e
    return None


def file_hashes(prov: Mapping) -> dict[str, str | None]:
    """Every executable and file argument recorded (either layout), path → SHA-256."""
    out: dict = {}
    for e in read_provenance(prov).get("programs") or []:
        if e.get("executable"):
            out[e["executable"]] = e.get("executable_sha256")
        for f in e.get("files") or []:
            out[f["path"]] = f.get("sha256")
    return out


#: Most renderings of one templated argument examined to show that no level makes it a file.
ONE_PROGRAM_MAX_RENDERINGS = 4096


def plan_provenance(directory: str | os.PathLike, exp, cell_levels, command_of) -> dict:
    """``provenance.json`` content for the cells of a plan, rendering as few as it can.

    ``cell_levels``: the levels of every cell; ``command_of(levels)`` gives
    ``(argv, shell_command, env, cwd)`` rendered as the runner will run them.
    When the experiment's templates leave no room for a level to change the
    program (`_one_program`), one cell is rendered and stands for all: a plan of
    100,000 cells costs what a plan of one does. Otherwise every cell is rendered
    (`collect_provenance`).
    """
    cell_levels = list(cell_levels)
    if not cell_levels:
        return collect_provenance(directory, [])
    first = command_of(cell_levels[0])
    if _one_program(exp, first):
        prov = collect_provenance(directory, [(cell_levels[0], *first)])
        prov["cell_count"] = len(cell_levels)
        prov["programs"][0]["cells"] = len(cell_levels)
        return prov
    return collect_provenance(directory, ((lv, *(first if i == 0 else command_of(lv)))
                                          for i, lv in enumerate(cell_levels)))


def _one_program(exp, first) -> bool:
    """Whether every cell of ``exp`` runs the program its first cell runs.

    True when the command is a list (no shell), its first word, the working
    directory and ``PATH`` hold no placeholder, and no templated argument names
    an existing file for any combination of the levels it uses (each distinct
    rendering checked once, at most `ONE_PROGRAM_MAX_RENDERINGS` per argument).
    """
    if not _fixed_program_word(exp, first):
        return False
    cwd = first[3]
    factors = {f.name: f for f in exp.factors}
    progs = _Programs()
    return all(_never_a_file(part, factors, progs, cwd) for part in exp.command.parts[1:])


def _fixed_program_word(exp, first) -> bool:
    """Whether the command is a list run without a shell whose first word, working directory
    and ``PATH`` hold no placeholder (so only a templated argument could name another file)."""
    from benchharness.experiment.templating import placeholders

    argv, shell_command, _env, _cwd = first
    parts = getattr(exp.command, "parts", ())
    if shell_command is not None or argv is None or getattr(exp.command, "shell", True):
        return False
    if len(parts) != len(argv) or not parts or placeholders(parts[0]):
        return False
    if exp.workdir is not None and placeholders(exp.workdir):
        return False
    if placeholders(str((exp.env or {}).get("PATH", ""))):
        return False
    return True


def _never_a_file(part: str, factors: dict, progs, cwd: str | None) -> bool:
    """Whether no rendering of the argument template ``part`` names an existing file: each
    combination of the levels it uses is rendered once, at most
    `ONE_PROGRAM_MAX_RENDERINGS` of them (more, or a rendering that fails, counts as no)."""
    import itertools

    from benchharness.experiment.templating import placeholders, render

    used = list(dict.fromkeys(p.factor for p in placeholders(part)))
    if not used:
        return True
    if any(u not in factors for u in used):
        return False
    total = 1
    for u in used:
        total *= len(factors[u].levels)
    if total > ONE_PROGRAM_MAX_RENDERINGS:
        return False
    for combo in itertools.product(*(factors[u].levels for u in used)):
        chosen = dict(zip(used, combo))

        def lookup(factor, name, chosen=chosen):
            lv = chosen[factor]
            return lv.label if name is None else lv.values[name]

        try:
            text = render(part, lookup)
        except (KeyError, TypeError):
            return False
        if progs._file(text, cwd or os.getcwd()) is not None:
            return False
    return True
