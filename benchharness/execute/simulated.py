"""A simulated system: an executor that draws run times from a known model.

`SimulatedExecutor` implements the `Executor` protocol (see `base.py`) without
starting any process. Each call to ``execute`` draws one run time from a
lognormal distribution whose parameters come from a `SimulatedModel` and the
run's ``spec.levels``. Because the truth is known by construction, statistical
procedures (the regression gate, the analysis, replicate sizing) can be checked
against it: a planted effect must be found, a null effect must not be found
more often than the stated error rate.

The model, for a run at execution position ``p`` (0, 1, 2 ... counted over all
calls to this executor, warm-ups included) with levels ``L``::

    mean_s(L, p) = base_s * prod_f effects[f][L[f]] * exp(drift_per_run * p)
    wall_s ~ LogNormal(log(mean_s) - s**2 / 2, s),   s**2 = log(1 + cv**2)

so ``mean_s`` is the expected run time, ``cv`` the coefficient of variation of
each run time (the same for every cell, so ratios of means equal ratios of
medians) and ``drift_per_run`` a linear drift on the log scale (a machine that
slows down or speeds up steadily; 0.001 means about +0.1 % per run).
Occasional slow runs (another job on the host, a cache flush): with
probability ``outlier_prob`` a run takes ``outlier_factor`` times as long.
Per-level failure probabilities make a run fail (exit code 1) or time out.
Run times above ``spec.timeout_s`` are reported as timeouts. A throughput
metric (``work_items / wall_s``) can be added to ``Measurement.extra`` to test
higher-is-better responses.

Nothing sleeps: the executor keeps a virtual clock (``started_at`` advances by
each drawn run time from a fixed epoch) so results are reproducible from the
seed alone. Lognormal run-time noise is common practice for modelling
right-skewed timings.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from datetime import datetime, timedelta, timezone
from typing import Mapping

from benchharness.execute.base import Executor, Measurement, OnStart, RunSpec

_EPOCH = datetime(2026, 1, 1, tzinfo=timezone.utc)


@dataclass(frozen=True)
class SimulatedModel:
    """The known truth a `SimulatedExecutor` draws from.

    ``effects`` maps factor name -> level label -> multiplicative effect on the
    mean run time (missing factors/levels mean 1.0). ``failure_prob`` maps factor
    name -> level label -> probability that a run at that level fails
    (probabilities of several factors combine as independent causes).
    ``timeout_share`` is the share of those failures reported as timeouts.
    ``work_items`` (when set) adds ``extra[throughput_name] = work_items / wall_s``.
    ``outlier_prob`` is the chance that a run is slowed by ``outlier_factor``
    (any level, independently of everything else).
    """

    base_s: float = 1.0
    effects: Mapping[str, Mapping[str, float]] = field(default_factory=dict)
    cv: float = 0.03
    drift_per_run: float = 0.0
    failure_prob: Mapping[str, Mapping[str, float]] = field(default_factory=dict)
    timeout_share: float = 0.0
    work_items: float | None = None
    throughput_name: str = "items_per_s"
    outlier_prob: float = 0.0
    outlier_factor: float = 1.5

    def __post_init__(self):
        if not self.base_s > 0:
            raise ValueError("base_s must be positive")
        if not self.cv >= 0:
            raise ValueError("cv must be >= 0")
        for fac, levels in self.effects.items():
            for lab, eff in levels.items():
                if not eff > 0:
                    raise ValueError(f"effect of {fac}={lab} must be positive, got {eff}")
        for fac, levels in self.failure_prob.items():
            for lab, p in levels.items():
                if not 0.0 <= p <= 1.0:
                    raise ValueError(f"failure probability of {fac}={lab} must be in [0, 1]")
        if not 0.0 <= self.outlier_prob <= 1.0:
            raise ValueError("outlier_prob must be in [0, 1]")
        if not self.outlier_factor > 0:
            raise ValueError("outlier_factor must be positive")

    def mean_s(self, levels: Mapping[str, str], position: int = 0) -> float:
        """Expected run time of a run with these levels at this execution position."""
        m = self.base_s
        for fac, lab in levels.items():
            m *= self.effects.get(fac, {}).get(str(lab), 1.0)
        return m * math.exp(self.drift_per_run * position)

    def fail_prob(self, levels: Mapping[str, str]) -> float:
        """Probability that a run with these levels fails or times out."""
        ok = 1.0
        for fac, lab in levels.items():
            ok *= 1.0 - self.failure_prob.get(fac, {}).get(str(lab), 0.0)
        return 1.0 - ok

    @property
    def sigma_log(self) -> float:
        """Standard deviation of log(run time)."""
        return math.sqrt(math.log1p(self.cv ** 2))


class SimulatedExecutor(Executor):
    """Executor drawing lognormal run times from a `SimulatedModel`, seeded.

    ``SimulatedExecutor(model, seed=7)``; ``execute(spec)`` returns a
    `Measurement`. ``position`` is the number of runs executed so far (the
    drift clock). The executor also works as a context manager.
    """

    def __init__(self, model: SimulatedModel | None = None, seed: int | None = None,
                 start_position: int = 0):
        import numpy as np

        self.model = model or SimulatedModel()
        self.rng = np.random.default_rng(seed)
        self.position = int(start_position)
        self._clock = _EPOCH

    def execute(self, spec: RunSpec, on_start: OnStart | None = None) -> Measurement:
        m = self.model
        levels = {str(k): str(v) for k, v in (spec.levels or {}).items()}
        mean = m.mean_s(levels, self.position)
        s = m.sigma_log
        wall = float(self.rng.lognormal(math.log(mean) - s * s / 2.0, s)) if s > 0 else mean
        if m.outlier_prob > 0 and self.rng.random() < m.outlier_prob:
            wall *= m.outlier_factor      # drawn only when asked: other seeds' streams unchanged
        fails = self.rng.random() < m.fail_prob(levels)
        timed_out_by_kind = fails and self.rng.random() < m.timeout_share
        self.position += 1
        started = self._clock
        if on_start is not None:
            on_start(0, 0)
        status, code, msg = "ok", 0, ""
        if spec.timeout_s is not None and (wall > spec.timeout_s or timed_out_by_kind):
            wall = float(spec.timeout_s)
            status, code, msg = "timeout", None, f"killed after {spec.timeout_s:g} s (simulated)"
        elif timed_out_by_kind:
            status, code, msg = "timeout", None, "timed out (simulated)"
        elif fails:
            status, code, msg = "failed", 1, "exit code 1 (simulated failure)"
        self._clock = started + timedelta(seconds=wall)
        extra: dict[str, object] = {}
        if m.work_items is not None and status == "ok":
            extra[m.throughput_name] = m.work_items / wall
        return Measurement(
            status=status, exit_code=code, wall_s=wall,
            user_s=wall * 0.95, sys_s=wall * 0.03, max_rss_kib=10_240,
            minor_faults=1000, major_faults=0, voluntary_switches=5, involuntary_switches=1,
            in_blocks=0, out_blocks=0,
            started_at=started.isoformat(timespec="microseconds"),
            message=msg, extra=extra,
        )

    def close(self) -> None:
        pass

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False
