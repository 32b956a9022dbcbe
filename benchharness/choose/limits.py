"""Limits on a choice: "the fastest whose max_rss_kib is within 5% of the smallest".

This module owns constrained choices. A limit is written in one plain form::

    RESPONSE within P%          e.g.  max_rss_kib within 5%
                                      wall_s within 10%

and means: only settings whose RESPONSE is within P% of the best setting on
that response may be chosen (the best in the response's own direction: the
smallest memory, the fastest time, the highest throughput). ``choose`` then
picks the best on its own ``--response`` among those settings, so "the
smallest output among those within 10% of the fastest time" is
``--response out_bytes --limit "wall_s within 10%"``.

How a setting is judged: with Hsu's constrained multiple comparisons with the
best (Hsu 1984) on the limit's response, each setting gets an upper bound on
how much worse than the best of the others it can be. A setting meets the
limit when that bound is within the margin (``log(1 + P)`` on the log scale,
P times the mean size of the settings' means on the original scale): it is
*shown* within the limit at the chosen confidence. When the data are too
noisy to show any setting within it, the estimates decide instead and the
choice says so.
"""

from __future__ import annotations

from benchharness.numbers import plural

import re
from dataclasses import dataclass

import numpy as np

from benchharness.errors import DataError, UsageError

__all__ = ["Limit", "parse_limit", "apply_limits"]

_FORM = re.compile(r"^\s*(?P<resp>[A-Za-z_][A-Za-z0-9_.\-]*)\s+within\s+(?P<p>\S+?)\s*"
                   r"(?:of\s+(?:the\s+)?(?:best|smallest|lowest|fastest|largest|highest))?\s*$",
                   re.IGNORECASE)


@dataclass(frozen=True)
class Limit:
    """``response`` must be within ``within`` (a fraction) of the best setting's."""

    response: str
    within: float
    text: str


def parse_limit(text: str) -> Limit:
    """A `Limit` from ``"max_rss_kib within 5%"``; `UsageError` with the form otherwise."""
    from benchharness.experiment.yamlnodes import parse_percent

    m = _FORM.match(str(text))
    if not m:
        raise UsageError(f"limit {text!r}: write RESPONSE within P%, e.g. "
                         "\"max_rss_kib within 5%\"")
    p = m.group("p")
    value = parse_percent(p) if p.endswith("%") else None
    if value is None or not np.isfinite(value) or value < 0:
        raise UsageError(f"limit {text!r}: {p!r} is not a percentage; write e.g. 5%")
    return Limit(response=m.group("resp"), within=float(value),
                 text=f"{m.group('resp')} within {p}")


def apply_limits(limits, models, confidence: float):
    """Judge every setting against every limit.

    ``models``: one `ResponseModel` per limit (same settings). Returns
    ``(results, eligible)``: per limit a dict (``text``, ``response``,
    ``within``, ``scale``, ``confident``, ``best`` index, ``worst_ratio`` /
    ``worst_excess`` upper bounds per setting, ``meets`` per setting) and the
    indexes of the settings that meet every limit. Raises `DataError` when no
    setting meets them all.
    """
    from benchharness.choose.mcb import mcb
    from benchharness.choose.pareto import margin_of

    results = []
    k = len(models[0].settings) if models else 0
    ok = np.ones(k, dtype=bool)
    for lim, m in zip(limits, models):
        g = m.goodness
        res = mcb(g, m.weights, m.sigma, m.df, confidence)
        worst = np.maximum(-np.asarray(res.low, dtype=float), 0.0)  # how much worse, at most
        delta = margin_of(m, lim.within)
        meets = worst <= delta + 1e-12
        confident = bool(meets.any())
        estimate = g.max() - g
        if not confident:
            meets = estimate <= delta + 1e-12
        is_log = m.scale == "log"
        results.append({
            "text": lim.text, "response": lim.response, "within": lim.within,
            "better": m.better, "scale": m.scale, "confident": confident,
            "best": int(np.argmax(g)),
            "worst_ratio": [float(np.exp(x)) for x in worst] if is_log else None,
            "worst_excess": None if is_log else [float(x) for x in worst],
            "estimate_ratio": [float(np.exp(x)) for x in estimate] if is_log else None,
            "meets": [bool(x) for x in meets],
        })
        ok &= meets
    eligible = [int(i) for i in np.flatnonzero(ok)]
    if limits and not eligible:
        raise DataError("no setting meets every limit ("
                        + "; ".join(f"{r['text']}: {plural(sum(r['meets']), 'setting')}"
                                    for r in results)
                        + "); loosen one of them")
    return results, eligible
