"""Time budgets: how long a plan will take, and whether the next replicate still fits.

`pilot_timing` learns from an earlier results folder (a *pilot*) how long each
cell's runs take and how much the harness adds per run (build, reset and
teardown steps, process start, journal writes): the overhead is the median gap
between one run's end (start + wall time) and the next run's start, from the
recorded ``started_at`` times. `estimate_plan` adds up a plan with those
figures (cells the pilot did not run get the pilot's overall mean).

`next_replicate_fits` is the stopping rule of ``run --budget``: before a
replicate (a complete block of every cell) starts, it must fit in the time left
by the estimate of one replicate — the mean duration of the replicates already
run, or the pilot estimate before the first one. The run therefore ends at the
end of the last complete replicate that fits, and never leaves a replicate
half-run. (A plain "plan the work to fit the time" rule; common practice.)
"""

from __future__ import annotations

from benchharness.numbers import fmt_duration, plural

import math
from dataclasses import dataclass, field
from typing import Mapping, Sequence


@dataclass(frozen=True)
class PilotTiming:
    cell_mean_s: Mapping[tuple, float]        # factor labels (listed order) -> mean wall_s
    mean_s: float                             # over all timed runs
    overhead_s: float                         # per run, between runs
    runs: int
    factors: tuple[str, ...]

    def run_s(self, levels: Mapping[str, str]) -> float:
        key = tuple(str(levels.get(f, "")) for f in self.factors)
        return self.cell_mean_s.get(key, self.mean_s) + self.overhead_s


def _parse_time(text: str):
    from datetime import datetime

    try:
        return datetime.fromisoformat(str(text).replace("Z", "+00:00")).timestamp()
    except ValueError:
        return None


def pilot_timing(runs, factors: Sequence[str], response: str = "wall_s") -> PilotTiming:
    """Per-cell mean run time and per-run overhead from a pilot runs table."""
    from benchharness.errors import UsageError

    df = runs
    if response not in df.columns:
        raise UsageError(f"the pilot has no column {response!r}")
    timed = df[df["status"] == "ok"] if "status" in df.columns else df
    timed = timed[timed[response].astype(float) > 0]
    if len(timed) == 0:
        raise UsageError("the pilot has no successful runs to time")
    factors = tuple(f for f in factors if f in timed.columns)
    cell_mean: dict[tuple, float] = {}
    if factors:
        for key, g in timed.groupby(list(factors), sort=False, observed=True):
            key = key if isinstance(key, tuple) else (key,)
            cell_mean[tuple(str(k) for k in key)] = float(g[response].astype(float).mean())
    mean_s = float(timed[response].astype(float).mean())
    overhead = 0.0
    if "started_at" in df.columns and len(df) > 1:
        rows = []
        for start, wall in zip(df["started_at"], df[response]):
            t = _parse_time(start)
            try:
                w = float(wall)
            except (TypeError, ValueError):
                w = float("nan")
            if t is not None and not math.isnan(w):
                rows.append((t, w))
        rows.sort()
        gaps = [b[0] - (a[0] + a[1]) for a, b in zip(rows, rows[1:])]
        gaps = [g for g in gaps if g >= -0.001]
        if gaps:
            gaps.sort()
            overhead = max(0.0, gaps[len(gaps) // 2])
    return PilotTiming(cell_mean, mean_s, overhead, len(timed), factors)


@dataclass(frozen=True)
class PlanEstimate:
    total_s: float
    timed_s: float
    warmup_s: float
    per_replicate_s: Mapping[int, float]
    overhead_per_run_s: float
    cells_without_pilot: int
    notes: tuple[str, ...] = field(default_factory=tuple)

    def to_json_dict(self) -> dict:
        return {"expected_total_s": self.total_s, "expected_timed_s": self.timed_s,
                "expected_warmup_s": self.warmup_s,
                "expected_per_replicate_s": {str(k): v for k, v in self.per_replicate_s.items()},
                "overhead_per_run_s": self.overhead_per_run_s,
                "cells_without_pilot": self.cells_without_pilot, "notes": list(self.notes)}


def estimate_plan(plan, timing: PilotTiming) -> PlanEstimate:
    """Expected duration of every run of ``plan`` (a `Plan`) from a pilot."""
    timed = warm = 0.0
    per_rep: dict[int, float] = {}
    missing = set()
    for r in plan.runs:
        key = tuple(str(r.levels.get(f, "")) for f in timing.factors)
        if key not in timing.cell_mean_s:
            missing.add(tuple(sorted((str(k), str(v)) for k, v in r.levels.items())))
        s = timing.run_s(r.levels)
        if r.warmup:
            warm += s
        else:
            timed += s
            per_rep[r.replicate] = per_rep.get(r.replicate, 0.0) + s
    notes = []
    if not timing.factors:
        notes.append("the pilot has none of this experiment's factors; every run is estimated "
                     f"at the pilot's mean of {timing.mean_s:.3g} s")
    elif missing:
        notes.append(f"{plural(len(missing), 'cell')} "
                     f"{'was' if len(missing) == 1 else 'were'} not in the pilot; their runs "
                     "are estimated "
                     f"at the pilot's mean of {timing.mean_s:.3g} s")
    per_rep = dict(sorted(per_rep.items()))
    return PlanEstimate(timed + warm, timed, warm, per_rep, timing.overhead_s, len(missing),
                        tuple(notes))


def next_replicate_fits(budget_s: float, elapsed_s: float,
                        replicate_durations_s: Sequence[float],
                        estimate_s: float | None = None) -> tuple[bool, str]:
    """May the next complete replicate start? (see the module docstring)."""
    if replicate_durations_s:
        need = sum(replicate_durations_s) / len(replicate_durations_s)
        basis = f"mean of {plural(len(replicate_durations_s), 'replicate')} so far"
    elif estimate_s is not None:
        need = estimate_s
        basis = "pilot estimate"
    else:
        return True, "no duration known yet; the first replicate always runs"
    left = budget_s - elapsed_s
    if need <= left:
        return True, (f"next replicate needs about {fmt_duration(need)} ({basis}); "
                      f"{fmt_duration(left)} left")
    return False, (f"stopping: the next replicate needs about {fmt_duration(need)} ({basis}) "
                   f"but only {fmt_duration(max(left, 0))} of the budget is left")


def replicates_in_budget(budget_s: float, per_replicate_s: float, warmup_s: float = 0.0) -> int:
    """How many complete replicates fit a budget (for `plan --pilot --budget`)."""
    if per_replicate_s <= 0:
        return 0
    return max(0, int((budget_s - warmup_s) // per_replicate_s))
