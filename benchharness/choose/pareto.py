"""Trade-offs between responses: the Pareto front with a practical margin.

This module owns the trade-off part of a choice (``--also``). A setting *a*
leaves the front when some other setting *b*

* is better than *a* on at least one response by more than the margin, with
  confidence: the lower bound of ``g_b - g_a`` is above ``delta``; and
* is not worse than *a* on any response beyond the margin, with confidence:
  the upper bound of ``g_a - g_b`` is at most ``delta`` on every response.

``delta`` is the practical margin (``--within``, default 3 %): ``log(1 +
within)`` on the log scale (a ratio), ``within`` times the mean size of the
settings' means on the original scale. A difference smaller than the margin
does not count either way, so a setting 12.9x slower with the same memory
leaves the front, while a fast but memory-hungry setting and a lean but
slower one both stay. With a margin of 0 the rule is the strict one: *b*
better on every response with confidence.

The bounds come from Tukey-Kramer intervals (Tukey 1953; Kramer 1956): the
studentized range quantile over sqrt(2), ``q``, gives two-sided intervals
``g_b - g_a +- q * sigma * sqrt(w_a + w_b)`` for every pair of a response at
once. Across the ``R`` responses the level is split Bonferroni-style
(``alpha / R`` each), so every bound used holds together with probability at
least ``1 - alpha``. Tukey-Kramer is conservative for unequal weights (Hayter
1984), which only keeps more settings on the front. With a margin,
"better" is not transitive; if every setting were beaten by another (a
cycle), the one with the best first response is kept so the front is never
empty.
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
    margins: tuple[float, ...] = ()         # delta per response, analysis scale


def margin_of(model, within: float) -> float:
    """The practical margin of a response on its analysis scale."""
    if within <= 0:
        return 0.0
    if model.scale == "log":
        return float(np.log1p(within))
    return float(within * np.mean(np.abs(model.setting_means)))


def pareto_front(models, confidence: float = 0.95, within: float = 0.0) -> ParetoResult:
    """Confident Pareto front over `ResponseModel`s sharing the same settings.

    ``within``: the practical margin (a fraction, 0.03 for 3 %).
    """
    models = list(models)
    if not models:
        raise ValueError("need at least one response")
    k = len(models[0].settings)
    for m in models[1:]:
        if m.settings != models[0].settings:
            raise ValueError("responses must cover the same settings")
    R = len(models)
    per_conf = 1.0 - (1.0 - confidence) / R
    better_somewhere = np.zeros((k, k), dtype=bool)  # [b, a]: b better beyond the margin
    never_worse = np.ones((k, k), dtype=bool)        # [b, a]: a never better beyond it
    qs, margins = [], []
    for m in models:
        q = tukey_allowance(int(k), float(m.df), float(per_conf))
        qs.append(q)
        delta = margin_of(m, within)
        margins.append(delta)
        g = m.goodness
        w = m.weights
        diff = g[:, None] - g[None, :]                 # g_b - g_a
        half = q * m.sigma * np.sqrt(w[:, None] + w[None, :])
        better_somewhere |= (diff - half) > delta
        never_worse &= (-diff + half) <= delta
    beats = better_somewhere & never_worse
    np.fill_diagonal(beats, False)
    kept = ~beats.any(axis=0)
    if not kept.any():
        kept[int(np.argmax(models[0].goodness))] = True
    dominated_by: list[int | None] = []
    for a in range(k):
        winners = np.flatnonzero(beats[:, a])
        if winners.size == 0 or kept[a]:
            dominated_by.append(None)
            continue
        on_front = winners[kept[winners]]
        dominated_by.append(int(on_front[0] if on_front.size else winners[0]))
    front = tuple(int(i) for i in np.flatnonzero(kept))
    return ParetoResult(front=front, dominated_by=tuple(dominated_by),
                        allowance=tuple(qs), per_response_confidence=per_conf,
                        margins=tuple(margins))
