"""The gate's run loop: warm-ups, then interleaved blocks until every workload is decided.

This module owns the order in which the gate runs things and when it stops.
For every workload (a combination of the non-build factors' levels):

1. warm-up runs of each build first (untimed, recorded with status ``warmup``);
2. then blocks: one baseline and one candidate run back to back, in a random
   order within the block, so machine drift hits both equally (randomized
   complete blocks; the block is an additive term removed by the within-block
   difference); workloads take turns in a random order each round;
3. after each block the workload is judged (`benchharness.gate.decide.judge`);
   it drops out of the rotation once decided or at its budget;
4. a build with no successful run among its first ``never_ok_after`` runs of a
   workload (warm-ups included) stops the whole gate at once with the verdict
   ``never_ok`` (exit code 5, as `run` when it stops early): nothing can be compared, and spending the budget
   on it would only delay the message.

The loop talks to the outside world through an `Executor` (real processes, or
`SimulatedExecutor` for validation) and an optional ``on_record`` callback that
receives every finished run as a plain dict (the results folder writer plugs in
there). With a stored baseline (an earlier results folder) only candidate runs
are made and block ``i`` pairs the ``i``-th candidate run with the ``i``-th
stored baseline run of that workload.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Mapping, Sequence

from benchharness.execute.base import USAGE_FIELDS, Measurement, RunSpec
from benchharness.gate.decide import Block, GateSettings, Judgement, judge
from benchharness.numbers import plural

BASELINE, CANDIDATE = "baseline", "candidate"
NEVER_OK_EXIT = 5


@dataclass(frozen=True)
class GateOutcome:
    """Verdicts of one gate session, per workload, plus what it cost."""

    settings: GateSettings
    response: str
    judgements: Mapping[str, Judgement]       # workload key -> judgement
    workload_levels: Mapping[str, Mapping[str, str]]
    runs: int                                  # timed runs made (both builds, all workloads)
    warmups: int
    stored_baseline: bool = False
    warnings: tuple[str, ...] = ()

    @property
    def verdict(self) -> str:
        vs = [j.verdict for j in self.judgements.values()]
        if "never_ok" in vs:
            return "never_ok"
        if "regression" in vs:
            return "regression"
        if "inconclusive" in vs or None in vs:
            return "inconclusive"
        if vs and all(v == "improvement" for v in vs):
            return "improvement"
        return "no_regression"

    def exit_code(self, inconclusive: str | None = None) -> int:
        """0 no regression (improvements included), 1 regression, 3 inconclusive, 5 never ok.

        ``inconclusive`` = ``"pass"`` maps an inconclusive verdict to 0, ``"fail"`` to 1;
        it never applies to a build that never ran successfully (4).
        """
        v = self.verdict
        if v == "never_ok":
            return NEVER_OK_EXIT
        if v == "regression":
            return 1
        if v == "inconclusive":
            return {"pass": 0, "fail": 1}.get(inconclusive or "", 3)
        return 0


def response_value(m: Measurement, response: str) -> float | None:
    """The response of one run: a resource-usage field or a custom metric in ``extra``."""
    if response in USAGE_FIELDS:
        v = getattr(m, response)
    else:
        extra = m.extra or {}
        v = extra.get(response)
        if v is None and isinstance(extra.get("metrics"), Mapping):
            v = extra["metrics"].get(response)
    try:
        return None if v is None else float(v)
    except (TypeError, ValueError):
        return None


# (workload key, role, run id, is warm-up) -> RunSpec
SpecMaker = Callable[[str, str, int, bool], RunSpec]


def run_gate(workloads: Mapping[str, Mapping[str, str]], make_spec: SpecMaker, executor,
             settings: GateSettings, response: str = "wall_s", warmup: int = 1,
             seed: int | None = None, on_record: Callable[[dict], None] | None = None,
             stored_baseline: Mapping[str, Sequence[tuple[float | None, str]]] | None = None,
             ) -> GateOutcome:
    """Run the gate loop; returns the verdicts.

    ``workloads`` maps a workload key to its levels of the non-build factors.
    ``make_spec(key, role, run_id, is_warmup)`` builds the RunSpec of one run of ``role``
    (``"baseline"`` or ``"candidate"``). ``stored_baseline`` maps a workload key
    to (response, status) of earlier baseline runs; when given, no baseline runs
    are made.
    """
    loop = _GateLoop(workloads, make_spec, executor, settings, response, seed, on_record,
                     stored_baseline)
    loop.warm_up(warmup)
    loop.judge_before_blocks()
    while loop.open_keys:
        loop.one_round()
    return loop.outcome()


class _GateLoop:
    """The state of one gate loop: which run comes next, and when to stop (see `run_gate`)."""

    def __init__(self, workloads, make_spec, executor, settings: GateSettings, response: str,
                 seed, on_record, stored_baseline):
        import numpy as np

        self.workloads, self.make_spec, self.executor = workloads, make_spec, executor
        self.settings, self.response, self.on_record = settings, response, on_record
        self.stored_baseline = stored_baseline
        self.rng = np.random.default_rng(seed)
        self.keys = list(workloads)
        self.m = len(self.keys)
        self.roles = [CANDIDATE] if stored_baseline is not None else [BASELINE, CANDIDATE]
        self.budget = {k: settings.max_runs for k in self.keys}
        if stored_baseline is not None:
            for k in self.keys:
                have = len(stored_baseline.get(k, ()))
                if have < settings.max_runs:
                    self.budget[k] = have
        self.counter = {"run": 0, "position": 0}
        # per (workload, role): [runs made, successful runs, first failure's message]
        self.tally: dict[tuple[str, str], list] = {(k, r): [0, 0, ""] for k in self.keys
                                                   for r in self.roles}
        self.blocks: dict[str, list[Block]] = {k: [] for k in self.keys}
        self.judgements: dict[str, Judgement] = {}
        self.open_keys = list(self.keys)
        self.stopped: Judgement | None = None
        self.warmups = 0
        self.runs = 0
        self.block_no = 0

    def do(self, key: str, role: str, block: int, replicate: int,
           is_warmup: bool) -> Measurement:
        """Make one run and tally whether it gave a value."""
        run_id = self.counter["run"]
        self.counter["run"] += 1
        spec = self.make_spec(key, role, run_id, is_warmup)
        meas = self.executor.execute(spec)
        if self.on_record is not None:
            self.on_record({
                "run": run_id, "position": self.counter["position"], "block": block,
                "replicate": replicate, "workload": key, "role": role,
                "warmup": is_warmup, "levels": dict(spec.levels), "measurement": meas,
            })
        self.counter["position"] += 1
        t = self.tally[(key, role)]
        t[0] += 1
        if meas.status == "ok" and (is_warmup or
                                    response_value(meas, self.response) is not None):
            t[1] += 1
        elif not t[2]:
            t[2] = (meas.message or meas.status) if meas.status != "ok" else \
                f"the run ended ok but gave no value for {self.response}"
        return meas

    def never_ok(self, key: str, blocks_run: int) -> Judgement | None:
        """A never_ok judgement when a build of this workload has not succeeded yet."""
        settings = self.settings
        broken = []
        for role in self.roles:
            made, good, first = self.tally[(key, role)]
            if made >= settings.never_ok_after and good == 0:
                broken.append(f"the {role} failed all {made} of its runs (first: {first})")
        if self.stored_baseline is not None:
            st = [s for _v, s in self.stored_baseline.get(key, ())]
            if st and all(s != "ok" for s in st):
                broken.append("the stored baseline has no successful run "
                              f"({plural(len(st), 'run')})")
        if not broken:
            return None
        done = self.blocks.get(key, [])
        return Judgement(
            verdict="never_ok", blocks=blocks_run, usable_blocks=0, ratio=None, lower=None,
            upper=None, horizon_blocks=settings.max_runs, alpha=settings.failure_alpha(self.m),
            reason="; ".join(broken) + "; nothing to compare: fix the command or the build",
            baseline_failures=sum(b.baseline_status != "ok" for b in done),
            candidate_failures=sum(b.candidate_status != "ok" for b in done))

    def warm_up(self, warmup: int) -> None:
        """Untimed runs of each build first, workloads and builds in a random order."""
        for _ in range(max(0, int(warmup))):
            for k in [self.keys[i] for i in self.rng.permutation(self.m)]:
                for role in [self.roles[i] for i in self.rng.permutation(len(self.roles))]:
                    self.do(k, role, -1, -1, True)
                    self.warmups += 1

    def judge_before_blocks(self) -> None:
        """A build that never ran ok in its warm-ups stops the gate; a workload with too
        few stored baseline runs is inconclusive before it starts."""
        settings = self.settings
        self.trackers = {k: settings.tracker(self.m) for k in self.keys}
        for k in self.keys:
            j = self.never_ok(k, 0)
            if j is not None:
                self.judgements[k] = self.stopped = j
                break
        if self.stopped is not None:
            self.open_keys = []
        for k in self.keys:
            if self.budget[k] < settings.min_runs and k not in self.judgements:
                self.judgements[k] = Judgement(
                    verdict="inconclusive", blocks=0, usable_blocks=0, ratio=None, lower=None,
                    upper=None, horizon_blocks=self.budget[k],
                    alpha=(1 - settings.confidence) / self.m,
                    reason=f"only {self.budget[k]} stored baseline runs; at least "
                           f"{settings.min_runs} are needed")
                if k in self.open_keys:
                    self.open_keys.remove(k)

    def one_round(self) -> None:
        """One block of every undecided workload, the workloads in a random order."""
        for k in [self.open_keys[i] for i in self.rng.permutation(len(self.open_keys))]:
            if self._block(k):
                return

    def _block(self, k: str) -> bool:
        """Both builds back to back in a random order, then judge; True when the gate stops."""
        i = len(self.blocks[k])
        got: dict[str, tuple[float | None, str]] = {}
        for role in [self.roles[j] for j in self.rng.permutation(len(self.roles))]:
            meas = self.do(k, role, self.block_no, i, False)
            self.runs += 1
            got[role] = (response_value(meas, self.response), meas.status)
        if self.stored_baseline is not None:
            got[BASELINE] = tuple(self.stored_baseline[k][i])
        self.block_no += 1
        (bv, bs), (cv, cs) = got[BASELINE], got[CANDIDATE]
        if bs == "ok" and bv is None or cs == "ok" and cv is None:
            # a run that finished but lacks the response cannot be judged
            bs = "failed" if bv is None else bs
            cs = "failed" if cv is None else cs
        self.blocks[k].append(Block(bv, cv, bs, cs))
        self.stopped = self.never_ok(k, len(self.blocks[k]))
        if self.stopped is not None:
            self.judgements[k] = self.stopped
            self.open_keys = []
            return True
        settings = self.settings
        s = settings if self.budget[k] == settings.max_runs else \
            _with_budget(settings, self.budget[k])
        j = judge(self.blocks[k], s, self.m, self.trackers[k])
        if j.decided:
            self.judgements[k] = j
            self.open_keys.remove(k)
        return False

    def outcome(self) -> GateOutcome:
        judgements = self.judgements
        if self.stopped is not None:
            for k in self.keys:
                if k not in judgements:
                    judgements[k] = Judgement(
                        verdict="inconclusive", blocks=len(self.blocks[k]),
                        usable_blocks=0, ratio=None, lower=None, upper=None,
                        horizon_blocks=self.budget[k],
                        alpha=self.settings.failure_alpha(self.m),
                        reason="not judged: the gate stopped because a build never ran "
                               "successfully")
            judgements = {k: judgements[k] for k in self.keys}
        return GateOutcome(settings=self.settings, response=self.response,
                           judgements=judgements,
                           workload_levels={k: dict(v) for k, v in self.workloads.items()},
                           runs=self.runs, warmups=self.warmups,
                           stored_baseline=self.stored_baseline is not None, warnings=())


def _with_budget(settings: GateSettings, budget: int) -> GateSettings:
    from dataclasses import replace

    return replace(settings, max_runs=budget)
