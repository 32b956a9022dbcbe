"""The plan: every run of an experiment, in the order it will execute.

A full factorial crosses every level of every factor (Montgomery, *Design and
Analysis of Experiments*, ch. 5); each combination is a *cell*. Each cell is run
``replicates`` times, after ``warmup`` untimed runs of every cell. Three orders:

* ``randomized`` (default): all warm-up runs in random order, then all timed
  runs in one random permutation, so drift and periodic noise cannot line up
  with a factor (randomization, Fisher 1935).
* ``blocked``: each replicate is a complete block (every cell once) run in
  random order within the block; blocks follow one another, so slow drift ends
  up in the block term of the analysis.
* ``listed``: the file's order, cell by cell, each cell's replicates back to
  back. No protection against drift; for debugging and for workloads that must
  run in a set order.

Randomness comes only from ``numpy.random.Generator(PCG64(seed))``: the same
seed gives the same plan on every machine. When the experiment gives no seed,
one is drawn and recorded so the run can be reproduced.

Numbering: ``run`` is the run's id (its row in ``plan.csv``), ``position`` its
0-based place in execution order (equal for a fresh local plan), ``replicate``
counts from 1 (0 for warm-up runs), ``block`` counts from 1 (0 for warm-up runs;
1 for every timed run unless the order is ``blocked``).
"""

from __future__ import annotations

import itertools
import secrets
from dataclasses import dataclass, field
from typing import Mapping, Sequence

from benchharness.experiment.file import Experiment


@dataclass(frozen=True)
class PlannedRun:
    run: int
    position: int
    block: int
    replicate: int
    warmup: bool
    levels: Mapping[str, str]
    cell: int = 0

    def to_json_dict(self) -> dict:
        return {"run": self.run, "block": self.block, "replicate": self.replicate,
                "warmup": self.warmup, "levels": dict(self.levels)}


@dataclass(frozen=True)
class Plan:
    factors: tuple[str, ...]
    cells: int                      # distinct combinations of levels (a cell run twice is one)
    seed: int
    order: str
    runs: tuple[PlannedRun, ...]
    info: Mapping[str, object] = field(default_factory=dict)  # design facts (aliases, ...)
    #: cells a design lists more than once in each replicate (a response surface's centre):
    #: ((levels, copies per replicate), ...); their copies are runs, not cells
    repeated: tuple = ()

    @property
    def timed_runs(self) -> int:
        return sum(1 for r in self.runs if not r.warmup)

    @property
    def warmup_runs(self) -> int:
        return sum(1 for r in self.runs if r.warmup)

    def to_json_dict(self) -> dict:
        d = {"cells": self.cells, "runs": self.timed_runs, "warmup_runs": self.warmup_runs,
             "seed": self.seed}
        d.update({k: v for k, v in self.info.items()})
        d["order"] = [r.to_json_dict() for r in self.runs]
        return d

    def rows(self) -> list[dict]:
        """Rows of ``plan.csv`` (execution order)."""
        out = []
        for r in self.runs:
            row = {"run": r.run, "position": r.position, "block": r.block,
                   "replicate": r.replicate, "warmup": r.warmup}
            row.update(r.levels)
            out.append(row)
        return out


def draw_seed() -> int:
    """A fresh seed for an experiment that gives none (recorded so it can be reproduced)."""
    return secrets.randbelow(2**31 - 1) + 1


def full_factorial_cells(exp: Experiment) -> list[dict[str, str]]:
    """Every cell as factor → label, first factor varying slowest (listed order)."""
    names = exp.factor_names
    return [dict(zip(names, combo))
            for combo in itertools.product(*(f.labels for f in exp.factors))]


def make_plan(exp: Experiment, seed: int | None = None,
              cells: Sequence[Mapping[str, str]] | None = None,
              blocks_of_cell: Sequence[int] | None = None,
              replicates: int | None = None, first_replicate: int = 1,
              warmup: int | None = None, info: Mapping[str, object] | None = None,
              first_run: int = 0) -> Plan:
    """Expand an experiment into its plan.

    ``cells`` replaces the full factorial (fractional designs pass their
    fraction); ``blocks_of_cell`` gives each cell's block within a replicate when
    a design confounds effects with blocks. ``first_replicate``/``first_run``
    let adaptive replication append further complete replicates to a plan.
    """
    import numpy as np
    from numpy.random import Generator, PCG64

    if seed is None:
        seed = exp.seed if exp.seed is not None else draw_seed()
    rng = Generator(PCG64(seed))
    cell_list = (full_factorial_cells(exp) if cells is None else [dict(c) for c in cells])
    n_cells = len(cell_list)
    reps = exp.replicates if replicates is None else replicates
    n_warm = exp.warmup if warmup is None else warmup
    order = exp.order

    # Runs as parallel arrays (cell index, replicate, block), in execution order; the
    # random draws are the same, call for call, as one run at a time would make.
    all_cells = np.arange(n_cells, dtype=np.int64)
    warm_c = np.tile(all_cells, n_warm)
    if order != "listed" and len(warm_c):
        warm_c = warm_c[rng.permutation(len(warm_c))]
    rep_range = np.arange(first_replicate, first_replicate + reps, dtype=np.int64)
    if order == "listed":
        c, r, b = _listed_order(all_cells, reps, rep_range, blocks_of_cell, order)
    elif order == "blocked" or blocks_of_cell is not None:
        c, r, b = _blocked_order(rng, all_cells, rep_range, blocks_of_cell)
    else:
        c, r, b = _randomized_order(rng, n_cells, reps, rep_range)

    n_w = len(warm_c)
    runs = [_planned(first_run + pos, 0, 0, True, cell_list[ci], ci)
            for pos, ci in enumerate(warm_c.tolist())]
    runs += [_planned(first_run + n_w + pos, bi, ri, False, cell_list[ci], ci)
             for pos, (ci, ri, bi) in enumerate(zip(c.tolist(), r.tolist(), b.tolist()))]
    distinct, repeated = ((n_cells, ()) if cells is None   # a full factorial: all distinct
                          else _distinct_cells(cell_list))
    return Plan(factors=exp.factor_names, cells=distinct, seed=int(seed), order=order,
                runs=tuple(runs), info=dict(info or {}), repeated=repeated)


def _distinct_cells(cell_list) -> tuple[int, tuple]:
    """(distinct cells, the cells listed more than once with their copies): a response
    surface lists its centre several times in each replicate; those copies are replicate
    runs of one cell (Box & Wilson 1951), not further cells. (Every cell lists the
    factors in the same order, so its values are its key.)"""
    keys = [tuple(c.values()) for c in cell_list]
    distinct = set(keys)
    if len(distinct) == len(keys):
        return len(keys), ()
    copies: dict[tuple, int] = {}
    first: dict[tuple, Mapping[str, str]] = {}
    for key, c in zip(keys, cell_list):
        copies[key] = copies.get(key, 0) + 1
        first.setdefault(key, c)
    return len(copies), tuple((dict(first[k]), n) for k, n in copies.items() if n > 1)


def _listed_order(all_cells, reps, rep_range, blocks_of_cell, order):
    """``(cells, replicates, blocks)`` in the file's order: each cell's replicates back
    to back."""
    import numpy as np

    n_cells = len(all_cells)
    c = np.repeat(all_cells, reps)
    r = np.tile(rep_range, n_cells)
    b = (r if order == "blocked" else np.ones_like(r)) if blocks_of_cell is None else \
        np.array([_block(blocks_of_cell, int(ci), int(ri))
                  for ci, ri in zip(c, r)], dtype=np.int64)
    return c, r, b


def _blocked_order(rng, all_cells, rep_range, blocks_of_cell):
    """``(cells, replicates, blocks)`` run block by block: each replicate (or each design
    block of it) complete and in random order."""
    import numpy as np

    n_cells = len(all_cells)
    cs, rs, bs = [], [], []
    for rep in rep_range.tolist():
        if blocks_of_cell is None:
            perm = rng.permutation(n_cells)
            cs.append(perm)
            rs.append(np.full(n_cells, rep))
            bs.append(np.full(n_cells, rep))
        else:
            _design_blocks(rng, blocks_of_cell, n_cells, rep, cs, rs, bs)
    c = np.concatenate(cs) if cs else all_cells[:0]
    r = np.concatenate(rs) if rs else all_cells[:0]
    b = np.concatenate(bs) if bs else all_cells[:0]
    return c, r, b


def _design_blocks(rng, blocks_of_cell, n_cells, rep, cs, rs, bs) -> None:
    """One replicate of a design confounded with blocks, appended to ``cs, rs, bs``: each
    design block runs complete and in random order; the blocks of a replicate follow one
    another in random order."""
    nb = max(blocks_of_cell) + 1
    for blk in rng.permutation(nb):
        members = [ci for ci in range(n_cells) if blocks_of_cell[ci] == blk]
        for i in rng.permutation(len(members)):
            ci = members[int(i)]
            cs.append([ci])
            rs.append([rep])
            bs.append([_block(blocks_of_cell, ci, rep)])


def _randomized_order(rng, n_cells, reps, rep_range):
    """``(cells, replicates, blocks)`` in one random permutation over every timed run."""
    import numpy as np

    perm = rng.permutation(n_cells * reps)      # over (cell, replicate), replicate-major
    c = perm % n_cells if n_cells else perm
    r = rep_range[perm // n_cells] if n_cells else perm
    b = np.ones_like(c)
    return c, r, b


def _planned(pos: int, block: int, replicate: int, warmup: bool, levels, cell: int) -> PlannedRun:
    """A `PlannedRun` made without the frozen dataclass's per-field checks (a plan may
    hold a million); the levels dict is shared by every run of its cell."""
    pr = object.__new__(PlannedRun)
    pr.__dict__.update(run=pos, position=pos, block=block, replicate=replicate, warmup=warmup,
                       levels=levels, cell=cell)
    return pr


def _block(blocks_of_cell, c: int, r: int) -> int:
    """The block of cell ``c`` in replicate ``r`` of a design confounded with blocks
    (``blocks_of_cell`` given: both callers handle the plain orders themselves)."""
    nb = max(blocks_of_cell) + 1
    return (r - 1) * nb + blocks_of_cell[c] + 1
