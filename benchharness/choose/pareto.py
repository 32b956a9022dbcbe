"""Trade-offs between responses: the Pareto front, dropping only confident losers.

This module owns the trade-off part of a choice (``--also``). A setting is
dropped from the front only when some other setting beats it on *every*
response with confidence; everything else stays on the front, so a fast but
memory-hungry setting and a lean but slower one both remain.

"Beats with confidence" on one response: the one-sided lower bound of the
goodness difference ``g_b - g_a`` is above zero,
``g_b - g_a - q * sigma * sqrt(w_a + w_b) > 0``, where ``q`` is the
Tukey-Kramer allowance (Tukey 1953; Kramer 1956): the studentized range
quantile divided by sqrt(2). The studentized range bounds every pairwise
difference in both directions at once, so it covers all ordered one-sided
claims of a response simultaneously. Across the ``R`` responses the level is
split Bonferroni-style (``alpha / R`` each), so the chance that any setting is
wrongly dropped is at most ``alpha``. Tukey-Kramer is conservative for
unequal weights (Hayter 1984), which only keeps more settings on the front.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

import numpy as np

__all__ = ["ParetoResult", "pareto_front", "tukey_allowance"]


@lru_cache(maxsize=1024)
def tukey_allowance(k: int, df: float, confidence: float) -> float:
    """The studentized-range quantile over sqrt(2) for k means."""
    from scipy.stats import studentized_range

    if k < 2:
        return 0.0
    if not np.isfinite(df):
        # infinite df: the range of k standard normals; a large df is the
        # same distribution to within ~1e-6.
        df = 1e6
    return float(studentized_range.ppf(confidence, k, df) / np.sqrt(2.0))


@dataclass(frozen=True)
class ParetoResult:
    front: tuple[int, ...]                  # indexes of settings kept
    dominated_by: tuple[int | None, ...]    # for a dropped setting, one setting that beats it
    allowance: tuple[float, ...]            # q per response
    per_response_confidence: float


def pareto_front(models, confidence: float = 0.95) -> ParetoResult:
    """Confident Pareto front over `ResponseModel`s sharing the same settings."""
    models = list(models)
    if not models:
        raise ValueError("need at least one response")
    k = len(models[0].settings)
    for m in models[1:]:
        if m.settings != models[0].settings:
            raise ValueError("responses must cover the same settings")
    R = len(models)
    per_conf = 1.0 - (1.0 - confidence) / R
    beats = np.ones((k, k), dtype=bool)  # beats[b, a]: b beats a on all responses
    qs = []
    for m in models:
        q = tukey_allowance(int(k), float(m.df), float(per_conf))
        qs.append(q)
        g = m.goodness
        w = m.weights
        lower = (g[:, None] - g[None, :]) - q * m.sigma * np.sqrt(w[:, None] + w[None, :])
        beats &= lower > 0
    np.fill_diagonal(beats, False)
    kept = ~beats.any(axis=0)
    dominated_by: list[int | None] = []
    for a in range(k):
        winners = np.flatnonzero(beats[:, a])
        if winners.size == 0:
            dominated_by.append(None)
            continue
        on_front = winners[kept[winners]]
        dominated_by.append(int(on_front[0] if on_front.size else winners[0]))
    front = tuple(int(i) for i in np.flatnonzero(kept))
    return ParetoResult(front=front, dominated_by=tuple(dominated_by),
                        allowance=tuple(qs), per_response_confidence=per_conf)
