"""Stopping a run early when its command fails the same way in every cell.

Owns the rule that ends `benchharness run` after the first runs when nothing
can work: a command that cannot start (a missing script or program, a wrong
path) fails identically in every cell, and running the rest of the plan only
repeats the same failure tens of times. The rule is deliberately narrow, so a
real experiment in which some settings fail is never cut short:

* only the runs made in this session count (a resumed folder starts afresh);
* every cell still to run must have been tried at least once;
* every run so far (warm-up or timed) failed or timed out, none ended ok;
* all of them failed *the same way*: the same status and the same exit code
  (for a program that could not be started, the same reason).

Once any run ends ok the rule is switched off for the rest of the session.
With a warm-up run per cell (the usual plan) the stop comes after one run per
cell. What was recorded stays recorded: the folder is left as after Ctrl-C,
consistent and resumable once the cause is fixed.

It also explains the commonest cause, a relative path that does not exist
from the directory the runs start in (`path_hint`).
"""

from __future__ import annotations

import os
from collections import Counter
from typing import Iterable, Mapping

_WARMUP_PREFIXES = ("warm-up run failed: ", "warm-up run timeout: ", "warm-up run not done: ")


def failure_of(rec: Mapping) -> tuple[str, object, str] | None:
    """``(status, exit code, message)`` of a recorded run that did not succeed, else None.

    Warm-up runs are recorded with status ``warmup``; their message says whether
    they failed (``warm-up run failed: ...``), timed out, or were not done (a
    failed build).
    """
    status = rec.get("status")
    message = str(rec.get("message") or "")
    if status in ("failed", "timeout"):
        return status, rec.get("exit_code"), message
    if status == "warmup":
        for prefix in _WARMUP_PREFIXES:
            if message.startswith(prefix):
                kind = "timeout" if "timeout" in prefix else "failed"
                return kind, rec.get("exit_code"), message[len(prefix):]
    return None


class FirstRunsWatch:
    """Watches the runs of one session; `observe` says when to stop (see the module)."""

    def __init__(self, cells: Iterable[Mapping[str, str]]):
        # the cells' keys are made at the first failure, not before the first run
        # (100,000 cells cost 0.25 s of CPU): a session whose first run ends ok never
        # needs them
        self._cells_of = cells
        self._cells: set | None = None
        self.seen: set = set()
        self.kinds: Counter = Counter()
        self.messages: Counter = Counter()
        self.runs = 0
        self.active = True
        self.reason: str | None = None

    @property
    def cells(self) -> set:
        """The cells still to run when the watch began, as sorted ``(factor, level)`` tuples."""
        if self._cells is None:
            from benchharness.execute.engine import distinct_levels

            self._cells = {tuple(sorted(c.items())) for c in distinct_levels(self._cells_of)}
            self._cells_of = ()
        return self._cells

    def observe(self, rec: Mapping) -> str | None:
        """Take one recorded run; returns the reason to stop, once, or None."""
        if not self.active:
            return None
        fail = failure_of(rec)
        if fail is None:
            self.active = False      # something works: never stop this session early
            return None
        if not self.cells:
            self.active = False      # nothing was left to run
            return None
        status, code, message = fail
        self.runs += 1
        self.kinds[(status, code if status == "failed" else None)] += 1
        self.messages[message] += 1
        if len(self.kinds) > 1:
            self.active = False      # failures differ: not one cause; run the plan
            return None
        self.seen.add(tuple(sorted(dict(rec.get("levels") or {}).items())))
        if not self.cells <= self.seen:
            return None
        self.active = False
        message = self.messages.most_common(1)[0][0] or (
            "timed out" if status == "timeout" else f"exit code {code}")
        n = len(self.cells)
        which = "the one cell" if n == 1 else "both cells" if n == 2 else f"all {n:,} cells"
        self.reason = (f"the first runs of {which} failed the same way "
                       f"({self.runs} run{'s' if self.runs != 1 else ''}, none ok): "
                       f"{message[:300]}")
        return self.reason


def _relative_paths(argv: Iterable[str]) -> list[str]:
    return [a for a in argv if a and not os.path.isabs(a) and not a.startswith("-")
            and ("/" in a or a.endswith((".py", ".sh"))) and "=" not in a]


def path_hint(argv: Iterable[str], run_dir: str, exp_dir: str) -> str | None:
    """A sentence when a relative path in the command is missing from ``run_dir``.

    Relative paths in a command are opened by the program from the directory the
    run starts in; a demanding reader wants to know which path was looked for
    where, and whether it exists next to the experiment file instead.
    """
    for a in _relative_paths(argv):
        if os.path.exists(os.path.join(run_dir, a)):
            continue
        where = []
        for base in (exp_dir, os.path.dirname(exp_dir)):
            if base and os.path.exists(os.path.join(base, a)):
                where.append(base)
        also = (f"; it exists from {where[0]}: start benchharness there, or set "
                f"`workdir: {os.path.relpath(where[0], exp_dir)}` in the experiment file "
                "(relative to the file's folder)" if where else "")
        return (f"`{a}` does not exist from {run_dir}, the directory the runs start in "
                f"(the directory benchharness was started in, unless the experiment sets "
                f"`workdir:`){also}")
    return None
