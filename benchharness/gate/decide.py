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

The estimate resists a few slow runs: the location of the ``d`` values is the
MM-type estimate of `benchharness.gate.robust` (Huber 1964 proposal 2 for the
scale, Tukey biweight for the location) with its sandwich standard error, and
the sequential boundaries are those of that studentized statistic, simulated on
the same null paths (``estimator="mean"`` gives the plain mean and t statistic).

At each look (no look before ``min_runs`` blocks):

* ``regression``    when ``L > log(1 + tolerance)``;
* ``no_regression`` when ``U < log(1 + tolerance)``; reported as
  ``improvement`` when also ``U < log(1 - tolerance)``;
* otherwise keep adding blocks; at the budget (``max_runs`` runs of each build)
  or once the planned information is spent the verdict is ``inconclusive``.

Failures: the failure *rates* of the two builds are compared by an exact
sequential sign test on the blocks where exactly one run failed
(`benchharness.gate.failures`), at the workload's level ``(1 - confidence) /
m`` with Lan & DeMets spending: a candidate that fails more often is a
regression whatever its timings, one failure alone never is. A pass by the
timings waits while the candidate's excess failures are suggestive (one-sided
exact p below ``failure_hold``), so a candidate that fails often is not passed
merely because its timings settled first. Blocks with a
failed run carry no timing difference. A build that never ran successfully is
caught by the run loop (`benchharness.gate.orchestrate`), verdict
``never_ok``.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field
from typing import Sequence

from benchharness.gate.failures import failure_verdict, failures_lean_against, rates_words
from benchharness.gate.robust import robust_summary
from benchharness.gate.sequential import SequentialDesign, SpendingTracker
from benchharness.numbers import fmt_change, fmt_ratio, plural

# the distance to the tolerance counts in the planning noise up to this many standard
# errors (`_planning_noise`)
PLAN_DISTANCE_SE = 4.0

VERDICTS = ("regression", "no_regression", "improvement", "inconclusive", "never_ok")
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
    horizon_factor: float = 0.7  # planned information / fixed-design information
    # noise estimate that sets the horizon: "ratchet" = an internal pilot of
    # `ratchet_from` blocks (Wittes & Brittain 1990): the horizon is never planned
    # below `ratchet_from` blocks, and from there it follows the largest estimate seen
    # at any look (it never shrinks); before, the current estimate (with fewer blocks
    # one slow run can dominate any estimate). Also "current" or a number (known
    # sigma), both without the pilot's floor (for experiments).
    horizon_from: str = "ratchet"
    ratchet_from: int = 16
    # where the noise that plans the horizon is measured from: "tolerance" = the
    # spread of the log slowdowns about log(1 + tolerance), the value both bounds
    # test (at the boundary it is independent of the studentized statistic: Basu
    # 1955), or "estimate" = about their own location (the rule before 2026-12-05,
    # whose small estimates both inflated the statistic and shortened the horizon)
    plan_noise: str = "tolerance"
    # location of the log differences: "robust" (benchharness.gate.robust) or "mean"
    estimator: str = "robust"
    # a build with no successful run among its first this-many runs (warm-ups
    # included) stops the gate: verdict never_ok, exit code 5
    never_ok_after: int = 3
    # a pass by the timings waits while the candidate failed alone more often with a
    # one-sided exact sign-test p below this (more blocks will tell); see failures.py
    failure_hold: float = 0.3
    # share of the level the sequential bounds spend. The horizon is re-planned from
    # the noise estimate, which costs level as in any internal-pilot design; this
    # share is the worst case over the noise-to-tolerance ratio (Kieser & Friede
    # 2000), found by simulating the whole rule on null paths that each carry their
    # own noise estimate and horizon (experiments/bench/gate_validation.py
    # --sections calibrate; docs/gate.md); chosen for the rule before 2026-12-05
    # (horizon from the spread about the estimate) and kept
    level_calibration: float = 0.6

    def __post_init__(self):
        if not 0 < self.tolerance < 1:
            raise ValueError("tolerance must be between 0 and 100%")
        if not 0.5 < self.confidence < 1:
            raise ValueError("confidence must be between 0.5 and 1")
        if self.min_runs < 2:
            raise ValueError("min_runs must be at least 2")
        if self.max_runs < self.min_runs:
            raise ValueError("max_runs must be at least min_runs")
        if self.estimator not in ("robust", "mean"):
            raise ValueError("estimator must be 'robust' or 'mean'")
        if self.plan_noise not in ("tolerance", "estimate"):
            raise ValueError("plan_noise must be 'tolerance' or 'estimate'")

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

    def failure_alpha(self, workloads: int = 1) -> float:
        """One-sided level of the failure-rate comparison of each workload: (1 - confidence) / m."""
        return (1.0 - self.confidence) / max(1, workloads)

    def tracker(self, workloads: int = 1) -> SpendingTracker:
        """A fresh level-spending record for one workload, for this estimator's statistic."""
        return SpendingTracker(self.design(workloads).alpha,
                               statistic="robust" if self.estimator == "robust" else "t")

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


def _failure_counts(blocks: Sequence[Block]) -> tuple[int, int]:
    """(blocks where only the candidate failed, blocks where only the baseline failed)."""
    only_c = sum(b.candidate_status != OK and b.baseline_status == OK for b in blocks)
    only_b = sum(b.baseline_status != OK and b.candidate_status == OK for b in blocks)
    return only_c, only_b


def judge(blocks: Sequence[Block], settings: GateSettings, workloads: int = 1,
          tracker: SpendingTracker | None = None) -> Judgement:
    """Judge one workload after the given blocks (in the order they ran).

    ``tracker`` carries the level spent at earlier looks; the run loop keeps
    one per workload and calls this after every block. Without it the looks
    are replayed block by block, and the first decision is returned (what the
    gate would have said, stopping there).
    """
    if tracker is None:
        tracker = settings.tracker(workloads)
        j = None
        for i in range(1, len(blocks) + 1):
            j = _judge(blocks[:i], settings, workloads, tracker)
            if j.decided:
                return j
        return j if j is not None else _judge(blocks, settings, workloads, tracker)
    return _judge(blocks, settings, workloads, tracker)


def _judge(blocks, settings, workloads, tracker) -> Judgement:
    """One look: the failure rule first, then the timing bounds (see the module docstring)."""
    look = _Look.of(blocks, settings, workloads)
    by_failures = _failure_regression(look, settings, workloads)
    if by_failures is not None:
        return by_failures
    passed = getattr(tracker, "timing_pass", None)
    if passed is not None:
        # timings already passed at an earlier look; only the failure question is open
        return _pass_or_hold(look, passed, tracker, settings, earlier=True)
    if look.n < max(2, settings.min_runs) or look.sd is None:
        if look.at_budget:
            return look.make("inconclusive",
                             f"only {plural(look.n, 'block')} with both runs ok within the budget")
        return look.make(None, "waiting for the first look")
    return _bounds_verdict(look, settings, look.design, tracker)


@dataclass(frozen=True)
class _Look:
    """What one look knows: counts, the location and noise of the log slowdowns."""

    settings: GateSettings
    design: SequentialDesign
    n_blocks: int                   # blocks run
    n: int                          # blocks with a timing difference
    mean: float | None              # location of the log slowdowns
    sd: float | None                # their noise (resistant or plain)
    base_fail: int
    cand_fail: int
    only_c: int                     # blocks where only the candidate failed
    only_b: int                     # blocks where only the baseline failed

    @classmethod
    def of(cls, blocks, settings: GateSettings, workloads: int) -> "_Look":
        diffs = [d for d in (log_slowdown(b, settings.higher_is_better) for b in blocks)
                 if d is not None]
        mean, sd = _location_and_noise(diffs, settings.estimator)
        only_c, only_b = _failure_counts(blocks)
        return cls(settings=settings, design=settings.design(workloads),
                   n_blocks=len(blocks), n=len(diffs), mean=mean, sd=sd,
                   base_fail=sum(b.baseline_status != OK for b in blocks),
                   cand_fail=sum(b.candidate_status != OK for b in blocks),
                   only_c=only_c, only_b=only_b)

    @property
    def at_budget(self) -> bool:
        return self.n_blocks >= self.settings.max_runs

    def make(self, verdict, reason, lo=None, hi=None, horizon=None, extra=None) -> Judgement:
        """The judgement of this look; a pass notes candidate failures too few to decide."""
        if verdict in ("no_regression", "improvement") and self.only_c > self.only_b:
            reason += (f"; the candidate alone failed in {plural(self.only_c, 'block')}, the baseline "
                       f"alone in {self.only_b}: too few to say it fails more often")
        return Judgement(
            verdict=verdict, blocks=self.n_blocks, usable_blocks=self.n,
            ratio=math.exp(self.mean) if self.mean is not None else None,
            lower=math.exp(lo) if lo is not None else None,
            upper=math.exp(hi) if hi is not None else None,
            horizon_blocks=horizon if horizon is not None else self.settings.max_runs,
            alpha=self.design.alpha, reason=reason, baseline_failures=self.base_fail,
            candidate_failures=self.cand_fail, sd_log=self.sd, extra=extra or {},
        )


def _location_and_noise(diffs: Sequence[float], estimator: str
                        ) -> tuple[float | None, float | None]:
    """(location, noise) of the log slowdowns: the mean from one, the estimator's from two."""
    n = len(diffs)
    if n == 0:
        return None, None
    mean = sum(diffs) / n
    if n == 1:
        return mean, None
    if estimator == "robust":
        mean, sd = robust_summary(diffs)
    else:
        sd = math.sqrt(sum((x - mean) ** 2 for x in diffs) / (n - 1))
    return mean, max(sd, 1e-9)


def _failure_regression(look: _Look, settings: GateSettings, workloads: int
                        ) -> Judgement | None:
    """A regression by failure rate (exact sequential sign test), else None."""
    reason = failure_verdict(look.only_c, look.only_b, settings.max_runs,
                             settings.failure_alpha(workloads),
                             rates=rates_words(look.cand_fail, look.base_fail, look.n_blocks,
                                               settings.confidence))
    if not reason:
        return None
    # a regression by failure rate, not by timings: said so in every output
    return look.make("regression", reason, extra={"cause": "failures"})


def _pass_or_hold(look: _Look, passed: tuple, tracker, settings: GateSettings,
                  earlier: bool = False) -> Judgement:
    """A pass by the timings, held back while the candidate's failures lean against it."""
    if failures_lean_against(look.only_c, look.only_b, settings.failure_hold):
        if not earlier:
            # the timings pass, but the candidate's failures might still decide: keep
            # adding blocks for the failure question only
            tracker.timing_pass = passed
        return _held(look.make, passed, look.only_c, look.only_b, look.at_budget)
    return look.make(*passed)


def _look_horizon(look: _Look, settings: GateSettings, design: SequentialDesign,
                  tracker) -> int:
    """The planned horizon (blocks) at this look: from the noise, with the pilot's floor."""
    horizon = design.horizon(_plan_sd(_planning_noise(look, settings), look.n, settings,
                                      tracker))
    if settings.horizon_from == "ratchet":
        # the pilot: a horizon planned from fewer blocks would end early exactly when
        # the estimate came out small, the same small estimate that inflates the
        # statistic, and spend the rest of the level there (docs/gate.md)
        horizon = max(horizon, min(settings.ratchet_from, settings.max_runs))
    return horizon


def planned_horizon(mean: float, sd: float, n: int, settings: GateSettings, state,
                    workloads: int = 1) -> int:
    """The horizon the gate plans at a look with ``n`` usable blocks, location ``mean``
    and noise ``sd``; ``state`` keeps the pilot's ratchet (``plan_sd``) between looks
    as the workload's tracker does. Used to simulate the rule (`benchharness.gate.calibrate`).
    """
    look = _Look(settings, settings.design(workloads), n, n, mean, sd, 0, 0, 0, 0)
    return _look_horizon(look, settings, look.design, state)


def _bounds_verdict(look: _Look, settings: GateSettings, design: SequentialDesign,
                    tracker) -> Judgement:
    """The repeated bounds at this look and what they say (sd > 0 here)."""
    horizon = _look_horizon(look, settings, design, tracker)
    final = look.at_budget or look.n >= horizon
    ct = tracker.boundary(look.n, horizon, final)
    if not math.isfinite(ct):
        if final:
            return look.make("inconclusive", "budget spent before a look could decide",
                             horizon=horizon)
        return look.make(None, "no level to spend at this look yet", horizon=horizon)
    half = ct * look.sd / math.sqrt(look.n)
    lo, hi = look.mean - half, look.mean + half
    thr = settings.threshold_log
    if lo > thr:
        return look.make("regression", f"slower than {1 + settings.tolerance:.3g}× with "
                         f"{settings.confidence * 100:g}% confidence", lo, hi, horizon)
    if hi < thr:
        return _pass_or_hold(look, _pass(settings, lo, hi, horizon), tracker, settings)
    if final:
        return look.make("inconclusive", undecided_reason(look, settings, ct), lo, hi,
                         horizon)
    return look.make(None, "undecided", lo, hi, horizon)


#: power with which the budget named in a noisy undecided reason would settle the ratio
SETTLE_POWER_Z = 1.2816  # the standard normal's 90% point


def undecided_reason(look: _Look, settings: GateSettings, ct: float) -> str:
    """Why a final look left the bounds around ``1 + tolerance``: closeness or noise.

    The bounds are ``location ± ct·s/√n``. When their half-width is within the
    design distance δ (the gap between ``1 + tolerance`` and ``1 + 2·tolerance``
    the gate is planned to resolve), the runs were precise enough and the
    estimate sits within δ of the tolerance: it is *close to the tolerance*.
    When the half-width is wider than δ, the *noise* kept it open, whatever the
    estimate: the reason says so, with the spread per pair and the pairs that
    would likely (9 times in 10, normal approximation with this look's boundary:
    ``n = ((ct + z_0.9)·s / D)²``) settle a ratio at the estimate's distance
    ``D`` from the tolerance, or at δ when the estimate itself is nearer.
    """
    why = "budget spent" if look.at_budget else "planned information spent"
    thr, delta = settings.threshold_log, settings.design_delta
    half = ct * look.sd / math.sqrt(look.n)
    tol = fmt_ratio(1 + settings.tolerance)
    est = fmt_ratio(math.exp(look.mean), 4)
    if half <= delta:
        return (f"{why}; the ratio {est} is too close to the tolerance {tol} to tell: "
                f"the bounds are narrow but contain it")
    dist = abs(look.mean - thr)
    head = (f"{why}; too noisy for the budget: the pairs differ by about "
            f"{fmt_change(math.exp(look.sd))[1:]} (spread of the log slowdowns), too much "
            f"for {plural(look.n, 'pair')} to tell")
    need = math.ceil(((max(ct, 0.0) + SETTLE_POWER_Z) * look.sd / max(dist, delta)) ** 2)
    pairs = f"about {need:,} pairs" if need <= 100_000 else "more than 100,000 pairs"
    if dist >= delta:
        return f"{head}; {pairs} would likely settle a ratio this far from {tol}"
    lo_r, hi_r = fmt_ratio(math.exp(thr - delta)), fmt_ratio(math.exp(thr + delta))
    return (f"{head}; {pairs} would likely settle it if the true ratio is outside "
            f"{lo_r} to {hi_r} (the estimate {est} is near the tolerance)")


def _pass(settings: GateSettings, lo: float, hi: float, horizon: int) -> tuple:
    """(verdict, reason, lo, hi, horizon) of a pass: better when below 1 - tolerance too."""
    if hi < settings.improvement_log:
        return ("improvement", f"faster than {1 - settings.tolerance:.3g}×", lo, hi, horizon)
    return ("no_regression", f"not slower than {1 + settings.tolerance:.3g}×", lo, hi,
            horizon)


def _held(make, passed, only_c: int, only_b: int, at_budget: bool) -> Judgement:
    """A timing pass held back while the candidate's failures lean against it."""
    verdict, reason, lo, hi, horizon = passed
    if at_budget:
        return make("inconclusive", f"{reason}, but the candidate alone failed in {only_c} "
                    f"blocks and the baseline alone in {only_b}: the budget ran out before "
                    "it was clear whether the candidate fails more often", lo, hi, horizon)
    return make(None, f"{reason}; waiting: the candidate failed alone more often", lo, hi,
                horizon)


def _planning_noise(look: _Look, settings: GateSettings) -> float:
    """The noise that plans the horizon: by default the spread about log(1 + tolerance).

    Both bounds test the log ratio ``mu0 = log(1 + tolerance)``. With normal
    log slowdowns and ``mu = mu0``, the studentized statistics at this look and
    all earlier ones are functions of the direction of the vector ``d - mu0``
    only (they do not change when it is scaled), while the root mean square
    ``sqrt(mean (d - mu0)^2)`` is its length; the length is independent of the
    direction (Basu 1955). So a horizon planned from this spread does not shrink
    on the paths where the statistic is inflated, as one planned from the spread
    about the estimate does (a small ``s`` there both inflates the statistic and
    shortens the horizon). Computed here from the resistant location and noise:
    ``s^2 (n - 1) / n + min(|location - mu0|, 4 se)^2`` with ``se = s / sqrt(n)``:
    the distance to the tolerance counted up to four standard errors, beyond
    which a path is deciding anyway, so a large change is not made to wait for
    a horizon planned as if its distance were noise (a 50% slowdown at CV 3% is
    still called within the first looks). A cap at the design distance instead
    would drop the protection at high noise, where that distance is under two
    standard errors. Near the boundary the distance makes the horizon a little longer;
    the horizon factor (0.7) is set for the power at ``1 + 2 tolerance``.
    """
    if settings.plan_noise == "estimate":
        return look.sd
    n = look.n
    off = min(abs(look.mean - settings.threshold_log), PLAN_DISTANCE_SE * look.sd / math.sqrt(n))
    return math.sqrt(look.sd * look.sd * (n - 1) / n + off * off)


def _plan_sd(sd: float, n: int, settings: GateSettings, tracker: SpendingTracker) -> float:
    """Noise estimate that sets the planned horizon (see `GateSettings.horizon_from`).

    "ratchet": the largest estimate seen at any look of this workload with at
    least ``ratchet_from`` usable blocks (kept on its tracker), so from there the
    horizon may grow, never shrink; before, the current estimate (`_judge` keeps
    that horizon at ``ratchet_from`` blocks at least: the internal pilot).
    """
    mode = settings.horizon_from
    if mode == "ratchet":
        if n < settings.ratchet_from:
            return sd
        tracker.plan_sd = max(tracker.plan_sd, sd)
        return tracker.plan_sd
    if mode == "current":
        return sd
    return float(mode)
