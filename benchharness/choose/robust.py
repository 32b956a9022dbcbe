"""A default that holds up across environments: minimax regret versus best on average.

This module owns the "robust across environments" part of a choice. The
``across`` columns (machine, input kind, hardware configuration) are
conditions a default must live with, not choices. Within each environment
level every setting is compared with the best setting *of that environment*:

* loss ``L[s, e] = goodness(best in e) - goodness(s in e)`` on the analysis
  scale (>= 0); on the log scale ``exp(L)`` is the ratio to the best (1.25 =
  25 % worse than the best there);
* the minimax-regret setting minimises the worst-case loss ``max_e L[s, e]``
  (Savage 1951's minimax regret criterion);
* the best-on-average setting minimises the mean loss ``mean_e L[s, e]``, i.e.
  the geometric mean of the ratios on the log scale;
* when the two disagree, the separating environment is the one where the
  on-average setting loses most against the robust one,
  ``argmax_e (L[avg, e] - L[robust, e])``.

Point estimates only: the uncertainty of "best or tied" lives in `mcb`.
Exact ties (within 1e-12) are broken by the caller's preference order.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["RobustResult", "robust_choice"]

_EPS = 1e-12


@dataclass(frozen=True)
class RobustResult:
    loss: np.ndarray            # (settings, environments), analysis scale, >= 0
    worst_loss: np.ndarray      # (settings,)
    worst_env: np.ndarray       # (settings,) index of the environment of the worst loss
    mean_loss: np.ndarray       # (settings,)
    robust: int                 # index of the minimax-regret setting
    on_average: int             # index of the best-on-average setting
    separating_env: int | None  # index, when robust != on_average


def _argmin_with_order(values: np.ndarray, rank: np.ndarray) -> int:
    """Index of the minimum; exact ties go to the smallest ``rank``."""
    lo = float(np.min(values))
    cands = np.flatnonzero(values <= lo + _EPS)
    return int(cands[np.argmin(rank[cands])])


def robust_choice(cell_goodness, preference_rank=None) -> RobustResult:
    """Minimax-regret and best-on-average settings from cell goodness (settings x envs)."""
    g = np.asarray(cell_goodness, dtype=float)
    if g.ndim != 2 or g.size == 0:
        raise ValueError("cell_goodness must be a non-empty (settings, environments) array")
    rank = np.arange(g.shape[0]) if preference_rank is None else np.asarray(preference_rank)
    loss = g.max(axis=0, keepdims=True) - g
    worst = loss.max(axis=1)
    worst_env = loss.argmax(axis=1)
    mean = loss.mean(axis=1)
    r = _argmin_with_order(worst, rank)
    a = _argmin_with_order(mean, rank)
    sep = None
    if r != a:
        sep = int(np.argmax(loss[a] - loss[r]))
    return RobustResult(loss=loss, worst_loss=worst, worst_env=worst_env, mean_loss=mean,
                        robust=r, on_average=a, separating_env=sep)
