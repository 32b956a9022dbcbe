"""Breaking ties toward the current default, because changing a default has a cost.

This module owns the preference order among settings that the data cannot
tell apart. The *default* of each control factor is the level declared in
``choose: {prefer: {factor: level}}`` (or ``--prefer factor=level``). A
factor with no declared default has none: listing a level first says nothing
about what is in use, so its ties go to the better estimate.

Settings are ranked by, in order:

1. how many *declared* factors differ from their declared level (fewer first);
2. the estimate (better first);
3. listed order.

Among the tied settings of `mcb` the first in this order is the
recommendation.
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np

from benchharness.errors import UsageError

__all__ = ["resolve_prefer", "preference_rank"]


def resolve_prefer(prefer: Mapping[str, str] | None, control, orders) -> tuple[dict, set]:
    """Full default mapping over the control factors, and the declared factor names.

    Raises `UsageError` naming the factor or level when ``prefer`` does not fit.
    """
    prefer = dict(prefer or {})
    declared = set()
    full: dict[str, str] = {}
    for f, level in prefer.items():
        f = str(f)
        if f not in control:
            raise UsageError(f"prefer names {f!r}, which is not a control factor "
                             f"(control factors: {', '.join(control) or 'none'})")
        level = str(level)
        if level not in orders[f]:
            raise UsageError(f"prefer {f}={level}: {level!r} is not a level of {f} that was run "
                             f"(levels: {', '.join(orders[f])})")
        declared.add(f)
        full[f] = level
    for f in control:
        full.setdefault(f, orders[f][0])
    return full, declared


def preference_rank(settings, control, default: Mapping[str, str], declared,
                    goodness) -> np.ndarray:
    """Rank of each setting in the preference order (0 = most preferred)."""
    keys = []
    for i, s in enumerate(settings):
        d_decl = sum(1 for f, v in zip(control, s) if f in declared and v != default[f])
        keys.append((d_decl, -float(goodness[i]), i))
    order = sorted(range(len(settings)), key=lambda i: keys[i])
    rank = np.empty(len(settings), dtype=int)
    rank[order] = np.arange(len(settings))
    return rank
