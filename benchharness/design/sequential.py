"""Running replicate by replicate: the runner's check at each replicate boundary.

Adaptive replication (`benchharness.design.adaptive`) and time budgets
(`benchharness.design.budget`) both decide, between two complete replicates,
whether to start the next one. For that the plan runs each replicate as a
complete block (``order: blocked``; the runner switches a randomized order to
it and says so) and holds up to ``max`` replicates; the runner calls
`ReplicateGate.before_run` before every run, which answers None (go on) or the
reason to stop. Stopping happens only at a boundary, so the results hold
complete replicates only.

Every decision is recorded in ``stopping.json`` in the results folder (the
rule, the budget, each boundary's decision with its intervals); the final
stop goes into ``session.json`` under ``stopped`` so a resume does not run past it.
"""

from __future__ import annotations

from benchharness.numbers import plural

import json
import time
from pathlib import Path
from typing import Callable, Mapping, Sequence

from benchharness.design.adaptive import AdaptiveRule, decide
from benchharness.design.budget import next_replicate_fits
from benchharness.numbers import fmt_duration

STOPPING_FILE = "stopping.json"


def _now() -> float:
    """The gate's clock (module-level so tests can replace it)."""
    return time.monotonic()


def journal_frame(records: Sequence[Mapping], factors: Sequence[str], response: str = "wall_s"):
    """A small runs table from journal records (levels and metrics un-nested)."""
    import pandas as pd

    rows = []
    for r in records:
        row = {"replicate": r.get("replicate"), "status": r.get("status")}
        lv = r.get("levels") or {}
        for f in factors:
            row[f] = str(lv.get(f, r.get(f, "")))
        value = r.get(response)
        if value is None:
            value = (r.get("metrics") or {}).get(response)
        row[response] = value
        rows.append(row)
    return pd.DataFrame(rows, columns=["replicate", "status", *factors, response])


class ReplicateGate:
    """Decides at each replicate boundary whether the next replicate runs."""

    def __init__(self, folder: Path, factor_levels: Mapping[str, Sequence[str]],
                 cells: Sequence[Mapping[str, str]], rule: AdaptiveRule | None = None,
                 budget_s: float | None = None, estimate_s: float | None = None,
                 clock: Callable[[], float] | None = None,
                 read_records: Callable[[], list] | None = None):
        self.folder = Path(folder)
        self.factor_levels = {k: list(v) for k, v in factor_levels.items()}
        self.cells = [dict(c) for c in cells]
        self.rule = rule
        self.budget_s = budget_s
        self.estimate_s = estimate_s
        self.clock = clock or (lambda: _now())
        self.start = self.clock()
        self.current: int | None = None
        self.rep_started = self.start
        self.durations: list[float] = []
        self.decisions: list[dict] = []
        self.stopped: dict | None = None
        self._read = read_records or self._read_journal
        # A resumed folder: keep the decisions of the earlier sessions.
        self.earlier: list[dict] = []
        prev = self.folder / STOPPING_FILE
        if prev.exists():
            try:
                old = json.loads(prev.read_text(encoding="utf-8"))
                self.earlier = list(old.pop("earlier_sessions", None) or []) + [old]
            except (OSError, ValueError, AttributeError):
                pass

    def _read_journal(self) -> list:
        from benchharness.results import journal as J

        return J.read_journal(self.folder / "runs.jsonl")

    def _check(self, completed: int, final: bool = False) -> str | None:
        now = self.clock()
        entry: dict = {"after_replicate": completed, "elapsed_s": now - self.start}
        reason = None
        if self.rule is not None:
            runs = journal_frame(self._read(), list(self.factor_levels), self.rule.response)
            d = decide(runs, self.factor_levels, self.rule, self.cells)
            entry["adaptive"] = d.to_json_dict()
            if d.stop:
                reason = d.reason
        if reason is None and self.budget_s is not None and not final:
            ok, why = next_replicate_fits(self.budget_s, now - self.start, self.durations,
                                          self.estimate_s)
            entry["budget"] = {"fits": ok, "reason": why}
            if not ok:
                reason = (f"{why}; stopped after {plural(completed, 'complete replicate')} in "
                          f"{fmt_duration(now - self.start)}")
        entry["stop"] = reason is not None
        entry["reason"] = reason
        self.decisions.append(entry)
        if reason is not None and not final:
            self.stopped = {"reason": reason, "replicates": completed}
        self._write()
        return reason

    def before_run(self, pr: Mapping) -> str | None:
        """None to go on with ``pr``, or the reason to stop before it."""
        if pr.get("warmup"):
            return None
        r = int(pr["replicate"])
        if self.current is None:
            self.current = r
            self.rep_started = self.clock()
            if self.budget_s is not None and self.estimate_s is not None:
                ok, why = next_replicate_fits(self.budget_s, self.clock() - self.start, [],
                                              self.estimate_s)
                if not ok:
                    self.stopped = {"reason": why, "replicates": r - 1}
                    self.decisions.append({"after_replicate": r - 1, "stop": True,
                                           "reason": why})
                    self._write()
                    return why
            return None
        if r == self.current:
            return None
        now = self.clock()
        self.durations.append(now - self.rep_started)
        reason = self._check(self.current)
        if reason is not None:
            return reason
        self.current = r
        self.rep_started = now
        return None

    def finish(self) -> str | None:
        """After the last planned run: record (and return) the final state of the rule."""
        if self.stopped is None and self.current is not None:
            self.durations.append(self.clock() - self.rep_started)
            return self._check(self.current, final=True)
        return None

    def to_json_dict(self) -> dict:
        out = {"rule": self.rule.to_json_dict() if self.rule else None,
               "budget_s": self.budget_s, "replicate_durations_s": self.durations,
               "decisions": self.decisions, "stopped": self.stopped}
        if self.earlier:
            out["earlier_sessions"] = self.earlier
        return out

    def _write(self) -> None:
        from benchharness.results import journal as J

        try:
            J.write_atomic(self.folder / STOPPING_FILE,
                           json.dumps(self.to_json_dict(), indent=1, default=str))
        except OSError:  # pragma: no cover - the folder vanished; the journal is what counts
            pass


def gate_for(exp, plan, folder: Path, budget_s: float | None = None,
             estimate_s: float | None = None) -> ReplicateGate | None:
    """The gate for an experiment (adaptive rule and/or budget), or None if neither applies."""
    from benchharness.design.adaptive import adaptive_rule

    rule = adaptive_rule(exp)
    if rule is None and budget_s is None:
        return None
    cells = []
    seen = set()
    for r in plan.runs:
        key = tuple(r.levels[f] for f in exp.factor_names)
        if key not in seen:
            seen.add(key)
            cells.append(dict(r.levels))
    levels = {f.name: list(f.labels) for f in exp.factors}
    return ReplicateGate(folder, levels, cells, rule, budget_s, estimate_s)
