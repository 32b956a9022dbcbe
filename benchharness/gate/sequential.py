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

Unknown ``sigma``: the gate uses the t statistics ``T_k = sqrt(n_k) (m_k -
mu) / s_k`` (or, by default, the studentized outlier-resistant location of
`benchharness.gate.robust`, whose law is equally free of ``mu`` and ``sigma``;
`SpendingTracker(statistic="robust")` simulates it on the same raw paths). Their joint law at the looks is free of ``mu`` and ``sigma``, so
boundaries ``b_k`` with the same spending,
``P(T_j < b_j, j < k; T_k >= b_k) = A(t_k) - A(t_{k-1})``, are found on a fixed
set of seeded simulated null paths (`t_boundaries`, `SpendingTracker`): at each
look, the empirical upper quantile of the paths still inside. This is exact up
to simulation error (60,000 paths), where matching each look's significance
level to a t quantile (Jennison & Turnbull 2000) was measured here to run
about 10% over the level at 5-15 blocks. The normal-theory ``c_k`` above
(`boundaries`) are kept as the known-variance reference.

Horizon ``N`` (information-based monitoring, Mehta & Tsiatis 2001): the blocks
a fixed-size one-sided paired t-test at level ``a`` needs for power ``1 - beta``
at the design distance ``delta`` (the gate: the log distance from ``1 + tol``
to ``1 + 2 tol``), Guenther's (1981) approximation
``((z_a + z_beta) / (delta / sigma))^2 + z_a^2 / 2`` (the gate: beta = 0.05), times
a factor ``H`` (the gate: 0.7, tuned by simulation for the power at 1 + 2 tol),
capped at the budget. ``sigma`` is planned as in an internal pilot design
(Wittes & Brittain 1990): during the first 16 blocks (the pilot) the horizon
follows the current noise estimate (the spread about ``mu0``, below) but is
never planned below 16 blocks; from 16 blocks on it follows the largest such
estimate seen at any look from there (it may grow, never shrink). It is re-planned at every look. When ``n_k >= N`` the whole
level is spent: that look is final. What earlier looks really spent is counted
on the same null paths under the boundaries really used (`SpendingTracker`), so
a moving horizon never makes the total exceed ``a`` *for a given horizon path*.

Residual: ``N`` is planned from a noise estimate while ``T_k`` has ``s_k`` in
its denominator. Planned from ``s`` itself (the rule before 2026-12-05), a small
``s`` both inflated ``T`` and shortened the horizon, and the steep
O'Brien-Fleming-type function then spent far more level at that look (at block
8, a horizon of 16 instead of 31 spends about 100 times as much): at noise CV
5% about half the false fails at the boundary ratio came before block 16, against
a tenth with the horizon from the true noise. The gate therefore plans ``N`` from
the spread of the ``d_i`` about the value both bounds test, ``mu0 = log(1 +
tol)``: under ``mu = mu0`` the studentized statistics up to a look depend only on
the direction of ``d - mu0``, and its length is independent of that direction
(Basu 1955), so the horizon no longer shrinks on the paths where the statistic
is inflated (`benchharness.gate.decide._planning_noise`; the distance to
``mu0`` counts up to the design distance). With the pilot's floor the bounds
spend ``0.6 a`` (`GateSettings.level_calibration`, chosen for the earlier rule
as the worst-case adjusted level of Kieser & Friede 2000 over noise CVs 2-12%,
and kept). `benchharness.gate.calibrate` simulates the whole rule on paths that
each carry their own noise estimate and horizon
(``experiments/bench/gate_validation.py --sections calibrate,rule``).
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
    """Lan & DeMets (1983) O'Brien-Fleming-type spending function, one-sided level alpha.

    ``2 - 2 Phi(z / sqrt(t))`` is written ``erfc(z / sqrt(2 t))`` (the same number,
    without cancellation); it is called at every look, so it avoids scipy.
    """
    if t <= 0:
        return 0.0
    if t >= 1:
        return alpha
    return math.erfc(_upper_z(alpha / 2.0) / math.sqrt(2.0 * t))


@lru_cache(maxsize=256)
def _upper_z(p: float) -> float:
    """The standard normal quantile with upper tail p."""
    from statistics import NormalDist

    return NormalDist().inv_cdf(1.0 - p)


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


@lru_cache(maxsize=4096)
def t_boundaries(looks: tuple[int, ...], alpha: float, horizon: int | None = None,
                 paths: int = 60_000, seed: int = 19830101) -> tuple[float, ...]:
    """Boundaries for the one-sample t statistics at the looks, spending ``obf_spending``.

    Under ``mu`` = the value tested, the joint law of the t statistics
    ``T_k = sqrt(n_k) (m_k - mu) / s_k`` at all looks is free of ``mu`` and
    ``sigma``, so boundaries with ``P(T_j < b_j, j < k; T_k >= b_k) = A(t_k) -
    A(t_{k-1})`` can be found once by simulating that law: ``paths`` seeded
    Gaussian paths, and at each look the empirical upper quantile of the paths
    still inside. The paths' t statistics after every block are simulated
    once and shared by all tables (for long horizons they are drawn look by
    look: the increment's sum is N(0, inc) and, given it, its sum of squares
    about its mean is chi-square with inc - 1 df). Deterministic for a seed.
    """
    import numpy as np

    looks = tuple(int(n) for n in looks)
    if looks[0] < 2 or any(b <= a for a, b in zip(looks, looks[1:])):
        raise ValueError("looks must be increasing block counts >= 2")
    N = horizon or looks[-1]
    if looks[-1] <= _PATH_CACHE_MAX:
        # the same seeded paths whatever the horizon: tables share them
        upto = next(u for u in (20, 40, 80, _PATH_CACHE_MAX) if u >= looks[-1])
        table = _null_t_paths(paths, seed, upto)
        columns = (table[:, n] for n in looks)
    else:
        columns = _null_t_stream(looks, paths, seed)
    alive = np.ones(paths, dtype=bool)
    spent_count = 0
    out: list[float] = []
    for n, tstat in zip(looks, columns):
        target = obf_spending(n / N, alpha) if n < N else alpha
        want = int(round(target * paths)) - spent_count
        if want <= 0:
            out.append(math.inf)
            continue
        cand = tstat[alive]
        if want >= cand.size:
            out.append(-math.inf)
            alive[:] = False
            spent_count += cand.size
            continue
        # the want-th largest value among paths still inside, and the next one
        part_sorted = np.partition(cand, cand.size - want - 1)
        hi = np.min(part_sorted[cand.size - want:])
        lo = part_sorted[cand.size - want - 1]
        b = float((float(hi) + float(lo)) / 2.0)
        out.append(b)
        alive &= ~(tstat >= b)
        spent_count += want
    return tuple(out)


_PATH_CACHE_MAX = 160


@lru_cache(maxsize=4)
def _null_t_paths(paths: int, seed: int, upto: int):
    """t statistics of ``paths`` seeded null paths after every block n = 0..upto (column n).

    Draws block by block (row n holds every path's n-th block), so a longer
    table extends a shorter one with the same seed: all tables share paths.
    """
    import numpy as np

    rng = np.random.default_rng(seed)
    x = rng.standard_normal((upto, paths))
    n = np.arange(1, upto + 1)[:, None]
    total = np.cumsum(x, axis=0)
    x *= x
    sumsq = np.cumsum(x, axis=0)
    del x
    mean = total / n
    sumsq -= n * mean * mean
    var = np.maximum(sumsq / np.maximum(n - 1, 1), 1e-300)
    t = mean * np.sqrt(n / var)
    t[0, :] = 0.0
    return np.concatenate([np.zeros((1, paths)), t], axis=0).T


def _null_t_stream(looks, paths, seed):
    """t statistics of seeded null paths at the looks, computed look by look (long horizons)."""
    import numpy as np

    rng = np.random.default_rng(seed)
    total = np.zeros(paths)
    sumsq = np.zeros(paths)
    prev = 0
    for n in looks:
        inc = n - prev
        part = rng.standard_normal(paths) * np.sqrt(inc)
        within = rng.chisquare(inc - 1, paths) if inc > 1 else 0.0
        total += part
        sumsq += part * part / inc + within
        prev = n
        mean = total / n
        var = np.maximum((sumsq - n * mean * mean) / (n - 1), 1e-300)
        yield mean * np.sqrt(n / var)


_RAW_CHUNK = 160


@lru_cache(maxsize=1)
def _null_raw(paths: int, seed: int, rows: int):
    """``rows`` x ``paths`` seeded standard normal draws (float32): the raw null paths.

    A longer table starts with the rows of a shorter one (same seed, drawn row
    by row), so the paths stay the same whatever length is asked for.
    """
    import numpy as np

    rng = np.random.default_rng(seed)
    return rng.standard_normal((rows, paths), dtype=np.float32)


@lru_cache(maxsize=1024)
def null_robust_column(paths: int, seed: int, n: int):
    """Studentized robust statistics (`benchharness.gate.robust`) of the null paths after n blocks."""
    import numpy as np

    from benchharness.gate.robust import robust_t

    rows = -(-n // _RAW_CHUNK) * _RAW_CHUNK
    raw = _null_raw(paths, seed, rows)
    out = np.empty(paths)
    step = 8192
    for a in range(0, paths, step):
        out[a:a + step] = robust_t(raw[:n, a:a + step].T.astype(np.float64))
    return out


class SpendingTracker:
    """Alpha spent so far by one sequential test, on the shared simulated null paths.

    Information-based monitoring (Lan & DeMets 1983; Mehta & Tsiatis 2001):
    at each look ``n`` with the current horizon ``N`` the test may have spent
    ``A(n / N)`` in total (all of ``alpha`` at a final look). What was really
    spent at earlier looks is counted on the same seeded null t paths that
    `t_boundaries` uses, under the boundaries actually applied, so a horizon
    that moves between looks never makes the total exceed ``alpha``.
    """

    def __init__(self, alpha: float, paths: int = 60_000, seed: int = 19830101,
                 statistic: str = "t"):
        if statistic not in ("t", "robust"):
            raise ValueError("statistic must be 't' or 'robust'")
        self.statistic = statistic
        self.plan_sd = 0.0          # largest noise estimate seen at any look (horizon ratchet)
        self.timing_pass = None     # a pass by the timings held back for the failure question
        self.alpha = float(alpha)
        self.paths = int(paths)
        self.seed = int(seed)
        self.alive = None
        self.spent_count = 0
        self.looks: list[tuple[int, int, float]] = []   # (n, N, boundary)
        self._stream = None

    @property
    def spent(self) -> float:
        return self.spent_count / self.paths

    def fork(self) -> "SpendingTracker":
        """A copy that goes on spending on its own from here (its own record of the looks
        and of the paths still alive), as a path whose horizon parts from the others'
        needs (`benchharness.gate.calibrate.gate_rule_outcomes`)."""
        import copy

        twin = copy.copy(self)
        twin.alive = None if self.alive is None else self.alive.copy()
        twin.looks = list(self.looks)
        return twin

    def _column(self, n: int):
        import numpy as np

        if self.statistic == "robust":
            return null_robust_column(self.paths, self.seed, n)
        if n <= _PATH_CACHE_MAX:
            upto = next(u for u in (20, 40, 80, _PATH_CACHE_MAX) if u >= n)
            return _null_t_paths(self.paths, self.seed, upto)[:, n]
        st = self._stream
        if st is None:
            rng = np.random.default_rng(self.seed)
            x = rng.standard_normal((_PATH_CACHE_MAX, self.paths))
            st = self._stream = {"rng": rng, "n": _PATH_CACHE_MAX, "total": x.sum(axis=0),
                                 "sumsq": (x * x).sum(axis=0)}
            del x
        while st["n"] < n:
            x = st["rng"].standard_normal(self.paths)
            st["total"] += x
            st["sumsq"] += x * x
            st["n"] += 1
        mean = st["total"] / n
        var = np.maximum((st["sumsq"] - n * mean * mean) / (n - 1), 1e-300)
        return mean * np.sqrt(n / var)

    def boundary(self, n: int, horizon: int, final: bool = False) -> float:
        """t-scale boundary at ``n`` blocks (inf: nothing to spend yet). Idempotent per n."""
        import numpy as np

        if self.looks and self.looks[-1][0] == n:
            return self.looks[-1][2]
        if self.looks and n < self.looks[-1][0]:
            raise ValueError("looks must come in increasing block counts")
        if n < 2:
            return math.inf
        if self.alive is None:
            self.alive = np.ones(self.paths, dtype=bool)
        target = self.alpha if (final or n >= horizon) else obf_spending(n / horizon, self.alpha)
        want = int(round(target * self.paths)) - self.spent_count
        if want <= 0:
            self.looks.append((n, horizon, math.inf))
            return math.inf
        tstat = self._column(n)
        cand = tstat[self.alive]
        if want >= cand.size:
            b = -math.inf
        else:
            part = np.partition(cand, cand.size - want - 1)
            b = float((float(np.min(part[cand.size - want:])) + float(part[cand.size - want - 1]))
                      / 2.0)
        crossed = self.alive & (tstat >= b)
        self.spent_count += int(crossed.sum())
        self.alive &= ~crossed
        self.looks.append((n, horizon, b))
        return b


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


@lru_cache(maxsize=256)
def _z(p: float) -> float:
    from scipy.stats import norm

    return float(norm.isf(p))


def approx_fixed_pairs(alpha: float, beta: float, d: float) -> float:
    """Guenther's (1981) approximation of `fixed_pairs`: ((z_a + z_b)/d)^2 + z_a^2/2.

    Used for planning the horizon at every look (fast; within a block of the
    exact noncentral-t answer).
    """
    if not d > 0:
        return math.inf
    za, zb = _z(alpha), _z(beta)
    return ((za + zb) / d) ** 2 + za * za / 2.0


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
        nf = approx_fixed_pairs(self.alpha, self.beta, self.delta / sd)
        if not math.isfinite(nf):
            return self.max_blocks
        return int(min(self.max_blocks, max(self.first, math.ceil(self.horizon_factor * nf))))

    def critical(self, n: int, sd: float, plan_sd: float | None = None
                 ) -> tuple[float, int, bool]:
        """(t-scale multiplier of s/sqrt(n), horizon, final) at ``n`` blocks; inf when no look.

        ``final`` is true when this look spends the rest of the level (n reached
        the horizon or the budget).
        """
        first = max(2, self.first)
        N = self.horizon(sd if plan_sd is None else plan_sd)
        if n < first:
            return math.inf, N, False
        final = n >= N or n >= self.max_blocks
        if n >= N:
            N = n
        looks = look_schedule(first, N)
        if n not in looks:
            return math.inf, N, final
        idx = looks.index(n)
        ct = t_boundaries(looks, round(self.alpha, 15))[idx]
        return ct, N, final
