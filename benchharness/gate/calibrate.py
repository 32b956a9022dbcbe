"""How much of the level the gate's bounds may spend: the rule's error on null paths with their own horizons.

The gate plans its horizon (the blocks at which the whole level is spent) from
the noise estimate, re-planned at every look. That estimate also studentizes
the statistic, so on a path where it comes out small the statistic is inflated
*and* the horizon is short: the spending runs ahead exactly when the statistic
is too large. This is the type I error inflation of re-estimating the sample
size from an internal pilot (Wittes & Brittain 1990). Its size depends on the
true noise relative to the design distance, which the gate does not know;
the remedy of Kieser & Friede (2000) is to spend a smaller nominal level, the
largest one whose error stays within the target in the worst case over the
noise.

This module measures that error for the gate's own rule. Each simulated path
(normal log differences, true log ratio exactly ``log(1 + tolerance)``) carries
its own resistant estimate (`benchharness.gate.robust`) and therefore its own
horizon, look by look, as a real gate does (``horizon_from`` "ratchet", the
pilot's floor of ``ratchet_from`` blocks, `benchharness.gate.decide`). The
boundaries are the resistant statistic's boundaries for a horizon fixed from the
start, on seeded null paths; the real spending record
(`benchharness.gate.sequential.SpendingTracker`) also counts what earlier looks
really spent, which the full gate simulation
(``experiments/bench/gate_validation.py --sections rates``) measures to err a
little lower. Everything is vectorized over paths; the numbers are
deterministic for a seed.
"""

from __future__ import annotations

import math

RULES = ("known", "no-pilot", "pilot")


def horizons(sd, settings, alpha: float):
    """`SequentialDesign.horizon` of an array of noise estimates (the same formula)."""
    import numpy as np
    from scipy.stats import norm

    za, zb = norm.isf(alpha), norm.isf(settings.beta)
    n = ((za + zb) * np.asarray(sd) / settings.design_delta) ** 2 + za * za / 2.0
    return np.minimum(settings.max_runs,
                      np.maximum(settings.min_runs, np.ceil(settings.horizon_factor * n))
                      ).astype(int)


def boundary_table(alpha: float, settings, paths: int = 20_000, seed: int = 19830101):
    """``table[N, n]``: boundary of the resistant statistic at look n for horizon N.

    Lan & DeMets (1983) O'Brien-Fleming-type spending over looks at every block
    from ``min_runs`` to N (the whole level at N), as empirical quantiles of the
    seeded null paths still inside (as `SpendingTracker` does); inf where a
    look spends nothing.
    """
    import numpy as np

    from benchharness.gate.sequential import null_robust_column, obf_spending

    top, first = settings.max_runs, settings.min_runs
    cols = {n: null_robust_column(paths, seed, n) for n in range(first, top + 1)}
    table = np.full((top + 1, top + 1), np.inf)
    for N in range(first, top + 1):
        alive = np.ones(paths, dtype=bool)
        spent = 0
        for n in range(first, N + 1):
            target = obf_spending(n / N, alpha) if n < N else alpha
            want = round(target * paths) - spent
            if want <= 0:
                continue
            t = cols[n]
            cand = t[alive]
            if want >= cand.size:
                table[N, n] = -np.inf
                break
            part = np.partition(cand, cand.size - want - 1)
            b = (float(part[cand.size - want:].min()) + float(part[cand.size - want - 1])) / 2
            table[N, n] = b
            crossed = alive & (t >= b)
            spent += int(crossed.sum())
            alive &= ~crossed
    return table


def null_paths_at_boundary(cv: float, settings, paths: int = 10_000, seed: int = 3,
                           outliers: float = 0.0, outlier_factor: float = 1.5):
    """Resistant location and standard error after every block, for paths at the boundary.

    Run times lognormal with coefficient of variation ``cv`` (each run of each
    build), true slowdown ratio exactly ``1 + tolerance``; with probability
    ``outliers`` a run takes ``outlier_factor`` times as long (as
    `SimulatedModel`). Returns ``(mu, se)``, arrays indexed ``[n, path]`` for n
    blocks.
    """
    import numpy as np

    from benchharness.gate.robust import robust_location

    top = settings.max_runs
    rng = np.random.default_rng(seed + round(cv * 10_000) + round(outliers * 1000))
    s = math.sqrt(math.log1p(cv * cv))
    slow = math.log(outlier_factor)

    def runs():
        x = rng.normal(0.0, s, (paths, top))
        return x + slow * (rng.random((paths, top)) < outliers) if outliers > 0 else x

    d = runs() - runs() + settings.threshold_log
    mu = np.zeros((top + 1, paths))
    se = np.ones((top + 1, paths))
    for n in range(max(2, settings.min_runs), top + 1):
        m, e, _ = robust_location(d[:, :n])
        mu[n], se[n] = m, np.maximum(e, 1e-300)
    return mu, se


def boundary_false_fail(mu, se, cv: float, share: float, rule: str, settings,
                        table=None) -> float:
    """Share of the paths ``(mu, se)`` the rule calls a regression (true ratio 1 + tolerance).

    ``rule``: "pilot" (the gate's: horizon from the current estimate, at least
    ``ratchet_from`` blocks, from there the largest estimate), "no-pilot" (the
    same without the floor: the rule before the pilot) or "known" (the horizon
    from the true noise: the level spent is then held). ``share`` is the share
    of ``1 - confidence`` spent.
    """
    import numpy as np

    if rule not in RULES:
        raise ValueError(f"rule must be one of {RULES}")
    alpha = share * (1.0 - settings.confidence)
    if table is None:
        table = boundary_table(alpha, settings)
    top, first, rf = settings.max_runs, settings.min_runs, settings.ratchet_from
    thr = settings.threshold_log
    paths = mu.shape[1]
    alive = np.ones(paths, dtype=bool)
    fail = np.zeros(paths, dtype=bool)
    most = np.zeros(paths)
    true_sd = math.sqrt(2.0 * math.log1p(cv * cv))
    for n in range(first, top + 1):
        sd = se[n] * math.sqrt(n)
        if rule == "known":
            plan = np.full(paths, true_sd)
        elif n < rf:
            plan = sd
        else:
            most = np.maximum(most, sd)
            plan = most
        horizon = horizons(plan, settings, alpha)
        if rule == "pilot":
            horizon = np.maximum(horizon, min(rf, top))
        b = table[np.maximum(horizon, n), n]
        t = (mu[n] - thr) / se[n]
        f = alive & (t >= b)
        p = alive & (-t >= b) & ~f
        fail |= f
        alive &= ~(f | p | (n >= horizon))
        if not alive.any():
            break
    return float(fail.mean())
