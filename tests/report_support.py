"""Helpers for the report tests: a real results folder from a planted-answer executor.

The executor stands in for processes (the runner accepts any `Executor`): each run's
wall time is drawn from a lognormal model whose effects are known by construction
(invented data for a planted-answer test, as the brief allows), so a test can check
that the report's verdict names the factor that was planted.
"""

from __future__ import annotations

import datetime as dt
import math

import numpy as np

from benchharness.execute.base import Measurement

HOSTILE = "<script>alert(1)</script>"

EXPERIMENT = f"""\
experiment: nap-planted
about: Does a longer nap take longer, and does <b>doubling</b> it double the time?
command: [python3, -c, "pass", "{{nap}}", "{{scale}}"]
factors:
  nap: ["short", "long", "{HOSTILE}"]
  scale: ["1", "2"]
replicates: 6
seed: 11
"""

# Planted multiplicative effects on wall time (ratios to the first level).
PLANTED = {"nap": {"short": 1.0, "long": 2.0, HOSTILE: 1.25}, "scale": {"1": 1.0, "2": 1.5}}


class PlantedExecutor:
    """Draws ``wall_s = 0.02 s × Π effect × lognormal(σ)``; optional failures by run id."""

    def __init__(self, planted=PLANTED, sigma=0.08, seed=3, fail_runs=(), timeout_runs=(),
                 base_s=0.02, drift_per_run=0.0, print_rate=False):
        self.planted = planted
        self.sigma = sigma
        self.rng = np.random.default_rng(seed)
        self.fail_runs = set(fail_runs)
        self.timeout_runs = set(timeout_runs)
        self.base_s = base_s
        self.drift = drift_per_run
        self.count = 0
        self.print_rate = print_rate

    def execute(self, spec, on_start=None):
        if on_start:
            on_start(12345, 12345)
        self.count += 1
        now = dt.datetime.now(dt.timezone.utc).isoformat(timespec="microseconds")
        if spec.run_id in self.fail_runs:
            return Measurement(status="failed", exit_code=1, wall_s=0.001, started_at=now,
                               message="planted failure <img src=x onerror=alert(2)>")
        if spec.run_id in self.timeout_runs:
            return Measurement(status="timeout", exit_code=None, wall_s=60.0, started_at=now,
                               message="planted timeout")
        mult = 1.0
        for f, lv in spec.levels.items():
            mult *= self.planted.get(f, {}).get(lv, 1.0)
        wall = self.base_s * mult * math.exp(self.rng.normal(0, self.sigma)
                                            + self.drift * self.count)
        return Measurement(status="ok", exit_code=0, wall_s=wall, user_s=wall * 0.9,
                           sys_s=wall * 0.05, max_rss_kib=9000 + int(self.rng.integers(0, 50)),
                           minor_faults=100, major_faults=0, voluntary_switches=2,
                           involuntary_switches=1, in_blocks=0, out_blocks=0, started_at=now,
                           stdout_tail=(f"served {1000.0 / wall:.3f} requests/s\n".encode()
                                        if self.print_rate else b""))

    def close(self):
        pass


def make_results(tmp_path, text=EXPERIMENT, executor=None, name="out"):
    """Run ``text`` with the planted executor into ``tmp_path/name``; returns the folder."""
    from benchharness.experiment.file import Experiment
    from benchharness.execute.runner import run_experiment

    exp = Experiment.from_text(text, path=str(tmp_path / "experiment.yaml"))
    (tmp_path / "experiment.yaml").write_text(text)
    out = run_experiment(exp, out=tmp_path / name, executor=executor or PlantedExecutor())
    return out.folder

