"""Group-sequential repeated confidence bounds for the log slowdown ratio.

This module owns the sequential part of the regression gate: how wide the
one-sided confidence bounds must be at each look so that looking after every
block, and stopping as soon as the bounds allow a decision, does not inflate the
error rates. It implements alpha spending after Lan & DeMets (1983) with their
O'Brien-Fleming-type spending function, boundaries computed exactly for the
looks actually taken by recursive numerical integration (Armitage, McPherson &
Rowe 1969; Jennison & Turnbull 2000, ch. 19), turned into repeated confidence
bounds (Jennison & Turnbull 1989).

The math
--------
Block ``i`` (one baseline and one candidate run, back to back in random order)
gives ``d_i = log(slowdown_i)``. With block effects additive on the log scale
the difference removes them, and we model ``d_i ~ N(mu, sigma^2)`` independent;
``mu`` is the log of the true slowdown ratio. After ``n`` blocks let
``m_n`` be the mean and ``s_n`` the standard deviation of the ``d_i``.

For the true ``mu`` the score ``S_n = sum_i (d_i - mu) / sigma`` is a Gaussian
random walk and ``Z_n = S_n / sqrt(n)`` is standard normal at each ``n``, with
``corr(Z_j, Z_n) = sqrt(j / n)`` whatever ``mu`` and ``sigma`` are. Looks happen
at ``n_1 < n_2 < ... < n_K = N`` (``n_1`` = min_runs, then every block; ``N`` is
the planned horizon below). Information fraction ``t_k = n_k / N``.

Spending function (Lan & DeMets 1983, O'Brien-Fleming type), one-sided level a::

    A(t) = 2 - 2 * Phi( z_{1 - a/2} / sqrt(t) ),   A(0) = 0,  A(1) = a

Boundaries ``c_1 .. c_K`` solve, for each k,

    P( Z_j < c_j for all j < k,  Z_k >= c_k ) = A(t_k) - A(t_{k-1})

so ``P(Z_k >= c_k for some k <= K) = a`` exactly. (Under continuous monitoring
A(t) is the reflection-principle crossing probability of a flat boundary on
the score scale; with discrete looks the exact ``c_k`` are a little lower than
that flat boundary, which is what computing them buys.) The density of
``S_{n_k}`` on the continuation region is propagated look to look by
convolution with the ``N(0, n_k - n_{k-1})`` density on a grid, and ``c_k`` is
read off its upper tail.

Because ``Z_k`` is pivotal, ``L_k = m_k - c_k * sigma / sqrt(n_k)`` is a lower
confidence bound for ``mu`` that holds at all looks simultaneously:
``P(L_k > mu for some k) <= a``. By symmetry ``U_k = m_k + c_k sigma/sqrt(n_k)``
is a simultaneous upper bound. Any stopping rule built from ``L`` and ``U``
(the gate stops at the first look where ``L_k > log(1+tol)`` or
``U_k < log(1+tol)``) therefore keeps each one-sided error at most ``a``,
however the stopping time depends on the data.

Unknown ``sigma``: ``sigma`` is replaced by ``s_k`` and ``c_k`` by the Student
t quantile with the same one-sided tail, ``F^{-1}_{t, n_k - 1}(Phi(c_k))``
(the significance-level matching approximation, Jennison & Turnbull 2000, on
normal data with unknown variance).

Horizon ``N`` (information-based monitoring, Mehta & Tsiatis 2001): the number
of blocks a fixed-size one-sided paired t-test at level ``a`` needs for power
``1 - beta`` at the design distance ``delta`` (the gate uses the distance from
``1 + tol`` to ``1 + 2 tol`` on the log scale), times a factor ``H`` that leaves
room for the sequential looks, capped at the budget; recomputed from ``s_k`` at
every look. When ``n_k >= N`` the whole level has been spent: that look is
final.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache

# Looks are taken after every block up to this many looks; longer horizons look
# every g-th block so a boundary table stays cheap to compute.
MAX_LOOKS = 120
# Smallest amount of level worth spending at a look (below: no decision possible).
_TINY = 1e-12


def obf_spending(t: float, alpha: float) -> float:
    """Lan & DeMets (1983) O'Brien-Fleming-type spending function, one-sided level alpha."""
    from scipy.stats import norm

    if t <= 0:
        return 0.0
    if t >= 1:
        return alpha
    return float(2.0 - 2.0 * norm.cdf(norm.ppf(1.0 - alpha / 2.0) / math.sqrt(t)))


def look_schedule(first: int, horizon: int) -> tuple[int, ...]:
    """Block counts at which the gate looks: ``first``, then every g-th block, ending at ``horizon``."""
    first = max(2, int(first))
    horizon = max(first, int(horizon))
    g = max(1, math.ceil((horizon - first) / (MAX_LOOKS - 1)))
    looks = list(range(first, horizon, g))
    if not looks or looks[-1] != horizon:
        looks.append(horizon)
    return tuple(looks)


@lru_cache(maxsize=4096)
def boundaries(looks: tuple[int, ...], alpha: float, horizon: int | None = None,
               cells_per_sd: int = 24) -> tuple[float, ...]:
    """Z-scale boundaries ``c_k`` for the given looks (block counts), spending ``obf_spending``.

    ``horizon`` (default: the last look) sets the information fractions
    ``t_k = n_k / horizon``. ``inf`` marks a look where nothing can be spent yet.
    Recursive numerical integration on the score scale (Armitage, McPherson &
    Rowe 1969).
    """
    import numpy as np
    from scipy.stats import norm

    looks = tuple(int(n) for n in looks)
    if any(b <= a for a, b in zip(looks, looks[1:])) or looks[0] < 1:
        raise ValueError("looks must be increasing positive block counts")
    N = horizon or looks[-1]
    incs = [b - a for a, b in zip(looks, looks[1:])]
    h = math.sqrt(min(incs + [looks[0]])) / cells_per_sd
    reach = 9.0 * math.sqrt(looks[-1])
    x = np.arange(-reach, reach + h, h)

    out: list[float] = []
    # first look: S ~ N(0, n1), tail known in closed form
    n1 = looks[0]
    a1 = obf_spending(n1 / N, alpha)
    if a1 <= _TINY:
        out.append(math.inf)
        mass = norm.pdf(x, scale=math.sqrt(n1)) * h  # probability mass per cell
    else:
        c = float(norm.isf(a1))
        out.append(c)
        mass = norm.pdf(x, scale=math.sqrt(n1)) * h
        mass = _truncate(mass, x, h, c * math.sqrt(n1))
    spent = a1 if a1 > _TINY else 0.0
    kernels: dict[int, np.ndarray] = {}
    for k in range(1, len(looks)):
        inc = looks[k] - looks[k - 1]
        ker = kernels.get(inc)
        if ker is None:
            half = int(math.ceil(8.0 * math.sqrt(inc) / h))
            u = np.arange(-half, half + 1) * h
            ker = norm.pdf(u, scale=math.sqrt(inc)) * h
            ker = ker / ker.sum()
            kernels[inc] = ker
        mass = np.convolve(mass, ker, mode="same")
        target = obf_spending(looks[k] / N, alpha) if looks[k] < N else alpha
        want = target - spent
        if want <= _TINY:
            out.append(math.inf)
            continue
        b = _tail_point(mass, x, h, want)
        out.append(b / math.sqrt(looks[k]))
        mass = _truncate(mass, x, h, b)
        spent = target
    return tuple(out)


def _truncate(mass, x, h, b):
    """Keep the mass of cells below score ``b`` (the boundary cell pro rata)."""
    import numpy as np

    lo = x - h / 2.0
    keep = np.clip((b - lo) / h, 0.0, 1.0)
    return mass * keep


def _tail_point(mass, x, h, want):
    """Score ``b`` such that the mass above ``b`` is ``want`` (cells uniform inside)."""
    import numpy as np

    tail = np.cumsum(mass[::-1])[::-1]  # tail[i] = mass of cells i.. (from lower edge of cell i)
    total = float(tail[0])
    if want >= total:
        return float(x[0] - h / 2.0)
    # find the cell i with tail[i] >= want > tail[i+1]
    i = int(np.searchsorted(-tail, -want, side="right")) - 1
    i = max(0, min(i, len(x) - 1))
    above = float(tail[i + 1]) if i + 1 < len(x) else 0.0
    frac = (want - above) / float(mass[i]) if mass[i] > 0 else 0.0
    upper_edge = x[i] + h / 2.0
    return float(upper_edge - frac * h)


def fixed_pairs(alpha: float, beta: float, d: float, cap: int = 10**6) -> int:
    """Blocks a fixed-size one-sided paired t-test at level alpha needs for power 1-beta.

    ``d = delta / sigma`` is the standardized distance between the null and the
    alternative. Power from the noncentral t distribution (scipy.stats.nct).
    """
    from scipy.stats import nct, norm, t

    if not d > 0:
        return cap
    za, zb = norm.isf(alpha), norm.isf(beta)
    n = max(2, int(((za + zb) / d) ** 2))
    # normal approximation is a lower bound for the t-test: walk up from it
    while n < cap:
        crit = t.isf(alpha, n - 1)
        power = nct.sf(crit, n - 1, d * math.sqrt(n))
        if power >= 1.0 - beta:
            return n
        n += 1
    return cap


@lru_cache(maxsize=65536)
def _fixed_pairs_cached(alpha: float, beta: float, d: float, cap: int) -> int:
    return fixed_pairs(alpha, beta, d, cap)


@dataclass(frozen=True)
class SequentialDesign:
    """The look-by-look rule: one-sided level, design distance, horizon factor, budget.

    ``alpha`` is the one-sided level of each bound (after any Bonferroni split),
    ``delta`` the design distance on the log scale, ``beta`` the design miss
    rate there, ``horizon_factor`` H, ``first`` the first look (blocks) and
    ``max_blocks`` the budget.
    """

    alpha: float
    delta: float
    beta: float = 0.05
    horizon_factor: float = 1.3
    first: int = 6
    max_blocks: int = 100

    def horizon(self, sd: float) -> int:
        """Planned number of blocks for this noise level (capped at the budget)."""
        if not sd > 0:
            return max(2, self.first)
        nf = _fixed_pairs_cached(self.alpha, self.beta, round(self.delta / sd, 4),
                                 10 * self.max_blocks + 10)
        return int(min(self.max_blocks, max(self.first, math.ceil(self.horizon_factor * nf))))

    def critical(self, n: int, sd: float) -> tuple[float, int, bool]:
        """(t-scale multiplier of s/sqrt(n), horizon, final) at ``n`` blocks; inf when no look.

        ``final`` is true when this look spends the rest of the level (n reached
        the horizon or the budget).
        """
        from scipy.stats import norm, t

        first = max(2, self.first)
        if n < first:
            return math.inf, self.horizon(sd), False
        N = self.horizon(sd)
        final = n >= N or n >= self.max_blocks
        if n >= N:
            N = n
        looks = look_schedule(first, N)
        if n not in looks:
            return math.inf, N, final
        idx = looks.index(n)
        c = boundaries(looks, round(self.alpha, 15))[idx]
        if not math.isfinite(c):
            return math.inf, N, final
        ct = float(t.isf(norm.sf(c), n - 1))
        return ct, N, final
