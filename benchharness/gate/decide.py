"""The gate's verdict for one workload, from the blocks measured so far.

This module owns the decision rule; it is pure (numbers in, a `Judgement` out)
and knows nothing of processes or files.

Model: each block holds one baseline and one candidate run, back to back in
random order. Block effects are additive on the log scale, so the within-block
difference ``d = log(candidate) - log(baseline)`` (lower-is-better response; for
a higher-is-better metric such as throughput ``d = log(baseline) -
log(candidate)``) removes them, and ``exp(mean d)`` estimates the slowdown
ratio. One-sided repeated confidence bounds ``L <= log ratio <= U`` come from
`benchharness.gate.sequential` (Lan & DeMets 1983 alpha spending, O'Brien-
Fleming type), each at level ``alpha_w = (1 - confidence) / m`` for ``m``
workloads (Bonferroni; valid whatever each workload's stopping time, so "no
regression anywhere" needs no further adjustment).

At each look (no look before ``min_runs`` blocks):

* ``regression``    when ``L > log(1 + tolerance)``;
* ``no_regression`` when ``U < log(1 + tolerance)``; reported as
  ``improvement`` when also ``U < log(1 - tolerance)``;
* otherwise keep adding blocks; at the budget (``max_runs`` runs of each build)
  or once the planned information is spent the verdict is ``inconclusive``.

Failures: a candidate whose runs fail or time out where the baseline's do not
is a regression, whatever its timings. When the baseline never failed, one
failed candidate run decides it. When both builds fail sometimes, the blocks
where exactly one of them failed are compared with an exact one-sided sign test
(McNemar 1947, exact binomial form) at ``alpha_w / max_runs`` (Bonferroni over
every possible look). Blocks with a failed run carry no timing difference.
"""

from __future__ import annotations

import math
from functools import lru_cache
from dataclasses import asdict, dataclass, field
from typing import Sequence

from benchharness.gate.sequential import SequentialDesign, SpendingTracker

VERDICTS = ("regression", "no_regression", "improvement", "inconclusive")
OK = "ok"


@dataclass(frozen=True)
class GateSettings:
    """What the user asked of the gate (one set for all workloads)."""

    tolerance: float = 0.05
    confidence: float = 0.95
    max_runs: int = 100          # timed runs of each build, per workload
    min_runs: int = 6            # blocks before the first look
    higher_is_better: bool = False
    beta: float = 0.05           # design miss rate at the design distance
    horizon_factor: float = 0.8  # planned information / fixed-design information
    # noise estimate that sets the horizon: "ratchet" = the largest sd seen at any look
    # so far (the horizon never shrinks); also "current", "pilot", "upper:q" (upper
    # 1-q confidence bound of sigma at this look) or a number (known sigma)
    horizon_from: str = "ratchet"
    # share of the level the sequential bounds spend: the horizon follows the
    # noise estimate, which costs a little level; calibrated by simulation
    level_calibration: float = 0.7

    def __post_init__(self):
        if not 0 < self.tolerance < 1:
            raise ValueError("tolerance must be between 0 and 100%")
        if not 0.5 < self.confidence < 1:
            raise ValueError("confidence must be between 0.5 and 1")
        if self.min_runs < 2:
            raise ValueError("min_runs must be at least 2")
        if self.max_runs < self.min_runs:
            raise ValueError("max_runs must be at least min_runs")

    @property
    def threshold_log(self) -> float:
        """log(1 + tolerance): the slowdown that counts as a regression."""
        return math.log1p(self.tolerance)

    @property
    def improvement_log(self) -> float:
        return math.log1p(-self.tolerance)

    @property
    def design_delta(self) -> float:
        """Design distance on the log scale: from 1+tol to 1+2*tol (the nearer side)."""
        t = self.tolerance
        return min(math.log((1 + 2 * t) / (1 + t)), math.log1p(t))

    def design(self, workloads: int = 1) -> SequentialDesign:
        return SequentialDesign(
            alpha=self.level_calibration * (1.0 - self.confidence) / max(1, workloads),
            delta=self.design_delta,
            beta=self.beta, horizon_factor=self.horizon_factor,
            first=self.min_runs, max_blocks=self.max_runs,
        )


@dataclass(frozen=True)
class Block:
    """One block: the response of each build and each run's status."""

    baseline: float | None
    candidate: float | None
    baseline_status: str = OK
    candidate_status: str = OK


@dataclass(frozen=True)
class Judgement:
    """Where one workload stands. ``verdict`` None means: add another block."""

    verdict: str | None
    blocks: int                     # blocks run (= timed runs of each build)
    usable_blocks: int              # blocks with both runs ok
    ratio: float | None             # estimated slowdown ratio
    lower: float | None             # repeated one-sided lower bound of the ratio
    upper: float | None             # repeated one-sided upper bound of the ratio
    horizon_blocks: int             # planned blocks at the current noise estimate
    alpha: float                    # one-sided level used for this workload
    reason: str = ""
    baseline_failures: int = 0
    candidate_failures: int = 0
    sd_log: float | None = None     # sd of the within-block log differences
    extra: dict = field(default_factory=dict)

    @property
    def decided(self) -> bool:
        return self.verdict is not None

    def to_json_dict(self) -> dict:
        d = asdict(self)
        d.pop("extra", None)
        return d


def log_slowdown(block: Block, higher_is_better: bool = False) -> float | None:
    """Within-block log slowdown, or None when the block carries no timing difference."""
    if block.baseline_status != OK or block.candidate_status != OK:
        return None
    b, c = block.baseline, block.candidate
    if b is None or c is None or not (b > 0 and c > 0):
        return None
    if not (math.isfinite(b) and math.isfinite(c)):
        return None
    return math.log(b / c) if higher_is_better else math.log(c / b)


def _failure_verdict(blocks: Sequence[Block], alpha_w: float, max_runs: int) -> str | None:
    base_fail = sum(b.baseline_status != OK for b in blocks)
    cand_fail = sum(b.candidate_status != OK for b in blocks)
    if cand_fail == 0:
        return None
    if base_fail == 0:
        return (f"{cand_fail} candidate run(s) failed or timed out; the baseline's never did")
    only_c = sum(b.candidate_status != OK and b.baseline_status == OK for b in blocks)
    only_b = sum(b.baseline_status != OK and b.candidate_status == OK for b in blocks)
    disc = only_c + only_b
    if disc == 0 or only_c <= only_b:
        return None
    from scipy.stats import binom

    p = float(binom.sf(only_c - 1, disc, 0.5))
    if p <= alpha_w / max(1, max_runs):
        return (f"candidate failed alone in {only_c} blocks, baseline alone in {only_b} "
                f"(exact sign test p={p:.2g})")
    return None


def judge(blocks: Sequence[Block], settings: GateSettings, workloads: int = 1,
          tracker: SpendingTracker | None = None) -> Judgement:
    """Judge one workload after the given blocks (in the order they ran).

    ``tracker`` carries the level spent at earlier looks; the run loop keeps
    one per workload and calls this after every block. Without it the looks
    are replayed block by block, and the first decision is returned (what the
    gate would have said, stopping there).
    """
    if tracker is None:
        tracker = SpendingTracker(settings.design(workloads).alpha)
        j = None
        for i in range(1, len(blocks) + 1):
            j = _judge(blocks[:i], settings, workloads, tracker)
            if j.decided:
                return j
        return j if j is not None else _judge(blocks, settings, workloads, tracker)
    return _judge(blocks, settings, workloads, tracker)


def _judge(blocks, settings, workloads, tracker) -> Judgement:
    design = settings.design(workloads)
    alpha_w = design.alpha
    n_blocks = len(blocks)
    diffs = [d for d in (log_slowdown(b, settings.higher_is_better) for b in blocks) if d is not None]
    n = len(diffs)
    base_fail = sum(b.baseline_status != OK for b in blocks)
    cand_fail = sum(b.candidate_status != OK for b in blocks)
    at_budget = n_blocks >= settings.max_runs

    mean = sd = None
    if n >= 1:
        mean = sum(diffs) / n
    if n >= 2:
        sd = math.sqrt(sum((x - mean) ** 2 for x in diffs) / (n - 1))
        sd = max(sd, 1e-9)
    ratio = math.exp(mean) if mean is not None else None

    def make(verdict, reason, lo=None, hi=None, horizon=None):
        return Judgement(
            verdict=verdict, blocks=n_blocks, usable_blocks=n, ratio=ratio,
            lower=math.exp(lo) if lo is not None else None,
            upper=math.exp(hi) if hi is not None else None,
            horizon_blocks=horizon if horizon is not None else settings.max_runs,
            alpha=alpha_w, reason=reason, baseline_failures=base_fail,
            candidate_failures=cand_fail, sd_log=sd,
        )

    fail_reason = _failure_verdict(blocks, alpha_w, settings.max_runs)
    if fail_reason:
        return make("regression", fail_reason)

    if n < max(2, settings.min_runs) or sd is None:
        if at_budget:
            return make("inconclusive", f"only {n} blocks with both runs ok within the budget")
        return make(None, "waiting for the first look")

    # sd > 0 from here
    plan_sd = _plan_sd(diffs, settings)
    horizon = design.horizon(plan_sd)
    final = at_budget or n >= horizon
    ct = tracker.boundary(n, horizon, final)
    if not math.isfinite(ct):
        if final:
            return make("inconclusive", "budget spent before a look could decide", horizon=horizon)
        return make(None, "no level to spend at this look yet", horizon=horizon)
    half = ct * sd / math.sqrt(n)
    lo, hi = mean - half, mean + half
    thr = settings.threshold_log
    if lo > thr:
        return make("regression", f"slower than {1 + settings.tolerance:.3g}x with "
                    f"{settings.confidence:.3g} confidence", lo, hi, horizon)
    if hi < thr:
        if hi < settings.improvement_log:
            return make("improvement", f"faster than {1 - settings.tolerance:.3g}x", lo, hi, horizon)
        return make("no_regression", f"not slower than {1 + settings.tolerance:.3g}x", lo, hi, horizon)
    if final:
        why = ("budget spent" if at_budget else "planned information spent")
        return make("inconclusive", f"{why}; the ratio is too close to the tolerance to tell",
                    lo, hi, horizon)
    return make(None, "undecided", lo, hi, horizon)


@lru_cache(maxsize=4096)
def _chi2_ppf(q: float, df: int) -> float:
    from scipy.stats import chi2

    return float(chi2.ppf(q, df))


def _running_sd(diffs):
    """Standard deviation of diffs[:j] for j = 1..len(diffs) (nan for j = 1)."""
    out, s1, s2 = [], 0.0, 0.0
    for j, x in enumerate(diffs, start=1):
        s1 += x
        s2 += x * x
        out.append(math.sqrt(max(s2 - s1 * s1 / j, 0.0) / (j - 1)) if j > 1 else float("nan"))
    return out


def _plan_sd(diffs, settings: GateSettings) -> float:
    """Noise estimate that sets the planned horizon (see `GateSettings.horizon_from`)."""
    mode = settings.horizon_from
    n = len(diffs)
    first = max(2, settings.min_runs)
    q = None
    if "upper:" in mode:
        q = float(mode.split("upper:")[1])
    def adj(sd, j):
        if q is None:
            return sd
        return sd * math.sqrt((j - 1) / _chi2_ppf(q, j - 1))
    run = _running_sd(diffs)
    if mode.startswith("ratchet"):
        return max(1e-9, max(adj(run[j - 1], j) for j in range(first, n + 1)))
    if mode == "pilot":
        return max(1e-9, run[first - 1])
    if mode == "current" or mode.startswith("upper:"):
        return max(1e-9, adj(run[n - 1], n))
    return float(mode)
