"""Designs and plans: which cells to run, how often, in what order.

`build_plan(experiment)` is the entry point the runner and the `plan` command
use: it reads the experiment's design section (full factorial by default) and
returns a `benchharness.design.plan.Plan`.
"""

from __future__ import annotations


def build_plan(exp, seed=None, **kwargs):
    """The plan of an experiment according to its design (full factorial by default).

    A ``design:`` section (`benchharness.design.spec`) replaces the full
    factorial by a fraction and/or splits each replicate into confounded blocks;
    its facts (resolution, defining relation, aliases, confounded effects) go
    into ``Plan.info``. ``kwargs`` pass through to `make_plan` (adaptive
    replication appends replicates with ``replicates=``/``first_replicate=``/
    ``first_run=``).
    """
    from benchharness.design.plan import make_plan
    from benchharness.design.spec import design_of

    choice = design_of(exp)
    _check_size(exp, choice, kwargs)
    info = dict(choice.info())
    info.update(kwargs.pop("info", None) or {})
    cells = choice.cells()
    if getattr(exp, "space", None) is not None:   # exclude: / only_when: (design.exclude)
        from benchharness.design.exclude import space_cells

        cells, info["space"] = space_cells(exp, choice)
    return make_plan(exp, seed=seed, cells=cells,
                     blocks_of_cell=choice.blocks_of_cell(), info=info, **kwargs)


def check_plan_size(exp) -> int:
    """The number of runs `run` would plan for ``exp``; `ExperimentError` above its limit."""
    from benchharness.design.spec import design_of

    return _check_size(exp, design_of(exp), {})


def _check_size(exp, choice, kwargs) -> int:
    """Refuse a plan above the experiment's run limit before building it.

    The count is the one `run` plans: adaptive replication plans its maximum.
    """
    from benchharness.design.adaptive import adaptive_rule
    from benchharness.experiment.file import check_planned_runs

    cells = choice.cells()
    n_cells = len(cells) if cells is not None else exp.cells
    if getattr(exp, "space", None) is not None:
        from benchharness.design.exclude import space_cells

        n_cells = len(space_cells(exp, choice)[0])
    reps = kwargs.get("replicates")
    if reps is None:
        rule = adaptive_rule(exp)
        reps = max(exp.replicates, rule.max_replicates) if rule is not None else exp.replicates
    warm = kwargs.get("warmup")
    return check_planned_runs(exp, n_cells, int(reps),
                              int(exp.warmup if warm is None else warm))
