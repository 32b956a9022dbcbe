"""Designs and plans: which cells to run, how often, in what order.

`build_plan(experiment)` is the entry point the runner and the `plan` command
use: it reads the experiment's design section (full factorial by default) and
returns a `benchharness.design.plan.Plan`.
"""

from __future__ import annotations


def build_plan(exp, seed=None):
    """The plan of an experiment according to its design (full factorial by default)."""
    from benchharness.design.plan import make_plan

    return make_plan(exp, seed=seed)
