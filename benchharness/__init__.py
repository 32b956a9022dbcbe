"""benchharness: benchmark experiments planned, run and analysed as designed experiments.

The pipeline runs one way with plain data between stages::

    experiment file --load--> Experiment --plan--> Plan --execute--> journal
        --> runs table --analyze--> Analysis --render--> reports

The names exported here are the Python API. They import their stage lazily so
that ``import benchharness`` stays cheap.
"""

from __future__ import annotations

from benchharness.version import __version__

__all__ = ["load_experiment", "plan", "run", "analyze", "choose", "__version__"]


def load_experiment(path):
    """Load and validate an experiment file; returns an `Experiment`."""
    from benchharness.experiment.file import load_experiment as _load

    return _load(path)


def plan(experiment, seed=None):
    """Expand an `Experiment` into a `Plan` (every run in execution order)."""
    from benchharness.design.plan import make_plan

    return make_plan(experiment, seed=seed)


def run(experiment, out=None, **kwargs):
    """Plan and execute an experiment; returns a `RunOutcome` (``.folder``, ``.runs``)."""
    from benchharness.execute.runner import run_experiment

    return run_experiment(experiment, out=out, **kwargs)


def analyze(data, response="wall_s", factors=None, block=None, transform="auto",
            model=None, ss_type=2, alpha=0.05, **kwargs):
    """Analyse a runs table (DataFrame, CSV path or results folder) as a designed experiment."""
    from benchharness.analysis import analyze as _analyze

    return _analyze(data, response=response, factors=factors, block=block,
                    transform=transform, model=model, ss_type=ss_type, alpha=alpha, **kwargs)


def choose(data, response="wall_s", factors=None, across=None, also=None, confidence=0.95,
           prefer=None, **kwargs):
    """Recommend a default setting: best-or-tied set, robust choice, trade-offs."""
    from benchharness.choose import choose as _choose

    return _choose(data, response=response, factors=factors, across=across, also=also,
                   confidence=confidence, prefer=prefer, **kwargs)
