"""Python's cyclic garbage collector held off while a plan is set up.

Setting up a large plan makes several objects per run that live as long as the
session (the planned runs, their records, `plan.csv`'s lines): half a million
at 100,000 runs. The collector starts a pass every 700 new container objects
and, every so often, walks all the older ones, so set-up spent about a quarter
of its CPU time in it (0.38 of 1.45 s before the first run at 100,000 cells,
`experiments/bench/big_plan.py`) while none of those objects is garbage.
`paused` turns it off for the set-up; `settle`, called when the runs start,
moves what set-up made into the collector's permanent generation
(``gc.freeze``: later passes do not walk it) and turns the collector back on,
so the runs go with the collector as before; the end of the block undoes both.
"""

from __future__ import annotations

import gc
from contextlib import contextmanager

_paused: list[list[bool]] = []   # per open `paused` block: [enabled before, frozen]


@contextmanager
def paused():
    """The collector off inside the block (until `settle`); restored on leaving it."""
    entry = [gc.isenabled(), False]
    _paused.append(entry)
    gc.disable()
    try:
        yield
    finally:
        del _paused[next(i for i, e in enumerate(_paused) if e is entry)]  # this one
        if entry[1]:
            gc.unfreeze()
        if entry[0]:
            gc.enable()


def settle() -> None:
    """The runs start: freeze what set-up made and turn the collector back on as it was."""
    if not _paused or _paused[0][1]:
        return
    entry = _paused[0]
    gc.freeze()
    entry[1] = True
    if entry[0]:
        gc.enable()
