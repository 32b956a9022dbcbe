"""Step changes in a cell's history: where did its level shift, by how much, for good?

Owns the detection of steps in a series of per-commit log means, each with its
own uncertainty, and the splitting of a series at known breaks (a change of host
fingerprint). The method, on the points measured on one host:

1. **Per-point variance.** Each point is the mean of ``n`` logged timings with
   sample SD ``s``. The SDs are moderated towards a common value by the
   empirical-Bayes method of Smyth (2004, "Linear models and empirical Bayes
   methods for assessing differential expression in microarray experiments",
   Stat. Appl. Genet. Mol. Biol. 3(1)): ``s~^2 = (d0 s0^2 + df s^2)/(d0 + df)``
   with ``s0, d0`` fitted by moments of ``log s^2``. A point with five runs and a
   lucky small SD no longer gets an outsized weight.
2. **Session-to-session noise.** Timings from different sessions scatter more
   than their within-session standard errors say (machine state drifts). An
   extra variance ``tau^2`` is estimated from successive differences (von Neumann
   1941) robustly, from the median of the squared differences scaled by the
   median of a chi-square with 1 df -- a step moves one difference only.
   Weights are ``w_i = 1/(se_i^2 + tau^2)``.
3. **Is there any step?** Under the weighted Gaussian cost
   ``sum w_i (x_i - xbar_w)^2`` the statistic is the largest cost reduction by
   one step (``W_L W_R / W (m_L - m_R)^2``) or by a step and a step back (an
   inner stretch cut out, a regression later fixed, less a price ``2 ln N`` for
   the second change, Schwarz 1978 style). Its null distribution comes from a
   permutation test: under a flat series the points are interchangeable, so
   the whole procedure (tau^2 included) is redone on shuffled orders (999, fixed
   seed; stopped early once the answer is certain, Besag & Clifford 1991). The
   p-value ``(1 + #{T* >= T})/(1 + R)`` makes the chance of a false step in a
   flat series at most ``alpha`` -- exactly, whatever the noise, as long as the
   points are interchangeable. The price of that guarantee: a shift seen in a
   single point cannot be told from one unlucky session. A lone odd point in
   the middle is never reported; a shift of the newest point alone only once
   the host has more than ``2/alpha`` points (40 at 0.05); two or more
   shifted points at the end are found much sooner.
4. **Where are the steps?** Only if the test rejects, PELT (Killick, Fearnhead &
   Eckley 2012, JASA 107:1590) finds the optimal segmentation under the same
   cost with penalty ``min(c, (c + 2 ln N)/2)`` per step, ``c`` the permutation
   ``1 - alpha`` quantile, so whatever made the test fire is always found;
   then any step whose own split (between the segments on either side) is
   weaker than ``c`` is dropped, weakest first.
5. **Each step** is reported at the first commit of the new segment, as the
   ratio ``exp(mean_after - mean_before)`` of the two neighbouring segments'
   weighted means with a normal interval, and whether it **persists**: every
   later segment of the same host is still shifted the same way
   against the segment before the step (interval of the ratio excludes 1);
   ``None`` when only one point follows. Intervals ignore that the step location was
   chosen from the data, so they are somewhat optimistic.
6. **The newest commits** of the host measured last get a test of their own
   (`benchharness.history.tip`), on the stretch since its last step: a change
   shown by two or more of the newest commits is a step (``found_by``
   ``"newest commits"``) even in a short series; a change shown by the newest
   commit alone -- from either test -- is reported apart, as **not yet
   confirmed** (``Detection.unconfirmed``), never as a step. That host's level
   is shared: ``alpha/2`` for the whole-series test, ``alpha/2`` for the newest
   commits, so a steady series still shows a false step with chance at most
   ``alpha`` (Bonferroni); other hosts keep ``alpha`` for the whole-series test.

Each host's points are searched on their own, in order (a pool of machines
measured in turn still gets detection per machine). A change of host between
consecutive points is reported as a ``HostBreak`` (with the ratio across it, for
information) and never as a step.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

MIN_POINTS = 4          # fewer points on one host: no step detection
N_SIMULATIONS = 999     # shuffles for the permutation test


@dataclass(frozen=True)
class Step:
    index: int                 # position in the series of the first point after the step
    ratio: float               # exp(mean after - mean before)
    ratio_low: float
    ratio_high: float
    persists: bool | None      # None: too few points after to say
    statistic: float           # cost reduction of this split (chi-square-like)
    critical: float            # penalty / critical value used
    found_by: str = "whole series"   # or "newest commits" (benchharness.history.tip)
    newest: int = 0            # not yet confirmed only: how many newest commits show it


@dataclass(frozen=True)
class HostBreak:
    index: int                 # first point measured on the new host
    from_host: str
    to_host: str
    ratio: float | None        # across the break, for information only
    ratio_low: float | None
    ratio_high: float | None


@dataclass(frozen=True)
class Segment:
    start: int                 # inclusive
    stop: int                  # exclusive
    mean: float                # weighted mean of the log means
    se: float
    host: str


@dataclass(frozen=True)
class Detection:
    steps: tuple[Step, ...]
    breaks: tuple[HostBreak, ...]
    segments: tuple[Segment, ...]
    tau: tuple[float, ...] = field(default=())      # session noise SD per host
    alpha: float = 0.05
    unconfirmed: tuple[Step, ...] = field(default=())  # newest commit alone differs


# ----------------------------------------------------------------- variances

def moderated_variances(sd, n):
    """Smyth (2004) moderated per-point variances of the mean; NaN sd allowed (n = 1)."""
    from scipy import special, optimize

    sd = np.asarray(sd, dtype=float)
    n = np.asarray(n, dtype=float)
    df = np.where(np.isfinite(sd) & (n >= 2), n - 1, 0.0)
    s2 = np.where(df > 0, sd ** 2, np.nan)
    have = (df > 0) & (s2 > 0)
    if not have.any():
        return np.full(len(sd), np.nan)
    dfh, s2h = df[have], s2[have]
    e = np.log(s2h) - special.digamma(dfh / 2) + np.log(dfh / 2)
    emean = e.mean()
    d0 = math.inf
    if have.sum() >= 3:
        excess = e.var(ddof=1) - special.polygamma(1, dfh / 2).mean()
        if excess > 1e-12:
            # solve trigamma(d0/2) = excess
            f = lambda d: special.polygamma(1, d / 2) - excess  # noqa: E731
            try:
                d0 = optimize.brentq(f, 1e-6, 1e7)
            except ValueError:
                d0 = math.inf
    if math.isinf(d0):
        # no spread beyond chance: one common variance, whose maximum-likelihood
        # estimate is the pooled (df-weighted) sample variance
        s0sq = float(np.sum(dfh * s2h) / np.sum(dfh))
        post = np.full(len(sd), s0sq)
    else:
        s0sq = float(np.exp(emean + special.digamma(d0 / 2) - np.log(d0 / 2)))
        post = np.where(df > 0, (d0 * s0sq + df * np.nan_to_num(s2)) / (d0 + df), s0sq)
    return post / n


_MEDIAN_CHI2_1 = 0.4549364231195724   # median of a chi-square with 1 df


def session_variance(x, v):
    """Robust extra between-point variance tau^2 from successive differences.

    ``tau^2 = max(0, (median(d^2)/m1 - median(v_i + v_{i+1})) / 2)`` with ``d`` the
    successive differences and ``m1`` the median of chi-square(1): a step
    changes one difference only, so it barely moves the estimate. ``x`` may be
    a 2-D array of series (one per row); the result then has one value per row.
    """
    x = np.asarray(x, dtype=float)
    v = np.asarray(v, dtype=float)
    if x.shape[-1] < 3:
        return np.zeros(x.shape[:-1]) if x.ndim > 1 else 0.0
    d2 = np.diff(x, axis=-1) ** 2
    base = np.median(v[..., :-1] + v[..., 1:], axis=-1)
    tau2 = np.maximum(0.0, (np.median(d2, axis=-1) / _MEDIAN_CHI2_1 - base) / 2)
    return tau2 if x.ndim > 1 else float(tau2)


# ------------------------------------------------------------ the statistics

def segment_statistic(X, w, extra: float = 0.0):
    """Per row of X: the largest cost reduction by one step or by a step and a step back.

    One step at k: ``W_L W_R / W (m_L - m_R)^2``. A step and a step back, i.e. an
    inner stretch ``[i, j)`` cut out of the rest: ``W_in W_out / W (m_in - m_out)^2``
    minus ``extra`` (the price of the second change).
    """
    X = np.atleast_2d(np.asarray(X, dtype=float))
    w = np.broadcast_to(np.asarray(w, dtype=float), X.shape)
    R, N = X.shape
    zeros = np.zeros((R, 1))
    Cw = np.concatenate([zeros, np.cumsum(w, axis=1)], axis=1)
    Cx = np.concatenate([zeros, np.cumsum(w * X, axis=1)], axis=1)
    W = Cw[:, -1:]
    S = Cx[:, -1:]
    best = _split_stats(X, w).max(axis=1) if N > 1 else np.zeros(R)
    with np.errstate(divide="ignore", invalid="ignore"):
        for i in range(1, N - 1):
            Win = Cw[:, i + 1:N] - Cw[:, i:i + 1]       # stretches [i, j), i < j < N
            Sin = Cx[:, i + 1:N] - Cx[:, i:i + 1]
            Wout = W - Win
            stat = Win * Wout / W * (Sin / Win - (S - Sin) / Wout) ** 2 - extra
            best = np.maximum(best, stat.max(axis=1))
    return best


def step_back_price(N: int) -> float:
    """Extra cost of a second change: 2 ln N, a Schwarz (1978) type price."""
    return 2.0 * math.log(max(N, 2))


def _split_stats(X, w):
    """Split statistics for each row of X; ``w`` one weight vector or one per row."""
    w = np.broadcast_to(w, X.shape)
    cw = np.cumsum(w, axis=1)
    W = cw[:, -1:]
    cwx = np.cumsum(X * w, axis=1)
    WL = cw[:, :-1]
    WR = W - WL
    L = cwx[:, :-1]
    R = cwx[:, -1:] - L
    return WL * WR / W * (L / WL - R / WR) ** 2


def weights(x, v):
    """Weights ``1/(v + tau^2)`` with tau^2 estimated from this order of the points."""
    return 1.0 / (np.asarray(v, dtype=float) + session_variance(x, v))


def permutation_test(x, v, alpha: float, n_perm: int = N_SIMULATIONS,
                     seed: int = 20120) -> tuple[float, float, float]:
    """(statistic, critical value, p-value) of "no step" by permuting the points.

    Under a flat series the points (each mean with its variance) are
    interchangeable, so shuffling their order -- and redoing the whole
    procedure, including the estimate of tau^2, on each shuffle -- gives the
    null distribution of the statistic exactly (Monte Carlo version,
    p = (1 + #{T* >= T}) / (1 + R); fixed seed, so results repeat). Shuffling
    stops as soon as p can no longer reach ``alpha`` (the decision is the same as
    with all R shuffles); the critical value is then NaN and p a lower bound.
    """
    x = np.asarray(x, dtype=float)
    v = np.asarray(v, dtype=float)
    N = len(x)
    extra = step_back_price(N)
    t_obs = float(segment_statistic(x[None, :], weights(x, v)[None, :], extra)[0])
    rng = np.random.default_rng([seed, N])
    out = []
    chunk = max(1, min(100, n_perm, 2_000_000 // max(N, 1)))
    done = 0
    exceed = 0
    while done < n_perm:
        m = min(chunk, n_perm - done)
        idx = rng.permuted(np.tile(np.arange(N), (m, 1)), axis=1)
        X, V = x[idx], v[idx]
        W = 1.0 / (V + session_variance(X, V)[:, None])
        null = segment_statistic(X, W, extra)
        out.append(null)
        done += m
        exceed += int(np.sum(null >= t_obs * (1 - 1e-12)))
        if (1 + exceed) / (1 + n_perm) > alpha:
            return t_obs, math.nan, (1 + exceed) / (1 + n_perm)
    null = np.concatenate(out)
    return t_obs, float(np.quantile(null, 1 - alpha)), (1 + exceed) / (1 + n_perm)


def pelt(x, w, penalty: float, min_size: int = 1) -> list[int]:
    """Changepoints (indices of the first point of each new segment) by PELT.

    Killick, Fearnhead & Eckley (2012); cost of a segment ``sum w (x - xbar_w)^2``,
    which satisfies the pruning condition with K = 0.
    """
    x = np.asarray(x, dtype=float)
    w = np.asarray(w, dtype=float)
    n = len(x)
    S0 = np.concatenate([[0.0], np.cumsum(w)])
    S1 = np.concatenate([[0.0], np.cumsum(w * x)])
    S2 = np.concatenate([[0.0], np.cumsum(w * x * x)])

    def cost(a, b):  # points a..b-1 (arrays of a)
        s0 = S0[b] - S0[a]
        s1 = S1[b] - S1[a]
        return np.maximum(S2[b] - S2[a] - s1 * s1 / s0, 0.0)

    F = np.full(n + 1, np.inf)
    F[0] = -penalty
    last = np.zeros(n + 1, dtype=int)
    cand = np.array([0])
    for t in range(min_size, n + 1):
        ok = cand[t - cand >= min_size]
        if len(ok) == 0:
            continue
        vals = F[ok] + cost(ok, t) + penalty
        j = int(np.argmin(vals))
        F[t] = vals[j]
        last[t] = ok[j]
        keep = cand[(t - cand < min_size) | (F[cand] + cost(cand, t) <= F[t])]
        cand = np.append(keep, t)
    cps = []
    t = n
    while t > 0:
        t = int(last[t])
        if t > 0:
            cps.append(t)
    return sorted(cps)


def local_statistics(x, w, cps) -> list[float]:
    """For each changepoint, the one-step statistic between its two neighbouring segments."""
    edges = [0, *cps, len(x)]
    out = []
    for j, cpt in enumerate(cps):
        a, b = edges[j], edges[j + 2]
        out.append(float(_split_stats(np.asarray(x[a:b])[None, :],
                                      np.asarray(w[a:b]))[0][cpt - a - 1]))
    return out


def prune_steps(x, w, cps, threshold: float) -> list[int]:
    """Drop, weakest first, steps whose local statistic is below ``threshold``.

    PELT's penalty is set so the change that made the test fire is found; other
    steps it adds must each stand on their own: the split between the segments
    on either side must be as strong as the test's critical value (which, being
    calibrated on the whole series, is on the safe side for a shorter window).
    """
    cps = list(cps)
    while cps:
        stats_ = local_statistics(x, w, cps)
        j = int(np.argmin(stats_))
        if stats_[j] >= threshold:
            break
        del cps[j]
    return cps


# ----------------------------------------------------------------- detection

def _wmean(x, w):
    W = float(np.sum(w))
    return float(np.sum(w * x) / W), 1.0 / math.sqrt(W)


def _ratio(m_after, se_after, m_before, se_before, z):
    d = m_after - m_before
    se = math.hypot(se_after, se_before)
    return math.exp(d), math.exp(d - z * se), math.exp(d + z * se)


def detect_steps(x, sd, n, hosts=None, alpha: float = 0.05, conf_level: float = 0.95,
                 n_sim: int = N_SIMULATIONS) -> Detection:
    """Find steps in a series of per-commit log means.

    ``x``: mean of ln(response) per point, oldest first; ``sd``: SD of the logs
    within each point (NaN when n = 1); ``n``: runs per point; ``hosts``: host
    fingerprint per point. The points of each host are searched on their own
    (in order), so a pool of machines measured in turn still gets step
    detection per machine; every change of host between consecutive points is
    a known break. ``alpha``: chance of a false step in a flat series of one host.
    Segment ``start``/``stop`` are positions in the whole series (first point,
    one past the last point of the segment on its host).
    """
    from scipy import stats

    from benchharness.history import tip

    x = np.asarray(x, dtype=float)
    sd = np.asarray(sd, dtype=float)
    n = np.asarray(n, dtype=float)
    N = len(x)
    hosts = list(hosts) if hosts is not None else ["host"] * N
    newest = hosts[-1] if N else None
    unconfirmed: list[Step] = []
    z = float(stats.norm.ppf(0.5 + conf_level / 2))
    groups: dict[str, list[int]] = {}
    for i, h in enumerate(hosts):
        groups.setdefault(h, []).append(i)
    steps: list[Step] = []
    segments: list[Segment] = []
    taus: list[float] = []
    segment_of: dict[int, Segment] = {}
    for host, idx in groups.items():
        idx_a = np.asarray(idx)
        xs = x[idx_a]
        v = _host_variances(xs, sd[idx_a], n[idx_a])
        tau2 = session_variance(xs, v)
        taus.append(math.sqrt(tau2))
        w = 1.0 / (v + tau2)
        at_tip = host == newest and len(xs) >= tip.MIN_TIP_POINTS
        level = alpha / 2 if at_tip else alpha      # shared with the newest-commits test
        cps, crit = _whole_series_steps(xs, v, w, level, n_sim)
        found_by = {k: ("whole series", crit) for k in cps}
        pending = _newest_commits(xs, v, cps, found_by, alpha, crit) if at_tip else None
        edges = [0] + cps + [len(xs)]
        segs = _host_segments(xs, w, idx_a, edges, host)
        for seg, s0, s1 in zip(segs, edges[:-1], edges[1:]):
            for k in idx_a[s0:s1]:
                segment_of[int(k)] = seg
        segments.extend(segs)
        steps.extend(_host_steps(xs, w, idx_a, cps, segs, found_by, crit, z))
        if pending is not None:
            k, stat_p, crit_p = pending
            m0, se0 = _wmean(xs[edges[-2]:k], w[edges[-2]:k])   # the stretch before it
            m1, se1 = _wmean(xs[k:], w[k:])                       # the newest commits
            r, lo, hi = _ratio(m1, se1, m0, se0, z)
            unconfirmed.append(Step(int(idx_a[k]), r, lo, hi, None, stat_p, crit_p,
                                    "newest commits", len(xs) - k))
    breaks = _host_breaks(hosts, segment_of, z)
    steps.sort(key=lambda st: st.index)
    segments.sort(key=lambda sg: (sg.start, sg.host))
    return Detection(tuple(steps), tuple(breaks), tuple(segments), tuple(taus), alpha,
                     tuple(unconfirmed))


def _host_variances(xs: np.ndarray, sd: np.ndarray, n: np.ndarray) -> np.ndarray:
    """Variance of each point's log mean on one host, moderated; when no point has a usable
    spread (single runs everywhere), the scatter of the points themselves."""
    v = moderated_variances(sd, n)
    if not np.isfinite(v).all():
        # no usable spread at all (single runs everywhere): fall back to the
        # scatter of the points themselves
        spread = np.var(np.diff(xs), ddof=0) / 2 if len(xs) > 2 else np.nan
        v = np.full(len(xs), spread if np.isfinite(spread) and spread > 0 else 1e-12)
    return v


def _whole_series_steps(xs, v, w, level: float, n_sim: int) -> tuple[list[int], float]:
    """(step positions, critical value) of one host's series: a permutation test at
    ``level`` for any step, then PELT and pruning to place them when it fires."""
    cps: list[int] = []
    crit = math.nan
    if len(xs) >= MIN_POINTS:
        stat, crit, pvalue = permutation_test(xs, v, level, n_sim)
        if pvalue <= level:
            # penalty per step min(c, (c + price)/2): whatever made the test
            # fire (one step, or a step and a step back) is then always found
            c = min(crit, stat * (1 - 1e-9))
            cps = pelt(xs, w, min(c, (c + step_back_price(len(xs))) / 2))
            cps = prune_steps(xs, w, cps, c)
    return cps, crit


def _newest_commits(xs, v, cps: list[int], found_by: dict, alpha: float, crit: float):
    """The newest-commits test on the series since its last step (updates ``cps`` and
    ``found_by`` with a confirmed step); the step not yet confirmed, as (index in xs,
    statistic, critical), or None."""
    from benchharness.history import tip

    pending = None       # (index in xs, statistic, critical): the newest point alone
    if cps and cps[-1] == len(xs) - 1:
        pending = (cps.pop(), math.nan, crit)   # one commit shows it: not yet
    start = cps[-1] if cps else 0
    res = tip.tip_test(xs[start:], v[start:], alpha / 2)
    if res is not None and res.confirmed:
        cps.append(len(xs) - res.k)
        found_by[len(xs) - res.k] = ("newest commits", res.critical)
        pending = None
    elif res is not None:
        # the newest res.k commits differ (k = 1: the newest alone), but the
        # look before did not show it yet: not yet confirmed, at the first of them
        pending = (len(xs) - res.k, res.statistic, res.critical)
    return pending


def _host_segments(xs, w, idx_a, edges: list[int], host) -> list[Segment]:
    """The segments between one host's steps, each with its weighted mean and SE."""
    segs = []
    for s0, s1 in zip(edges[:-1], edges[1:]):
        m, se = _wmean(xs[s0:s1], w[s0:s1])
        segs.append(Segment(int(idx_a[s0]), int(idx_a[s1 - 1]) + 1, m, se, host))
    return segs


def _host_steps(xs, w, idx_a, cps: list[int], segs: list[Segment], found_by: dict,
                crit: float, z: float) -> list[Step]:
    """One host's steps: the ratio across each with its interval, and whether every later
    segment stays shifted the same way (None when too few points follow)."""
    steps = []
    local = local_statistics(xs, w, cps)
    for j, cp in enumerate(cps):
        before, after = segs[j], segs[j + 1]
        r, lo, hi = _ratio(after.mean, after.se, before.mean, before.se, z)
        if len(xs) - cp < 2:
            persists = None
        else:
            # every later segment of this host stays shifted the same way
            persists = True
            for later in segs[j + 1:]:
                _, rlo, rhi = _ratio(later.mean, later.se, before.mean, before.se, z)
                if not (rlo > 1 if r > 1 else rhi < 1):
                    persists = False
        by, used = found_by.get(cp, ("whole series", crit))
        steps.append(Step(int(idx_a[cp]), r, lo, hi, persists, local[j], used, by))
    return steps


def _host_breaks(hosts: list, segment_of: dict[int, Segment], z: float) -> list[HostBreak]:
    """Every change of host between consecutive points, with the ratio across it."""
    breaks: list[HostBreak] = []
    for b in range(1, len(hosts)):
        if hosts[b] == hosts[b - 1]:
            continue
        before, after = segment_of[b - 1], segment_of[b]
        r, lo, hi = _ratio(after.mean, after.se, before.mean, before.se, z)
        breaks.append(HostBreak(b, hosts[b - 1], hosts[b], r, lo, hi))
    return breaks
