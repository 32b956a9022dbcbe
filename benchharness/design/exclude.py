"""The cells of an experiment whose space is not a full grid (``exclude:`` / ``only_when:``).

`space_cells` turns the rules read by `benchharness.experiment.space` into the
list of cells a plan runs: counts, order, blocking (each replicate a complete
block of the cells that remain) and replicates then work on what remains, as
for any other list of cells (`benchharness.design.plan.make_plan`).

A two-level fraction, confounded blocks or a response-surface design choose
their own cells from the full grid:
with combinations missing their alias structure no longer holds, so the
combination is refused with one located line rather than planned wrongly.
"""

from __future__ import annotations

from benchharness.experiment.space import enumerate_cells


def space_cells(exp, choice=None) -> tuple[list[dict], dict]:
    """(cells that remain, in listed order; the facts ``plan --json`` shows)."""
    if choice is not None and (choice.changes_plan or choice.cells() is not None):
        from benchharness.errors import ExperimentError

        line, col = exp.key_marks.get("design", (None, None))
        raise ExperimentError("a fractional, block-confounded or response-surface 'design' "
                              "cannot be combined with 'exclude' or 'only_when' (it chooses "
                              "its own cells from the full grid, and its aliases or coded "
                              "levels assume every one of them); remove one of the two",
                              path=exp.path, line=line, col=col)
    cached = exp.__dict__.get("_space_cells")
    if cached is None:
        cells = enumerate_cells(exp.space, exp.factors)
        cached = (cells.cells, cells.to_json_dict(exp.space), cells)
        exp.__dict__["_space_cells"] = cached   # frozen dataclass: memoised past __setattr__
    return [dict(c) for c in cached[0]], cached[1]


def describe_space(exp) -> list[str]:
    """``plan``'s section on the space (nothing for a full grid)."""
    from benchharness.experiment.space import describe

    if getattr(exp, "space", None) is None:
        return []
    space_cells(exp)
    return describe(exp.space, exp.__dict__["_space_cells"][2])
