"""Does the candidate fail more often than the baseline? An exact sequential test.

Some commands fail now and then (a flaky test fixture, a race, a full temporary
disk). When both builds do, one failed candidate run says nothing: identical
builds that fail 1 run in 10 would "regress" in about half of all gates if it
decided. This module owns the comparison of failure *rates*.

Each block holds one run of each build. Only the **discordant** blocks, where
exactly one of the two runs failed, carry information about which build fails
more often (McNemar 1947). If the two builds fail with the same probability,
independently, then given that a block is discordant the candidate is the one
that failed with probability exactly 1/2, whatever that common probability is.
So, counting discordant blocks ``k = 1, 2, ...`` in the order they happen, the
number ``S_k`` of them where the candidate failed alone is a fair-coin random
walk under "equal rates": the test is exact and needs no failure rate.

The gate looks after every discordant block and calls a regression when
``S_k >= u_k``. The boundaries ``u_k`` spend the one-sided level with the
Lan & DeMets (1983) Pocock-type spending function
``A(t) = alpha * ln(1 + (e - 1) t)`` over at most ``K`` discordant blocks (the
budget of blocks), ``t = k / K``: the level goes mostly to early looks, so a
candidate that fails much more often is caught within a few discordant blocks.
They are computed exactly by propagating the law of ``S_k`` on the paths that
have not crossed yet (a discrete version of the recursion of Armitage,
McPherson & Rowe 1969). Because ``S_k`` is discrete, each look spends at most
what the spending function allows; what is left carries to the next look. The
error rate at equal failure rates is therefore at most ``alpha`` however the
gate stops. The tail is one-sided: a baseline that fails more often never makes
a regression.
"""

from __future__ import annotations

import math
from functools import lru_cache

from benchharness.numbers import plural


def pocock_spending(t: float, alpha: float) -> float:
    """Lan & DeMets (1983) Pocock-type spending function: alpha * ln(1 + (e - 1) t)."""
    if t <= 0:
        return 0.0
    if t >= 1:
        return alpha
    return alpha * math.log1p((math.e - 1.0) * t)


@lru_cache(maxsize=64)
def sign_boundaries(max_discordant: int, alpha: float) -> tuple[int | None, ...]:
    """``u_k`` for ``k = 1 .. max_discordant`` (None: no count can decide at that look).

    Exact: ``P(S_j < u_j for j < k, S_k >= u_k) <= A(k / K) - (level spent
    before k)`` for a fair-coin walk ``S``.
    """
    import numpy as np

    K = max(1, int(max_discordant))
    alive = np.zeros(K + 2)
    alive[0] = 1.0                      # law of S on paths that have not crossed yet
    spent = 0.0
    out: list[int | None] = []
    for k in range(1, K + 1):
        nxt = 0.5 * alive
        nxt[1:] += 0.5 * alive[:-1]
        alive = nxt
        want = pocock_spending(k / K, alpha) - spent
        tail = np.cumsum(alive[::-1])[::-1]           # tail[u] = P(S_k >= u, alive)
        # smallest u in 1..k whose tail fits the level left (tiny slack for round-off)
        fits = [u for u in range(1, k + 1) if tail[u] <= want * (1 + 1e-12)]
        if not fits or tail[fits[0]] <= 0:
            out.append(None)
            continue
        u = fits[0]
        spent += float(tail[u])
        alive[u:] = 0.0
        out.append(u)
    return tuple(out)


def failure_verdict(only_candidate: int, only_baseline: int, max_discordant: int,
                    alpha: float, rates: str = "") -> str | None:
    """A regression reason when the candidate fails more often at this look, else None;
    ``rates`` (`rates_words`) is said first when given."""
    k = only_candidate + only_baseline
    if k == 0 or only_candidate <= only_baseline:
        return None
    bounds = sign_boundaries(max(k, int(max_discordant)), round(float(alpha), 15))
    u = bounds[k - 1]
    if u is None or only_candidate < u:
        return None
    rates = f"{rates}; " if rates else ""
    return (f"the candidate fails more often: {rates}it alone failed in {plural(only_candidate, 'block')}, "
            f"the baseline alone in {only_baseline} (exact sequential sign test, "
            f"level {alpha:.3g})")


def lean_p(only_candidate: int, only_baseline: int) -> float:
    """One-sided exact sign-test p of the discordant counts (no sequential adjustment)."""
    k = only_candidate + only_baseline
    if k == 0:
        return 1.0
    return sum(math.comb(k, j) for j in range(only_candidate, k + 1)) / 2.0 ** k


def failures_lean_against(only_candidate: int, only_baseline: int, hold: float) -> bool:
    """True while the candidate's excess failures are suggestive: p below ``hold``.

    Used to hold back a pass by the timings, never to call a regression (the
    sequential test above does that), so it costs blocks, not level.
    """
    return only_candidate > only_baseline and lean_p(only_candidate, only_baseline) < hold


def rate_interval(failed: int, runs: int, confidence: float = 0.95
                  ) -> tuple[float, float, float] | None:
    """(rate, lower, upper): the share of ``runs`` that failed with its two-sided
    Wilson score interval at ``confidence`` (Wilson 1927), or None without runs.

    The Wilson interval keeps its coverage near the stated level for the small
    counts a gate sees (a few failures in 10-100 runs) and never leaves 0..1,
    where the plain normal interval collapses to a point at 0 or 1 failures
    (Brown, Cai & DasGupta 2001).
    """
    from statistics import NormalDist

    if runs <= 0:
        return None
    z = NormalDist().inv_cdf(0.5 + confidence / 2.0)
    p = failed / runs
    den = 1.0 + z * z / runs
    mid = (p + z * z / (2 * runs)) / den
    half = z * math.sqrt(p * (1 - p) / runs + z * z / (4 * runs * runs)) / den
    return p, max(0.0, mid - half), min(1.0, mid + half)


def rates_words(candidate_failed: int, baseline_failed: int, runs: int,
                confidence: float = 0.95) -> str:
    """"50% [28% to 72%] of its runs vs 0% [0% to 19%] of the baseline's (95% Wilson
    intervals)": each build's failure rate over its ``runs`` timed runs (`rate_pair`)."""
    c, b = rate_pair(candidate_failed, baseline_failed, runs, confidence)
    return (f"{c} of its runs vs {b} of the baseline's "
            f"({confidence * 100:g}% Wilson intervals)")


def rate_pair(candidate_failed: int, baseline_failed: int, runs: int,
              confidence: float = 0.95) -> tuple[str, str]:
    """Each build's failure rate with its Wilson interval (`rate_interval`), written
    ``50% [28% to 72%]`` (`benchharness.numbers.fmt_pct`); ``n/a`` without runs."""
    from benchharness.numbers import fmt_pct

    def one(failed):
        r = rate_interval(failed, runs, confidence)
        if r is None:
            return "n/a"
        return f"{fmt_pct(r[0], 0)} [{fmt_pct(r[1], 0)} to {fmt_pct(r[2], 0)}]"

    return one(candidate_failed), one(baseline_failed)
