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
    cells: int
    seed: int
    order: str
    runs: tuple[PlannedRun, ...]
    info: Mapping[str, object] = field(default_factory=dict)  # design facts (aliases, ...)

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
    from numpy.random import Generator, PCG64

    if seed is None:
        seed = exp.seed if exp.seed is not None else draw_seed()
    rng = Generator(PCG64(seed))
    cell_list = [dict(c) for c in (cells if cells is not None else full_factorial_cells(exp))]
    n_cells = len(cell_list)
    reps = exp.replicates if replicates is None else replicates
    n_warm = exp.warmup if warmup is None else warmup
    order = exp.order

    # (cell index, replicate, block, warmup)
    warm: list[tuple[int, int, int, bool]] = [(c, 0, 0, True)
                                             for _ in range(n_warm) for c in range(n_cells)]
    if order != "listed":
        warm = [warm[i] for i in rng.permutation(len(warm))] if warm else []

    timed: list[tuple[int, int, int, bool]] = []
    rep_range = range(first_replicate, first_replicate + reps)
    if order == "listed":
        for c in range(n_cells):
            for r in rep_range:
                timed.append((c, r, _block(blocks_of_cell, c, r, order), False))
    elif order == "blocked" or blocks_of_cell is not None:
        for r in rep_range:
            if blocks_of_cell is None:
                perm = rng.permutation(n_cells)
                timed.extend((int(c), r, r, False) for c in perm)
            else:
                # Each design block runs complete and in random order; blocks of a
                # replicate follow one another in random order.
                nb = max(blocks_of_cell) + 1
                for b in rng.permutation(nb):
                    members = [c for c in range(n_cells) if blocks_of_cell[c] == b]
                    for i in rng.permutation(len(members)):
                        c = members[int(i)]
                        timed.append((c, r, _block(blocks_of_cell, c, r, order), False))
    else:
        allr = [(c, r) for r in rep_range for c in range(n_cells)]
        for i in rng.permutation(len(allr)):
            c, r = allr[int(i)]
            timed.append((c, r, 1, False))

    runs = []
    for pos, (c, r, b, w) in enumerate(warm + timed):
        runs.append(PlannedRun(run=first_run + pos, position=first_run + pos, block=b,
                               replicate=r, warmup=w, levels=cell_list[c], cell=c))
    return Plan(factors=exp.factor_names, cells=n_cells, seed=int(seed), order=order,
                runs=tuple(runs), info=dict(info or {}))


def _block(blocks_of_cell, c: int, r: int, order: str) -> int:
    if blocks_of_cell is None:
        return r if order == "blocked" else 1
    nb = max(blocks_of_cell) + 1
    return (r - 1) * nb + blocks_of_cell[c] + 1
